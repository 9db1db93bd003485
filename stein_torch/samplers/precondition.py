"""Whitening: an affine change of coordinates that makes the posterior look like a standard normal.

SVGD with an isotropic kernel stalls on badly scaled posteriors. Running it on u with
z = shift + L u, where L L^T is the inverse curvature at the mode (a Laplace approximation) or the
particles' covariance, is the same as SVGD with a constant matrix-valued kernel ("Stein Variational
Gradient Descent With Matrix-Valued Kernels", arXiv:1910.12794, from memory). The score transforms
as s_u = s_z L, the log density changes by a constant.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

from ..model import Target

__all__ = ["Affine", "laplace_whitening", "covariance_affine", "rewhiten_due", "LAPLACE_MAX_DIM", "REWHITEN_LAST"]

LAPLACE_MAX_DIM = 1000  # dense Hessian whitening up to this many coordinates
REWHITEN_FIRST = 25  # SVGD re-whitens by the particles' covariance at steps 25, 50, 100, 200, 400
REWHITEN_LAST = 400  # and not after: a re-whitening at step 800 threw the 2-D banana's settled set off


@dataclass
class Affine:
    """z = shift + u @ matrix.T for row-vector particles, optionally one map per ensemble.

    Attributes
    ----------
    shift : Tensor of shape (d,) or (B, d)
    matrix : Tensor of shape (d, d) or (B, d, d)
        Lower triangular.
    """

    shift: torch.Tensor
    matrix: torch.Tensor

    @classmethod
    def identity(cls, dim: int, dtype, device=None) -> "Affine":
        return cls(torch.zeros(dim, dtype=dtype, device=device), torch.eye(dim, dtype=dtype, device=device))

    def to_z(self, u: torch.Tensor) -> torch.Tensor:
        """u (B, N, d) -> z (B, N, d)."""
        if self.matrix.dim() == 2 and self.shift.dim() == 1:  # one map for all: a single addmm
            return torch.addmm(self.shift, u.reshape(-1, u.shape[-1]), self.matrix.mT).view(u.shape)
        return self.shift.unsqueeze(-2) + u @ self.matrix.mT

    def to_u(self, z: torch.Tensor) -> torch.Tensor:
        """z (B, N, d) -> u (B, N, d)."""
        rhs = (z - self.shift.unsqueeze(-2)).mT
        return torch.linalg.solve_triangular(self.matrix, rhs, upper=False).mT

    def score_u(self, score_z: torch.Tensor) -> torch.Tensor:
        """Scores on z (B, N, d) -> scores on u (B, N, d)."""
        return score_z @ self.matrix

    def score_z(self, score_u: torch.Tensor) -> torch.Tensor:
        """Scores on u (B, N, d) -> scores on z (B, N, d)."""
        return torch.linalg.solve_triangular(self.matrix.mT, score_u.mT, upper=True).mT

    def state_dict(self) -> dict:
        return {"shift": self.shift.clone(), "matrix": self.matrix.clone()}

    @classmethod
    def from_state_dict(cls, state: dict) -> "Affine":
        return cls(state["shift"].clone(), state["matrix"].clone())


def find_mode(target: Target, start: torch.Tensor, max_iter: int = 500) -> tuple[torch.Tensor, bool]:
    """Maximise the unconstrained log density by L-BFGS with a strong-Wolfe line search.

    Parameters
    ----------
    start : Tensor of shape (dim,)

    Returns
    -------
    mode : Tensor of shape (dim,)
    ok : bool
        False when the search produced a non-finite value (no usable mode).
    """
    z = start.detach().clone().requires_grad_(True)
    opt = torch.optim.LBFGS(
        [z], lr=1, max_iter=max_iter, history_size=20, line_search_fn="strong_wolfe",
        tolerance_grad=1e-10, tolerance_change=1e-14,
    )
    failed = False

    def closure():
        nonlocal failed
        opt.zero_grad()
        lp, score = target.log_prob_and_score(z.detach()[None])
        if not (torch.isfinite(lp).all() and torch.isfinite(score).all()):
            failed = True
            z.grad = torch.zeros_like(z)
            return torch.tensor(float("inf"), dtype=z.dtype)
        z.grad = -score[0]
        return -lp[0]

    best = start.detach().clone()
    best_lp = target.log_prob(best[None])[0]
    for _ in range(4):  # restarts help when the line search stops early far from the mode
        failed = False
        opt.step(closure)
        if failed or not torch.isfinite(z).all():
            break
        lp = target.log_prob(z.detach()[None])[0]
        if not torch.isfinite(lp) or lp <= best_lp + 1e-10 * max(1.0, abs(float(best_lp))):
            if torch.isfinite(lp) and lp > best_lp:
                best, best_lp = z.detach().clone(), lp
            break
        best, best_lp = z.detach().clone(), lp
    return best, bool(torch.isfinite(best_lp))


def hessian(target: Target, z: torch.Tensor, step: float = 1e-4) -> torch.Tensor:
    """Hessian of the log density at z by central differences of autograd scores (one batched call).

    Parameters
    ----------
    z : Tensor of shape (dim,)

    Returns
    -------
    Tensor of shape (dim, dim), symmetrised.
    """
    dim = z.shape[-1]
    eps = step * z.abs().clamp_min(1.0)
    offsets = torch.diag(eps)
    points = torch.cat([z + offsets, z - offsets])  # (2 dim, dim)
    _, scores = target.log_prob_and_score(points)
    h = (scores[:dim] - scores[dim:]) / (2 * eps[:, None])
    return 0.5 * (h + h.T)


def laplace_affine(target: Target, mode: torch.Tensor) -> tuple[Affine, bool]:
    """Whitening by the curvature at the mode: L L^T = (-Hessian)^-1, eigenvalues floored.

    Returns
    -------
    affine : Affine
    ok : bool
        False when the Hessian is not finite or not negative definite (then eigenvalues are
        replaced by their absolute value, floored).
    """
    h = hessian(target, mode)
    if not torch.isfinite(h).all():
        return Affine.identity(mode.shape[-1], mode.dtype, mode.device), False
    evals, evecs = torch.linalg.eigh(-h)
    ok = bool((evals > 0).all())
    top = evals.abs().max().clamp_min(1e-12)
    floored = evals.abs().clamp_min(top * 1e-10)
    cov = (evecs / floored) @ evecs.T
    return Affine(mode.detach().clone(), _cholesky(cov)), ok


def _cholesky(cov: torch.Tensor) -> torch.Tensor:
    """Cholesky factor of a symmetric positive semi-definite matrix (..., d, d), with growing jitter."""
    cov = 0.5 * (cov + cov.mT)
    scale = torch.diagonal(cov, dim1=-2, dim2=-1).mean(-1).clamp_min(1e-300)[..., None, None]
    eye = torch.eye(cov.shape[-1], dtype=cov.dtype, device=cov.device)
    for jitter in (0.0, 1e-10, 1e-8, 1e-6, 1e-4):
        chol, info = torch.linalg.cholesky_ex(cov + jitter * scale * eye)
        if not bool((info != 0).any()):
            return chol
    return torch.diag_embed(torch.diagonal(cov, dim1=-2, dim2=-1).clamp_min(1e-300).sqrt())


class _FailuresAsNaN:
    """A view of a target whose evaluation errors read as NaN, for the mode search.

    A log density that raises outside the region where it is defined (e.g. a distribution's
    argument validation) must not stop the set-up; the mode search then treats the point like any
    other non-finite one.
    """

    def __init__(self, target: Target):
        self._target = target

    def __getattr__(self, name):
        return getattr(self._target, name)

    def log_prob_and_score(self, z):
        try:
            return self._target.log_prob_and_score(z)
        except Exception:
            nan = torch.full(z.shape[:-1], float("nan"), dtype=z.dtype, device=z.device)
            return nan, torch.full_like(z, float("nan"))

    def log_prob(self, z):
        return self.log_prob_and_score(z)[0]


def laplace_whitening(target: Target, start: torch.Tensor) -> tuple[Affine | None, bool]:
    """Mode by L-BFGS from ``start`` (dim,), then whitening by the curvature there.

    Errors raised by the log density read as NaN. Returns ``(None, False)`` when no finite mode was
    found, else the affine map and whether the Hessian was negative definite.
    """
    safe = _FailuresAsNaN(target)
    mode, ok = find_mode(safe, start)
    if not ok:
        return None, False
    return laplace_affine(safe, mode)


def covariance_affine(u: torch.Tensor, affine: Affine) -> Affine:
    """Re-whitening by the particles' own mean and covariance, one map per ensemble.

    Parameters
    ----------
    u : Tensor of shape (B, N, d)
        Particles in the coordinates of ``affine``.

    Returns
    -------
    Affine with shift (B, d) and matrix (B, d, d), mapping new whitened coordinates to z.
    """
    z = affine.to_z(u)
    n, d = z.shape[-2:]
    center = z.mean(-2)
    dev = z - center.unsqueeze(-2)
    cov = dev.mT @ dev / max(1, n - 1)
    if n <= d:  # too few particles for a full covariance: keep the diagonal
        cov = torch.diag_embed(torch.diagonal(cov, dim1=-2, dim2=-1))
    return Affine(center, _cholesky(cov))


def rewhiten_due(step: int) -> bool:
    """Whether SVGD re-whitens after ``step`` steps: at 25, 50, 100, 200, 400 (doubling gaps)."""
    if step < REWHITEN_FIRST or step > REWHITEN_LAST or step % REWHITEN_FIRST:
        return False
    ratio = step // REWHITEN_FIRST
    return ratio & (ratio - 1) == 0

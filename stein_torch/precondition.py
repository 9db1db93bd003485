"""Whitening: an affine change of coordinates that makes the posterior look like a standard normal.

SVGD with an isotropic kernel stalls on badly scaled posteriors. Running it on u with
z = shift + L u, where L L^T is the inverse curvature at the mode (a Laplace approximation) or the
particles' covariance, is the same as SVGD with a constant matrix-valued kernel ("Stein Variational
Gradient Descent With Matrix-Valued Kernels", arXiv:1910.12794, from memory). The score transforms
as s_u = s_z L, the log density changes by a constant.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import torch

from .target import Target

__all__ = ["Affine", "find_mode", "laplace_affine", "covariance_affine"]


@dataclass
class Affine:
    """z = shift + u @ matrix.T, for row-vector particles.

    Attributes
    ----------
    shift : Tensor of shape (d,)
    matrix : Tensor of shape (d, d)
    """

    shift: torch.Tensor
    matrix: torch.Tensor

    @classmethod
    def identity(cls, dim: int, dtype, device=None) -> "Affine":
        return cls(torch.zeros(dim, dtype=dtype, device=device), torch.eye(dim, dtype=dtype, device=device))

    def to_z(self, u: torch.Tensor) -> torch.Tensor:
        return self.shift + u @ self.matrix.T

    def to_u(self, z: torch.Tensor) -> torch.Tensor:
        return torch.linalg.solve_triangular(self.matrix, (z - self.shift).unsqueeze(-1), upper=False).squeeze(-1) \
            if self._lower else torch.linalg.solve(self.matrix, (z - self.shift).unsqueeze(-1)).squeeze(-1)

    def score_u(self, score_z: torch.Tensor) -> torch.Tensor:
        return score_z @ self.matrix

    @property
    def _lower(self) -> bool:
        return bool(torch.equal(self.matrix, self.matrix.tril()))

    def state_dict(self) -> dict:
        return {"shift": self.shift.clone(), "matrix": self.matrix.clone()}


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
    matrix = evecs * floored.rsqrt()
    # Keep a lower-triangular factor (a Cholesky factor of the same covariance) for cheap solves.
    cov = matrix @ matrix.T
    chol, info = torch.linalg.cholesky_ex(0.5 * (cov + cov.T))
    if int(info) == 0:
        matrix = chol
    return Affine(mode.detach().clone(), matrix), ok


def covariance_affine(z: torch.Tensor, shrink: float = 1e-6) -> Affine:
    """Whitening by the covariance of particles z (..., N, d), pooled over leading dimensions."""
    flat = z.reshape(-1, z.shape[-1])
    center = flat.mean(0)
    dev = flat - center
    n, d = flat.shape
    cov = dev.T @ dev / max(1, n - 1)
    if n <= d:  # too few particles for a full covariance: use the diagonal
        cov = torch.diag(torch.diagonal(cov))
    scale = torch.diagonal(cov).mean().clamp_min(1e-12)
    cov = cov + shrink * scale * torch.eye(d, dtype=z.dtype, device=z.device)
    chol, info = torch.linalg.cholesky_ex(cov)
    if int(info) != 0:
        chol = torch.diag(torch.diagonal(cov).clamp_min(1e-12).sqrt())
        warnings.warn("particle covariance is not positive definite; whitening by its diagonal", RuntimeWarning)
    return Affine(center, chol)


def default_start(target: Target, dtype, device=None) -> torch.Tensor:
    """The origin of the unconstrained space (mu = 0, tau = 1, theta = 0.5, ...)."""
    return torch.zeros(target.dim, dtype=dtype, device=device)


_ = math  # (kept for future log-volume terms)

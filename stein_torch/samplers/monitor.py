"""What the stop rule and the warnings watch in a particle set, computed from what a step already has.

- :func:`moments`: mean and log standard deviation of every unconstrained coordinate, per ensemble.
- :func:`moment_velocity`: how fast the flow du/dt = phi moves those moments *now*, from the SVGD
  direction itself: d mean/dt = mean_i phi_i, d var_k/dt = (2/N) sum_i (z_ik - mean_k) phi_ik, so
  d log sd_k/dt = cov(z_k, phi_k) / var_k. No score evaluation is needed.
- :func:`ksd_band`: the U-statistic of KSD^2 of each ensemble and the standard deviation it would have
  over exact draws from the target, sqrt(2 sum_{i != j} H_ij^2) / (N (N - 1)) with H the Stein kernel
  matrix of the particles (IMQ c = 1, beta = -1/2, h = 1). That is the exact standard deviation of
  the Rademacher wild-bootstrap statistic sum_{i != j} W_i W_j H_ij / (N (N - 1)) of "A Kernelized
  Stein Discrepancy for Goodness-of-fit Tests" (arXiv:1602.03253), so no bootstrap replicates are
  drawn. A particle set whose U-statistic lies below that band is at least as close to the target, as
  the kernel sees it, as exact draws would be.

Particle-axis reductions: means and covariances are taken over the gathered particle tensors (the
same on every process); the Stein kernel sums run over this process's rows and are completed by
``axis_sum`` (identity in one process).
"""

from __future__ import annotations

from typing import Callable

import torch

__all__ = ["moments", "moment_velocity", "ksd_band", "Watch"]

TINY = 1e-300


def moments(z: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Per-ensemble mean (B, d) and log standard deviation (B, d) of particles z (B, N, d)."""
    mean = z.mean(1)
    var = (z - mean.unsqueeze(1)).pow(2).mean(1)
    return mean, 0.5 * torch.log(var.clamp_min(TINY))


def moment_velocity(z: torch.Tensor, phi_z: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Largest rate of change, over coordinates, of the mean (in particle sds) and of the log sd.

    Parameters
    ----------
    z : Tensor of shape (B, N, d)
        Particles (unconstrained coordinates).
    phi_z : Tensor of shape (B, N, d)
        The flow's direction in the same coordinates.

    Returns
    -------
    mean_rate, log_sd_rate : Tensors of shape (B,)
        Per unit of flow time: max_k |mean(phi_k)| / sd_k and max_k |cov(z_k, phi_k)| / var_k.
    """
    centred = z - z.mean(1, keepdim=True)
    var = centred.pow(2).mean(1).clamp_min(TINY)
    drift = phi_z.mean(1)
    spread = (centred * (phi_z - drift.unsqueeze(1))).mean(1)
    mean_rate = (drift.abs() / var.sqrt()).amax(-1)
    log_sd_rate = (spread.abs() / var).amax(-1)
    return mean_rate, log_sd_rate


def _stein_matrix_rows(u: torch.Tensor, s: torch.Tensor, r0: int, r1: int) -> torch.Tensor:
    """H_ij = u_p(x_i, x_j) for rows i in [r0, r1) and all j, IMQ k = (1 + |x - y|^2)^(-1/2).

    u_p(x, y) = k s(x).s(y) + s(x).grad_y k + s(y).grad_x k + trace(grad_x grad_y k); with
    q = 1 + |x - y|^2, grad_x k = -q^(-3/2) (x - y): shape (B, rows, N).
    """
    d = u.shape[-1]
    ui, si = u[:, r0:r1], s[:, r0:r1]
    sq_i, sq = (ui * ui).sum(-1), (u * u).sum(-1)
    r2 = (sq_i.unsqueeze(-1) + sq.unsqueeze(-2) - 2 * ui @ u.mT).clamp_min_(0)
    q = 1 + r2
    k = q.rsqrt()
    g = k / q  # q^(-3/2)
    ss = si @ s.mT
    # s_i.(x_i - x_j) and s_j.(x_i - x_j)
    s_i_diff = (si * ui).sum(-1).unsqueeze(-1) - si @ u.mT
    s_j_diff = ui @ s.mT - (s * u).sum(-1).unsqueeze(-2)
    # s_i.grad_y k = s_i.(q^(-3/2) (x - y)), s_j.grad_x k = -s_j.(q^(-3/2) (x - y))
    trace = d * g - 3 * g / q * r2
    return k * ss + g * s_i_diff - g * s_j_diff + trace


def ksd_band(
    u: torch.Tensor, score: torch.Tensor, *, rows: slice | None = None, axis_sum: Callable = lambda t: t,
    chunk: int = 512,
) -> tuple[torch.Tensor, torch.Tensor]:
    """U-statistic of KSD^2 and its noise level over exact draws, per ensemble.

    Parameters
    ----------
    u, score : Tensors of shape (B, N, d)
        Particles (whitened coordinates) and their scores in those coordinates.
    rows : slice, optional
        Rows this process owns (default all); ``axis_sum`` completes the partial sums.

    Returns
    -------
    ustat, noise_sd : Tensors of shape (B,)
    """
    n = u.shape[1]
    r0, r1, _ = (rows or slice(0, n)).indices(n)
    total = torch.zeros(u.shape[0], dtype=u.dtype, device=u.device)
    squares = torch.zeros_like(total)
    for i in range(r0, r1, chunk):
        j = min(r1, i + chunk)
        h = _stein_matrix_rows(u, score, i, j)
        idx = torch.arange(i, j, device=u.device)
        h[:, idx - i, idx] = 0  # drop the diagonal i == j
        total += h.sum((-1, -2))
        squares += h.pow(2).sum((-1, -2))
    total, squares = axis_sum(total), axis_sum(squares)
    pairs = n * (n - 1)
    return total / pairs, torch.sqrt(2 * squares) / pairs


class Watch:
    """The figures a stop rule may ask for at one step, computed once and only when asked.

    Parameters
    ----------
    u, score, phi : Tensors of shape (B, N, d)
        Particles in whitened coordinates, their scores there, and the SVGD direction at them.
    affine : Affine
        The whitening, z = affine.to_z(u).
    step_size : float
        The step rule's current step (a step moves the particles by about step_size * phi).
    ksd : callable
        ``() -> (B,)`` KSD V-statistic per ensemble.
    rows : slice
        Rows of this process; ``axis_sum`` completes partial sums over processes.
    """

    def __init__(self, u, score, phi, affine, step_size: float, ksd: Callable, rows=None, axis_sum=lambda t: t):
        self.u, self.score, self.phi, self.affine = u, score, phi, affine
        self.step_size = float(step_size)
        self._ksd, self.rows, self.axis_sum = ksd, rows, axis_sum
        self._cache: dict = {}

    def _once(self, key, compute):
        if key not in self._cache:
            self._cache[key] = compute()
        return self._cache[key]

    def z(self) -> torch.Tensor:
        return self._once("z", lambda: self.affine.to_z(self.u))

    def moments(self) -> tuple[torch.Tensor, torch.Tensor]:
        """Per-ensemble mean and log sd (B, d) of the unconstrained coordinates."""
        return self._once("moments", lambda: moments(self.z()))

    def velocity(self) -> tuple[torch.Tensor, torch.Tensor]:
        """Per-step change of the means (particle sds) and log sds the flow makes now, worst
        coordinate, per ensemble (B,); NaN when the step rule has no step size."""
        def compute():
            phi_z = self.phi @ self.affine.matrix.mT  # directions map by the linear part only
            mean_rate, sd_rate = moment_velocity(self.z(), phi_z)
            return mean_rate * self.step_size, sd_rate * self.step_size
        return self._once("velocity", compute)

    def band(self) -> tuple[torch.Tensor, torch.Tensor]:
        """KSD^2 U-statistic and its noise level over exact draws, per ensemble (B,)."""
        return self._once("band", lambda: ksd_band(self.u, self.score, rows=self.rows, axis_sum=self.axis_sum))

    def ksd(self) -> torch.Tensor:
        return self._once("ksd", self._ksd)

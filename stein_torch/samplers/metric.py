"""Euclidean metrics (mass matrices) of Hamiltonian Monte Carlo, and their estimation in warm-up.

The kinetic energy of momentum ``p`` is ``K(p) = p^T M^{-1} p / 2``, momenta are drawn from
``N(0, M)`` and positions move with the velocity ``M^{-1} p`` ("A Conceptual Introduction to
Hamiltonian Monte Carlo", arXiv:1701.02434, section 4). Both metrics are parameterised by the
*inverse* mass ``M^{-1}``, which warm-up estimates as the posterior covariance (diagonal or dense).
The dense metric keeps the Cholesky factor ``M^{-1} = L L^T``: a momentum is ``p = z L^{-1}`` (a
triangular solve, so ``Cov(p) = L^{-T} L^{-1} = M``) and the velocity is one matmul.

Estimation:

- running mean and co-moment of the draws of all chains pooled, one batch of C draws at a time, by
  the pairwise combination rule ("Note on a method for calculating corrected sums of squares and
  products", DOI 10.1080/00401706.1962.10490022; "Algorithms for computing the sample variance:
  analysis and recommendations", DOI 10.1080/00031305.1983.10483115; from memory);
- scale-free shrinkage: log-variances pulled towards their mean by the empirical-Bayes
  (normal-means) weight ``noise / (noise + spread)``, ``noise = 2 / (n - 1)`` the delta-method
  variance of a log sample variance (common practice); a dense estimate then shrunk in correlation
  space towards the identity with the oracle-approximating weight of "Shrinkage Algorithms for MMSE
  Covariance Estimation", arXiv:0907.4698, eq. 23 (as scikit-learn computes it). Shrinking the
  *correlation* keeps the estimate equivariant to rescaling one coordinate, which a linear pull of
  the covariance towards ``tr(S)/d I`` is not (docs/defaults.md).
"""

from __future__ import annotations

import torch

__all__ = ["DiagonalMetric", "DenseMetric", "make_metric", "metric_from_state", "PooledMoments",
           "shrink_variances", "shrink_covariance", "METRICS"]

METRICS = ("diag", "dense")


class _Metric:
    """What both metrics share: the kinetic energy and the state (``kind`` and ``inverse_mass``)."""

    kind = ""
    inverse_mass: torch.Tensor

    def _set(self, inverse_mass: torch.Tensor) -> None:
        raise NotImplementedError

    def velocity(self, momentum: torch.Tensor) -> torch.Tensor:
        raise NotImplementedError

    def kinetic_energy(self, momentum: torch.Tensor, velocity: torch.Tensor | None = None) -> torch.Tensor:
        """``p^T M^{-1} p / 2``: shape (...). Pass ``velocity`` when already computed."""
        if velocity is None:
            velocity = self.velocity(momentum)
        return 0.5 * torch.linalg.vecdot(momentum, velocity)

    def state_dict(self) -> dict:
        """``{"kind": kind, "inverse_mass": tensor}`` ((d,) diagonal, (d, d) dense)."""
        return {"kind": self.kind, "inverse_mass": self.inverse_mass.clone()}

    def load_state_dict(self, state: dict) -> None:
        """Restore from :meth:`state_dict` (derived quantities, such as a Cholesky factor, are recomputed)."""
        _check_kind(state, self.kind)
        self._set(state["inverse_mass"].to(self.inverse_mass))


class DiagonalMetric(_Metric):
    """Diagonal metric ``M^{-1} = diag(inverse_mass)``.

    Parameters
    ----------
    inverse_mass : torch.Tensor, shape (d,)
        Positive variances (the diagonal of ``M^{-1}``).
    """

    kind = "diag"

    def __init__(self, inverse_mass: torch.Tensor):
        self._set(inverse_mass)

    def _set(self, inverse_mass: torch.Tensor) -> None:
        if not isinstance(inverse_mass, torch.Tensor) or inverse_mass.dim() != 1:
            raise ValueError(f"inverse_mass: expected a 1-D tensor of variances, got {_describe(inverse_mass)}")
        if not bool(torch.all(torch.isfinite(inverse_mass) & (inverse_mass > 0))):
            raise ValueError("inverse_mass: expected finite positive variances, got a non-positive or non-finite entry")
        self.inverse_mass = inverse_mass.clone()
        self._inverse_sd = inverse_mass.rsqrt()

    @property
    def dim(self) -> int:
        return self.inverse_mass.shape[0]

    def sample_momentum(self, n: int, generator: torch.Generator) -> torch.Tensor:
        """Draw ``n`` momenta from ``N(0, M)``: shape (n, d) (drawn on the CPU generator)."""
        z = torch.randn((n, self.dim), generator=generator, dtype=self.inverse_mass.dtype)
        return z.to(self.inverse_mass.device) * self._inverse_sd

    def velocity(self, momentum: torch.Tensor) -> torch.Tensor:
        """``M^{-1} p`` for momentum of shape (..., d); same shape."""
        return momentum * self.inverse_mass


class DenseMetric(_Metric):
    """Dense metric with inverse mass ``M^{-1}`` (a covariance matrix).

    Parameters
    ----------
    inverse_mass : torch.Tensor, shape (d, d)
        Symmetric positive-definite matrix.
    """

    kind = "dense"

    def __init__(self, inverse_mass: torch.Tensor):
        self._set(inverse_mass)

    def _set(self, inverse_mass: torch.Tensor) -> None:
        if (not isinstance(inverse_mass, torch.Tensor) or inverse_mass.dim() != 2
                or inverse_mass.shape[0] != inverse_mass.shape[1]):
            raise ValueError(f"inverse_mass: expected a square (d, d) tensor, got {_describe(inverse_mass)}")
        symmetric = 0.5 * (inverse_mass + inverse_mass.T)
        factor, info = torch.linalg.cholesky_ex(symmetric)
        if int(info) != 0 or not bool(torch.isfinite(factor).all()):
            raise ValueError("inverse_mass: expected a symmetric positive-definite matrix, the Cholesky "
                             f"factorisation failed (leading minor {int(info)})")
        self.inverse_mass = symmetric
        self._factor = factor

    @property
    def dim(self) -> int:
        return self.inverse_mass.shape[0]

    def sample_momentum(self, n: int, generator: torch.Generator) -> torch.Tensor:
        """Draw ``n`` momenta from ``N(0, M)``: shape (n, d), ``p = z L^{-1}``."""
        z = torch.randn((n, self.dim), generator=generator, dtype=self.inverse_mass.dtype)
        return torch.linalg.solve_triangular(self._factor, z.to(self._factor.device), upper=False, left=False)

    def velocity(self, momentum: torch.Tensor) -> torch.Tensor:
        """``M^{-1} p`` for momentum of shape (..., d); same shape."""
        return momentum @ self.inverse_mass


def make_metric(kind: str, dim: int, dtype: torch.dtype = torch.float64, device=None):
    """Identity metric of ``kind`` ("diag" or "dense") in ``dim`` dimensions."""
    if kind == "diag":
        return DiagonalMetric(torch.ones(dim, dtype=dtype, device=device))
    if kind == "dense":
        return DenseMetric(torch.eye(dim, dtype=dtype, device=device))
    raise ValueError(f"metric: expected 'diag' or 'dense', got {kind!r}")


def metric_from_state(state: dict):
    """Build the metric a :meth:`state_dict` describes."""
    kinds = {"diag": DiagonalMetric, "dense": DenseMetric}
    if not isinstance(state, dict) or state.get("kind") not in kinds:
        raise ValueError(f"state: expected a metric state with kind 'diag' or 'dense', got {state!r:.80}")
    return kinds[state["kind"]](state["inverse_mass"])


def _check_kind(state: dict, kind: str) -> None:
    if not isinstance(state, dict) or state.get("kind") != kind:
        got = state.get("kind") if isinstance(state, dict) else type(state).__name__
        raise ValueError(f"state: expected a metric state of kind {kind!r}, got {got!r}")


def _describe(value) -> str:
    if isinstance(value, torch.Tensor):
        return f"a tensor of shape {tuple(value.shape)}"
    return type(value).__name__


class PooledMoments:
    """Running mean and co-moment of draws pooled over chains (float64, on the CPU).

    Parameters
    ----------
    dim : int
    dense : bool
        Keep the full (d, d) co-moment, else only its diagonal (d,).
    """

    def __init__(self, dim: int, dense: bool):
        self.dim, self.dense = dim, dense
        self.reset()

    def reset(self) -> None:
        """Forget every draw."""
        self.count = 0
        self.mean = torch.zeros(self.dim, dtype=torch.float64)
        shape = (self.dim, self.dim) if self.dense else (self.dim,)
        self.comoment = torch.zeros(shape, dtype=torch.float64)

    def update(self, draws: torch.Tensor) -> None:
        """Add a batch of draws (C, d): one per chain."""
        batch = draws.detach().to(device="cpu", dtype=torch.float64)
        n_b = batch.shape[0]
        mean_b = batch.mean(0)
        dev = batch - mean_b
        comoment_b = dev.T @ dev if self.dense else (dev * dev).sum(0)
        delta = mean_b - self.mean
        n = self.count + n_b
        scale = self.count * n_b / n
        self.mean = self.mean + delta * (n_b / n)
        cross = torch.outer(delta, delta) if self.dense else delta * delta
        self.comoment = self.comoment + comoment_b + cross * scale
        self.count = n

    def covariance(self) -> torch.Tensor:
        """Sample covariance (divisor n - 1): (d, d) when dense, else variances (d,)."""
        if self.count < 2:
            raise ValueError(f"moments: need at least 2 draws for a covariance, have {self.count}")
        return self.comoment / (self.count - 1)

    def state_dict(self) -> dict:
        return {"count": self.count, "mean": self.mean.clone(), "comoment": self.comoment.clone()}

    def load_state_dict(self, state: dict) -> None:
        self.count = int(state["count"])
        self.mean, self.comoment = state["mean"].clone(), state["comoment"].clone()


def shrink_variances(variances: torch.Tensor, count: int) -> torch.Tensor:
    """Pull log-variances towards their mean by the empirical-Bayes weight.

    Parameters
    ----------
    variances : torch.Tensor, shape (d,)
        Sample variances from ``count`` draws.
    count : int

    Returns
    -------
    torch.Tensor, shape (d,)
        ``exp((1 - w) log v + w mean(log v))`` with ``w = noise / (noise + spread)``,
        ``noise = 2 / (count - 1)``, ``spread = max(0, var(log v) - noise)``; ``w = 0`` when d < 3.
    """
    log_var = variances.clamp_min(torch.finfo(variances.dtype).tiny).log()
    d = log_var.numel()
    if d < 3 or count < 3:
        return log_var.exp()
    noise = 2.0 / (count - 1)
    spread = (log_var.var() - noise).clamp_min(0.0)
    weight = noise / (noise + spread)
    return ((1.0 - weight) * log_var + weight * log_var.mean()).exp()


def shrink_covariance(covariance: torch.Tensor, count: int) -> tuple[torch.Tensor, float]:
    """Shrink a sample covariance in correlation space towards the identity.

    Parameters
    ----------
    covariance : torch.Tensor, shape (d, d)
        Sample covariance from ``count`` draws.
    count : int

    Returns
    -------
    estimate : torch.Tensor, shape (d, d)
        ``D ((1 - rho) R + rho I) D``: R the sample correlation, D the square roots of
        :func:`shrink_variances` of the diagonal.
    rho : float
        The oracle-approximating shrinkage weight of R (arXiv:0907.4698, eq. 23).
    """
    d = covariance.shape[0]
    variances = covariance.diagonal().clamp_min(torch.finfo(covariance.dtype).tiny)
    inv_sd = variances.rsqrt()
    correlation = covariance * inv_sd[:, None] * inv_sd[None, :]
    if d == 1:
        rho = 0.0
    else:
        trace_sq = float((correlation * correlation).sum())        # tr(R^2); tr(R) = d
        den = (count + 1) * (trace_sq - d)                           # (n + 1)(tr R^2 - tr(R)^2 / d)
        rho = 1.0 if den <= 0 else min(1.0, (trace_sq + d * d) / den)
    shrunk = (1.0 - rho) * correlation + rho * torch.eye(d, dtype=covariance.dtype)
    sd = shrink_variances(variances, count).sqrt()
    return shrunk * sd[:, None] * sd[None, :], rho

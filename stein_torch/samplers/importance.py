"""Importance-sampling checks of a particle set: Pareto-smoothed weights and their k diagnostic.

A proposal q is fitted to the particles (their mean and covariance, with Student-t tails), M points
are drawn from it and weighted by the target, w = p / q (unnormalised log density: the weights are
self-normalised). Pareto-smoothed importance sampling ("Pareto Smoothed Importance Sampling",
arXiv:1507.02646, from memory) fits a generalised Pareto distribution to the largest weights and
replaces them by its quantiles; the fitted shape k tells whether the weights have a finite variance
(k < 0.5) and whether the estimate can be trusted at all (k < 0.7). Used to check an approximation
of a posterior as in "Yes, but Did It Work?: Evaluating Variational Inference" (arXiv:1802.02538,
from memory): a proposal built from the approximation with k > 0.7 misses mass of the target, and a
smoothed importance estimate of the spread far from the particles' says the particles are too
narrow or too wide. The generalised Pareto fit is the empirical-Bayes estimator of "A New and
Efficient Estimation Method for the Generalized Pareto Distribution" (DOI 10.1198/tech.2009.08017,
from memory), with the weak prior towards k = 0.5 of arXiv:1507.02646.
"""

from __future__ import annotations

import math

import numpy as np
import torch

__all__ = ["fit_generalized_pareto", "smoothed_log_weights", "spread_check", "mode_shares"]

CHECK_DRAWS = 2000  # log-density evaluations of the spread check
CHECK_MAX_DIM = 100  # above this many coordinates a proposal fitted to the particles cannot be weighted usefully
MIN_ESS = 20  # smoothed weights with a smaller effective sample size are degenerate (the check fails)
MODE_DRAWS = 400  # per mode, for the mode-mass check
WIDEN = 1.0  # the spread check's proposal: the particles' covariance scaled by WIDEN^2 ...
DF = 5  # ... with Student-t tails of DF degrees of freedom (an integer: chi-square by normals)


def fit_generalized_pareto(x: np.ndarray) -> tuple[float, float]:
    """Shape k and scale sigma of a generalised Pareto fit to positive exceedances ``x`` (sorted
    ascending), by the empirical-Bayes estimator of DOI 10.1198/tech.2009.08017 (profile likelihood
    averaged over a grid of theta = -k / sigma), shrunk towards k = 0.5 with the weight of 10
    observations (arXiv:1507.02646)."""
    n = len(x)
    grid = 30 + int(math.sqrt(n))
    j = np.arange(1, grid + 1, dtype=float)
    theta = 1 / x[-1] + (1 - np.sqrt(grid / (j - 0.5))) / (3 * x[max(0, int(n / 4 + 0.5) - 1)])
    k_of = np.log1p(-theta[:, None] * x[None, :]).mean(1)  # = -k(theta) in the paper's sign
    profile = n * (np.log(-theta / k_of) - k_of - 1)
    weights = 1 / np.exp(profile[None, :] - profile[:, None]).sum(1)
    weights /= weights.sum()
    theta_hat = float((theta * weights).sum())
    k = float(np.log1p(-theta_hat * x).mean())
    sigma = -k / theta_hat
    k = (n * k + 10 * 0.5) / (n + 10)
    return k, sigma


def smoothed_log_weights(log_w: np.ndarray) -> tuple[np.ndarray, float]:
    """Pareto-smoothed log weights and the shape k of the fitted tail (arXiv:1507.02646).

    The M = min(S / 5, 3 sqrt(S)) largest of S weights are replaced by the quantiles
    (i - 1/2) / M of a generalised Pareto fit above the (M + 1)-th largest, capped at the largest raw
    weight. Non-finite log weights (points where the target is not finite) stay -inf.
    """
    log_w = np.asarray(log_w, dtype=float).copy()
    finite = np.isfinite(log_w)
    s = int(finite.sum())
    tail = int(min(s / 5, 3 * math.sqrt(s)))
    if tail < 5:
        return log_w, math.inf
    order = np.argsort(np.where(finite, log_w, -np.inf))
    top = order[-tail:]
    cut = log_w[order[-tail - 1]]
    biggest = log_w[top[-1]]
    exceed = np.exp(log_w[top] - biggest) - math.exp(cut - biggest)
    if not np.all(exceed > 0) or exceed[-1] <= 0:
        return log_w, 0.0  # ties at the top: no tail to fit
    k, sigma = fit_generalized_pareto(exceed)
    p = (np.arange(1, tail + 1) - 0.5) / tail
    quantiles = sigma / k * ((1 - p) ** (-k) - 1) if abs(k) > 1e-8 else -sigma * np.log1p(-p)
    smoothed = np.log(np.minimum(quantiles + math.exp(cut - biggest), 1.0)) + biggest
    log_w[top] = smoothed
    return log_w, float(k)


def _target_log_prob(target, x: torch.Tensor) -> torch.Tensor | None:
    """Log densities of points x (M, d); non-finite -> -inf; None when the function raises."""
    try:
        if target.data is not None:  # the full data, also for a run on minibatches (chunked)
            from ..model.data import full_log_prob

            lp = full_log_prob(target, x)
        else:
            with torch.no_grad():
                lp = target.log_prob(x)
    except Exception:  # noqa: BLE001 - a check must never break a finished run
        return None
    return torch.where(torch.isfinite(lp), lp, torch.full_like(lp, -math.inf))


def _student_t(n: int, mean: torch.Tensor, chol: torch.Tensor, df: float, generator) -> torch.Tensor:
    d = mean.shape[-1]
    eps = torch.randn(n, d, generator=generator, dtype=mean.dtype).to(mean.device)
    chi2 = torch.randn(n, int(df), generator=generator, dtype=mean.dtype).pow(2).sum(-1).to(mean.device)
    return mean + (eps @ chol.mT) / torch.sqrt(chi2 / df)[:, None]


def _student_t_log_pdf(x: torch.Tensor, mean: torch.Tensor, chol: torch.Tensor, df: float) -> torch.Tensor:
    d = x.shape[-1]
    white = torch.linalg.solve_triangular(chol, (x - mean).mT, upper=False).mT
    maha = (white * white).sum(-1)
    log_det = torch.log(torch.diagonal(chol)).sum()
    return (math.lgamma((df + d) / 2) - math.lgamma(df / 2) - 0.5 * d * math.log(df * math.pi) - log_det
            - 0.5 * (df + d) * torch.log1p(maha / df))


def _covariance_factor(z: torch.Tensor) -> torch.Tensor:
    n, d = z.shape
    centred = z - z.mean(0)
    cov = centred.mT @ centred / max(1, n - 1)
    if n <= d:
        cov = torch.diag(torch.diagonal(cov))
    scale = torch.diagonal(cov).mean().clamp_min(1e-300)
    eye = torch.eye(d, dtype=z.dtype, device=z.device)
    for jitter in (0.0, 1e-10, 1e-8, 1e-6):
        chol, info = torch.linalg.cholesky_ex(cov + jitter * scale * eye)
        if int(info) == 0:
            return chol
    return torch.diag(torch.diagonal(cov).clamp_min(1e-300).sqrt())


def spread_check(target, z: torch.Tensor, generator: torch.Generator, draws: int = CHECK_DRAWS):
    """Pareto-smoothed importance check of the particles' spread.

    Parameters
    ----------
    z : Tensor of shape (B, N, d)
        Particles (unconstrained coordinates); all ensembles are pooled.

    Returns
    -------
    (k, worst, coordinate) or None
        Pareto k of the weights (inf when the smoothed weights' effective sample size is below
        ``MIN_ESS``), the largest |log(importance sd / particle sd)| (signed) over the coordinates of
        the latents on their constrained scale (the scale the user reads) and its index there; None
        when the check cannot run (too few particles, more than ``CHECK_MAX_DIM`` coordinates, the log
        density raised).
    """
    pooled = z.reshape(-1, z.shape[-1]).detach()
    if pooled.shape[0] < 10 or pooled.shape[-1] > CHECK_MAX_DIM or not bool(torch.isfinite(pooled).all()):
        return None
    mean, chol = pooled.mean(0), WIDEN * _covariance_factor(pooled)
    x = _student_t(draws, mean, chol, DF, generator)
    lp = _target_log_prob(target, x)
    if lp is None or not bool(torch.isfinite(lp).any()):
        return None
    log_w, k = smoothed_log_weights((lp - _student_t_log_pdf(x, mean, chol, DF)).cpu().numpy())
    values = _constrained(target, x)
    particle_values = _constrained(target, pooled)
    usable = np.isfinite(values).all(1) & np.isfinite(log_w)
    if usable.sum() < 10 or not np.isfinite(particle_values).all():
        return None
    w = np.exp(log_w[usable] - np.max(log_w[usable]))
    w /= w.sum()
    if 1 / np.sum(w**2) < MIN_ESS:  # degenerate weights: the estimate says nothing, the check fails
        return max(k, math.inf), 0.0, 0
    xs = values[usable]
    is_mean = (w[:, None] * xs).sum(0)
    is_sd = np.sqrt((w[:, None] * (xs - is_mean) ** 2).sum(0))
    sd = particle_values.std(0, ddof=1)
    ratio = np.log(np.maximum(is_sd, 1e-300) / np.maximum(sd, 1e-300))
    worst = int(np.argmax(np.abs(ratio)))
    return k, float(ratio[worst]), worst


def _constrained(target, z: torch.Tensor) -> np.ndarray:
    """Constrained values of points z (M, d), flattened to (M, d') in the order of the latents."""
    with torch.no_grad():
        values, _ = target.constrain(z)
    return np.concatenate([v.reshape(z.shape[0], -1).cpu().numpy() for v in values.values()], 1)


def mode_shares(target, z: torch.Tensor, modes: list, generator: torch.Generator, draws: int = MODE_DRAWS):
    """Particle shares and importance-sampling shares of the modes found by the mode search.

    Every point is assigned to the mode nearest in that mode's Laplace metric. The proposal is an
    equal mixture of Student-t (5 degrees of freedom) around each mode with its Laplace covariance.

    Returns
    -------
    (particle_shares, sampled_shares) as arrays of shape (modes,), or None when the log density raised.
    """
    centres = [m for m, _ in modes]
    chols = [a.matrix for _, a in modes]

    def nearest(points):
        dist = torch.stack([
            (torch.linalg.solve_triangular(c, (points - m).mT, upper=False) ** 2).sum(0) for m, c in zip(centres, chols)
        ])
        return dist.argmin(0)

    pooled = z.reshape(-1, z.shape[-1]).detach()
    particle = np.bincount(nearest(pooled).cpu().numpy(), minlength=len(modes)) / pooled.shape[0]
    x = torch.cat([_student_t(draws, m, c, DF, generator) for m, c in zip(centres, chols)])
    lp = _target_log_prob(target, x)
    if lp is None:
        return None
    log_q = torch.logsumexp(torch.stack([_student_t_log_pdf(x, m, c, DF) for m, c in zip(centres, chols)]), 0)
    log_w, _ = smoothed_log_weights((lp - log_q - math.log(len(modes))).cpu().numpy())
    w = np.exp(log_w - np.max(log_w))
    sampled = np.bincount(nearest(x).cpu().numpy(), weights=w, minlength=len(modes)) / w.sum()
    return particle, sampled

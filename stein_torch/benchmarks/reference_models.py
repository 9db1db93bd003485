"""Torch models of the eight posteriordb reference posteriors, as batched log densities.

The data and reference draws are read by :mod:`stein_torch.benchmarks.reference_data` (vendored in
the repository's ``shared/posteriordb``, posteriordb, BSD-3; see the README there for the model
mathematics). Tests check these models against the reference draws (Stein identity,
``tests/test_posteriordb_models.py``) before any sampler is compared with them.

Each :class:`Model` samples parameters on the constrained scale given by
``torch.distributions.constraints``; :attr:`Model.derived` maps sampled parameters to the names of
the reference draws and :attr:`Model.from_reference` maps reference draws back to the sampled
parameters. Three models are parametrised differently from the names the reference lists:

- ``eight_schools-eight_schools_noncentered`` samples ``mu``, ``tau`` and ``theta_trans`` (8,);
  derived ``theta = mu + tau * theta_trans`` (the non-centred form of the model itself).
- ``low_dim_gauss_mix-low_dim_gauss_mix``: torch 2.13 has no ordered-vector constraint, so the
  ordered pair ``mu[1] < mu[2]`` is sampled as ``mu_low`` (real) and ``mu_gap`` (positive) with
  ``mu = (mu_low, mu_low + mu_gap)``. The map has unit Jacobian determinant, so no correction term.
- ``garch-garch11``: the bound ``beta1 < 1 - alpha1`` depends on ``alpha1``, so ``beta1`` is
  sampled as ``beta1_fraction`` in (0, 1) with ``beta1 = (1 - alpha1) * beta1_fraction``; the
  log-Jacobian ``log(1 - alpha1)`` is added to the (flat) prior in ``log_joint``.

Log densities are correct up to an additive constant.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np
import torch
from torch.distributions import constraints

from .reference_data import NAMES, load_data

__all__ = ["Model", "model", "NAMES"]

_LOG_2PI = math.log(2.0 * math.pi)


@dataclass(frozen=True)
class Model:
    """A posterior as a batched torch log-density.

    Attributes
    ----------
    name : str
        posteriordb name.
    params : dict
        Sampled parameter name -> ``(shape, constraint)``.
    log_joint : callable
        ``log_joint(p) -> Tensor (*batch,)`` with ``p[k]`` of shape ``(*batch, *shape)`` on the
        constrained scale; log-density up to an additive constant.
    derived : callable
        Sampled draws (dict of arrays or tensors, ``(n, *shape)``) -> draws under the reference names.
    from_reference : callable
        Reference draws -> sampled parameters (inverse of ``derived``).
    """

    name: str
    params: dict
    log_joint: Callable[[dict], torch.Tensor]
    derived: Callable[[dict], dict]
    from_reference: Callable[[dict], dict]


def _tensor(values, dtype=torch.float64) -> torch.Tensor:
    return torch.as_tensor(np.asarray(values, dtype=np.float64), dtype=dtype)


def _normal(x, loc, scale):
    return -0.5 * ((x - loc) / scale) ** 2 - torch.log(scale) - 0.5 * _LOG_2PI


def _normal_fixed_scale(x, scale: float):
    """Zero-mean normal prior with a fixed scale, up to its constant."""
    return -0.5 * (x / scale) ** 2


def _cauchy_kernel(x, scale: float):
    return -torch.log1p((x / scale) ** 2)


def _student_t_kernel(x, df: float, loc: float, scale: float):
    return -0.5 * (df + 1.0) * torch.log1p(((x - loc) / scale) ** 2 / df)


def _identity(draws: dict) -> dict:
    return dict(draws)


def _stack_last(first, second):
    if isinstance(first, torch.Tensor):
        return torch.stack([first, second], dim=-1)
    return np.stack([first, second], axis=-1)


def _eight_schools(data: dict) -> Model:
    y, sigma = _tensor(data["y"]), _tensor(data["sigma"])

    def log_joint(p):
        mu, tau, z = p["mu"], p["tau"], p["theta_trans"]
        theta = mu[..., None] + tau[..., None] * z
        return (_normal_fixed_scale(z, 1.0).sum(-1) + _normal_fixed_scale(mu, 5.0)
                + _cauchy_kernel(tau, 5.0)
                + _normal(y.to(z.dtype), theta, sigma.to(z.dtype)).sum(-1))

    def derived(d):
        return {"mu": d["mu"], "tau": d["tau"],
                "theta": d["mu"][..., None] + d["tau"][..., None] * d["theta_trans"]}

    def from_reference(d):
        return {"mu": d["mu"], "tau": d["tau"],
                "theta_trans": (d["theta"] - d["mu"][..., None]) / d["tau"][..., None]}

    params = {"mu": ((), constraints.real), "tau": ((), constraints.positive),
              "theta_trans": ((len(data["y"]),), constraints.real)}
    return Model("eight_schools-eight_schools_noncentered", params, log_joint, derived,
                 from_reference)


def _kidiq(data: dict) -> Model:
    score, hs, iq = (_tensor(data[k]) for k in ("kid_score", "mom_hs", "mom_iq"))

    def log_joint(p):
        beta, sigma = p["beta"], p["sigma"]
        dt = beta.dtype
        mean = beta[..., 0:1] + beta[..., 1:2] * hs.to(dt) + beta[..., 2:3] * iq.to(dt)
        return _cauchy_kernel(sigma, 2.5) + _normal(score.to(dt), mean, sigma[..., None]).sum(-1)

    params = {"beta": ((3,), constraints.real), "sigma": ((), constraints.positive)}
    return Model("kidiq-kidscore_momhsiq", params, log_joint, _identity, _identity)


def _sblri(data: dict) -> Model:
    X, y = _tensor(data["X"]), _tensor(data["y"])

    def log_joint(p):
        beta, sigma = p["beta"], p["sigma"]
        dt = beta.dtype
        mean = beta @ X.to(dt).T
        return (_normal_fixed_scale(beta, 10.0).sum(-1) + _normal_fixed_scale(sigma, 10.0)
                + _normal(y.to(dt), mean, sigma[..., None]).sum(-1))

    params = {"beta": ((X.shape[1],), constraints.real), "sigma": ((), constraints.positive)}
    return Model("sblri-blr", params, log_joint, _identity, _identity)


def _gauss_mix(data: dict) -> Model:
    y = _tensor(data["y"])

    def log_joint(p):
        low, gap, sigma, theta = p["mu_low"], p["mu_gap"], p["sigma"], p["theta"]
        dt = low.dtype
        mu = torch.stack([low, low + gap], dim=-1)
        prior = (_normal_fixed_scale(mu, 2.0).sum(-1) + _normal_fixed_scale(sigma, 2.0).sum(-1)
                 + 4.0 * torch.log(theta) + 4.0 * torch.log1p(-theta))
        yy = y.to(dt)
        first = torch.log(theta)[..., None] + _normal(yy, mu[..., 0:1], sigma[..., 0:1])
        second = torch.log1p(-theta)[..., None] + _normal(yy, mu[..., 1:2], sigma[..., 1:2])
        return prior + torch.logaddexp(first, second).sum(-1)

    def derived(d):
        return {"mu": _stack_last(d["mu_low"], d["mu_low"] + d["mu_gap"]),
                "sigma": d["sigma"], "theta": d["theta"]}

    def from_reference(d):
        return {"mu_low": d["mu"][..., 0], "mu_gap": d["mu"][..., 1] - d["mu"][..., 0],
                "sigma": d["sigma"], "theta": d["theta"]}

    params = {"mu_low": ((), constraints.real), "mu_gap": ((), constraints.positive),
              "sigma": ((2,), constraints.positive), "theta": ((), constraints.unit_interval)}
    return Model("low_dim_gauss_mix-low_dim_gauss_mix", params, log_joint, derived, from_reference)


def _ark(data: dict) -> Model:
    order, y = int(data["K"]), _tensor(data["y"])
    count = y.shape[0]
    # lags[i, k - 1] = y[t - k] for the 0-based time t = order + i, k = 1..order
    lags = torch.stack([y[order - k:count - k] for k in range(1, order + 1)], dim=-1)
    target = y[order:]

    def log_joint(p):
        alpha, beta, sigma = p["alpha"], p["beta"], p["sigma"]
        dt = beta.dtype
        mean = alpha[..., None] + beta @ lags.to(dt).T
        return (_normal_fixed_scale(alpha, 10.0) + _normal_fixed_scale(beta, 10.0).sum(-1)
                + _cauchy_kernel(sigma, 2.5)
                + _normal(target.to(dt), mean, sigma[..., None]).sum(-1))

    params = {"alpha": ((), constraints.real), "beta": ((order,), constraints.real),
              "sigma": ((), constraints.positive)}
    return Model("arK-arK", params, log_joint, _identity, _identity)


def _garch(data: dict) -> Model:
    y, sigma1 = _tensor(data["y"]), float(data["sigma1"])

    def log_joint(p):
        mu, alpha0, alpha1, fraction = p["mu"], p["alpha0"], p["alpha1"], p["beta1_fraction"]
        yy = y.to(mu.dtype)
        beta1 = (1.0 - alpha1) * fraction
        shock = alpha0[..., None] + alpha1[..., None] * (yy[:-1] - mu[..., None]) ** 2
        variance = torch.full_like(mu, sigma1 ** 2)
        variances = [variance]
        for t in range(shock.shape[-1]):  # the recursion is sequential in time
            variance = shock[..., t] + beta1 * variance
            variances.append(variance)
        scale = torch.sqrt(torch.stack(variances, dim=-1))
        # flat prior on (mu, alpha0, alpha1, beta1) + log|d beta1 / d beta1_fraction|
        return torch.log1p(-alpha1) + _normal(yy, mu[..., None], scale).sum(-1)

    def derived(d):
        return {"mu": d["mu"], "alpha0": d["alpha0"], "alpha1": d["alpha1"],
                "beta1": (1.0 - d["alpha1"]) * d["beta1_fraction"]}

    def from_reference(d):
        return {"mu": d["mu"], "alpha0": d["alpha0"], "alpha1": d["alpha1"],
                "beta1_fraction": d["beta1"] / (1.0 - d["alpha1"])}

    params = {"mu": ((), constraints.real), "alpha0": ((), constraints.positive),
              "alpha1": ((), constraints.unit_interval),
              "beta1_fraction": ((), constraints.unit_interval)}
    return Model("garch-garch11", params, log_joint, derived, from_reference)


def _gp_regr(data: dict) -> Model:
    x, y = _tensor(data["x"]), _tensor(data["y"])
    squared_distance = (x[:, None] - x[None, :]) ** 2
    eye = torch.eye(x.shape[0], dtype=torch.float64)

    def log_joint(p):
        rho, alpha, sigma = p["rho"], p["alpha"], p["sigma"]
        dt = rho.dtype
        cov = (alpha[..., None, None] ** 2
               * torch.exp(-squared_distance.to(dt) / (2.0 * rho[..., None, None] ** 2))
               + sigma[..., None, None] * eye.to(dt))
        chol = torch.linalg.cholesky(cov)
        rhs = y.to(dt).expand(*cov.shape[:-1]).unsqueeze(-1)
        white = torch.linalg.solve_triangular(chol, rhs, upper=False).squeeze(-1)
        log_lik = -0.5 * (white ** 2).sum(-1) - torch.log(torch.diagonal(chol, dim1=-2, dim2=-1)).sum(-1)
        prior = (24.0 * torch.log(rho) - 4.0 * rho  # Gamma(shape 25, rate 4)
                 + _normal_fixed_scale(alpha, 2.0) + _normal_fixed_scale(sigma, 1.0))
        return prior + log_lik

    params = {"rho": ((), constraints.positive), "alpha": ((), constraints.positive),
              "sigma": ((), constraints.positive)}
    return Model("gp_pois_regr-gp_regr", params, log_joint, _identity, _identity)


def _diamonds(data: dict) -> Model:
    X, Y = _tensor(data["X"]), _tensor(data["Y"])
    Xc = X[:, 1:] - X[:, 1:].mean(0)
    y_mean = Y.mean()
    count = Y.shape[0]
    # Sufficient statistics: with centred Xc and Xc = QR, b_ls the least-squares fit of Y - mean(Y),
    #   sum (Y - a - Xc b)^2 = min_ssr + |R (b - b_ls)|^2 + N (mean(Y) - a)^2
    # (cross terms vanish). Written around b_ls, the sum has no cancellation, so float32 stays accurate.
    b_ls = torch.linalg.lstsq(Xc, (Y - y_mean)[:, None]).solution[:, 0]
    min_ssr = ((Y - y_mean - Xc @ b_ls) ** 2).sum()
    r_factor = torch.linalg.qr(Xc, mode="r").R

    def log_joint(p):
        b, intercept, sigma = p["b"], p["Intercept"], p["sigma"]
        dt = b.dtype
        fit = (((b - b_ls.to(dt)) @ r_factor.to(dt).T) ** 2).sum(-1)
        ssr = min_ssr.to(dt) + fit + count * (y_mean.to(dt) - intercept) ** 2
        return (_normal_fixed_scale(b, 1.0).sum(-1) + _student_t_kernel(intercept, 3.0, 8.0, 10.0)
                + _student_t_kernel(sigma, 3.0, 0.0, 10.0)
                - 0.5 * ssr / sigma ** 2 - count * torch.log(sigma))

    params = {"b": ((Xc.shape[1],), constraints.real), "Intercept": ((), constraints.real),
              "sigma": ((), constraints.positive)}
    return Model("diamonds-diamonds", params, log_joint, _identity, _identity)


_BUILDERS = {
    "eight_schools-eight_schools_noncentered": _eight_schools,
    "kidiq-kidscore_momhsiq": _kidiq,
    "sblri-blr": _sblri,
    "low_dim_gauss_mix-low_dim_gauss_mix": _gauss_mix,
    "arK-arK": _ark,
    "garch-garch11": _garch,
    "gp_pois_regr-gp_regr": _gp_regr,
    "diamonds-diamonds": _diamonds,
}


def model(name: str, folder=None) -> Model:
    """The torch model of posterior ``name`` (one of :data:`NAMES`); reads its data (see
    :func:`stein_torch.benchmarks.reference_data.locate` for ``folder``)."""
    if name not in _BUILDERS:
        raise ValueError(f"name must be one of {NAMES}, got {name!r}")
    return _BUILDERS[name](load_data(name, folder))

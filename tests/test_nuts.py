"""`st.nuts` on targets with known moments, 4 chains x 1000 draws after the default warm-up.

Sources: closed form (a Gaussian built from its own mean and covariance); `scipy.stats` (Student-t
density and moments); Neal's funnel ("Slice sampling", DOI 10.1214/aos/1056562461, from memory:
v ~ N(0, 3^2), x_i | v ~ N(0, exp(v/2)^2), so v has mean 0 and sd 3 exactly); R-hat by `arviz.rhat`.
"""

from __future__ import annotations

import math
import warnings

import arviz as az
import numpy as np
import pytest
import scipy.stats
import torch

import stein_torch as st


def rotated_gaussian(dim=100, condition=1000.0, seed=0):
    """Gaussian with a random rotation and covariance eigenvalues log-spaced over [1, condition]."""
    g = torch.Generator().manual_seed(seed)
    q, r = torch.linalg.qr(torch.randn(dim, dim, generator=g, dtype=torch.float64))
    q = q * torch.sign(torch.diagonal(r))                  # Haar-distributed rotation
    eigenvalues = torch.logspace(0.0, math.log10(condition), dim, dtype=torch.float64)
    covariance = q @ torch.diag(eigenvalues) @ q.T
    covariance = 0.5 * (covariance + covariance.T)
    precision = torch.linalg.inv(covariance)
    precision = 0.5 * (precision + precision.T)
    mean = torch.randn(dim, generator=g, dtype=torch.float64)

    def log_prob(x):
        r = x - mean
        return -0.5 * ((r @ precision) * r).sum(-1)

    return st.Target(log_prob, dim=dim), mean, covariance


def check_moments(run, mean, sd):
    x = run.draws["x"].reshape(-1, mean.shape[0])
    mean_error = ((x.mean(0) - mean) / sd).abs()
    sd_error = (x.std(0) / sd - 1).abs()
    assert float(mean_error.max()) < 0.1, mean_error.max()
    assert float(sd_error.max()) < 0.10, sd_error.max()
    rhat = az.rhat(run.to_inference_data())["x"].values        # arviz.rhat, rank-normalised split
    assert float(rhat.max()) < 1.01, rhat.max()
    assert int(run.sample_stats["diverging"].sum()) == 0


@pytest.mark.slow
@pytest.mark.parametrize("precondition", [None, "laplace"])
def test_gaussian_100d_condition_1000_dense_metric(precondition):
    # closed form: the mean and covariance the target was built from. With precondition=None (the
    # default) the dense metric adaptation alone must undo the rotation and the 1000-fold spread of
    # variances; "laplace" runs on coordinates whitened by the curvature at the mode.
    target, mean, covariance = rotated_gaussian()
    run = st.nuts(target, seed=11, metric="dense", precondition=precondition, progress=False)
    assert run.particles.shape == (4, 1000, 100)
    check_moments(run, mean, covariance.diagonal().sqrt())
    assert run.warnings == []


def test_gaussian_20d_condition_100_default_settings():
    # the same closed-form check at 20-D with every setting at its default (dense metric, no whitening):
    # the short version of the 100-D floor for the default suite
    target, mean, covariance = rotated_gaussian(dim=20, condition=100.0, seed=3)
    run = st.nuts(target, seed=5, progress=False)
    assert run.settings["metric"] == "dense" and run.settings["precondition"] == "None"
    check_moments(run, mean, covariance.diagonal().sqrt())
    assert run.warnings == []


@pytest.mark.parametrize("precondition", [None, pytest.param("laplace", marks=pytest.mark.slow)])
def test_student_t_4d_dense_metric(precondition):
    # scipy.stats.multivariate_t gives the density (ours differs by a constant); scipy.stats.t the
    # marginal moments: mean loc_i, sd sqrt(shape_ii) * sd of t(df)
    df = 5.0
    loc = torch.tensor([1.0, -2.0, 0.5, 3.0], dtype=torch.float64)
    shape = torch.tensor([[4.0, 1.0, 0.0, 0.5], [1.0, 1.0, 0.3, 0.0], [0.0, 0.3, 0.25, 0.0],
                          [0.5, 0.0, 0.0, 2.0]], dtype=torch.float64)
    inverse = torch.linalg.inv(shape)

    def log_prob(x):
        r = x - loc
        return -0.5 * (df + 4) * torch.log1p(((r @ inverse) * r).sum(-1) / df)

    probe = loc + torch.randn(6, 4, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
    diff = log_prob(probe).numpy() - scipy.stats.multivariate_t(loc.numpy(), shape.numpy(), df=df).logpdf(probe.numpy())
    np.testing.assert_allclose(diff, diff[0], atol=1e-10)
    run = st.nuts(st.Target(log_prob, dim=4), seed=12, metric="dense", precondition=precondition, progress=False)
    sd = torch.tensor([scipy.stats.t(df, scale=float(s)).std() for s in shape.diagonal().sqrt()], dtype=torch.float64)
    mean = torch.tensor([scipy.stats.t(df, loc=float(m)).mean() for m in loc], dtype=torch.float64)
    check_moments(run, mean, sd)


def funnel(centred: bool, dim: int = 10) -> st.Target:
    """Coordinate 0 is v; the others are x_i (centred) or z_i = x_i / exp(v/2) (non-centred)."""
    def log_prob(x):
        v, rest = x[..., 0], x[..., 1:]
        if centred:
            return -v * v / 18.0 - 0.5 * (dim - 1) * v - 0.5 * (rest * rest).sum(-1) * torch.exp(-v)
        return -v * v / 18.0 - 0.5 * (rest * rest).sum(-1)

    return st.Target(log_prob, dim=dim)


@pytest.mark.slow
def test_centred_funnel_reports_its_trouble():
    # The centred funnel's neck makes leapfrog diverge (common practice). NUTS must say so: the
    # divergences are counted (warm-up and draws) and the draws carry warnings. (Defaults but 500
    # draws, to keep the suite short; measured with 1000 draws at seeds 0 and 1: 20 and 238 divergent
    # draws, E-BFMI 0.08-0.15, R-hat of v 1.09-1.15.)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        run = st.nuts(funnel(centred=True), draws=500, seed=13, progress=False)
    divergences = int(run.sample_stats["diverging"].sum()) + run.settings["warmup_divergences"]
    assert divergences > 0 and int(run.history["diverging"].sum()) == divergences
    assert run.warnings and all(any(w in str(c.message) for c in caught) for w in run.warnings)


@pytest.mark.parametrize("metric", [pytest.param("diag", marks=pytest.mark.slow), "dense"])
def test_non_centred_funnel_recovers_the_log_scale(metric):
    # same source: in the non-centred form v ~ N(0, 3^2) exactly
    run = st.nuts(funnel(centred=False), seed=14, metric=metric, progress=False)
    v = run.draws["x"][..., 0]
    assert int(run.sample_stats["diverging"].sum()) == 0
    assert abs(float(v.mean())) < 0.1 * 3.0            # mean within 0.1 sd of 0
    assert abs(float(v.std()) / 3.0 - 1) < 0.10         # sd within 10% of 3
    assert float(az.rhat(v.numpy())) < 1.01

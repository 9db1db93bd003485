"""NUTS metric and warm-up estimators against closed forms, scipy, numpy and scikit-learn."""

import math

import numpy as np
import pytest
import scipy.linalg
import scipy.stats
import sklearn.covariance
import torch

from stein_torch.samplers.adaptation import DualAveraging
from stein_torch.samplers.metric import (DenseMetric, DiagonalMetric, PooledMoments, make_metric, metric_from_state,
                                         shrink_covariance, shrink_variances)
from stein_torch.samplers.warmup import WarmupSchedule


def _spd(d, seed=0):
    g = torch.Generator().manual_seed(seed)
    a = torch.randn(d, d, generator=g, dtype=torch.float64)
    return a @ a.T / d + 0.5 * torch.eye(d, dtype=torch.float64)


@pytest.mark.parametrize("kind", ["diag", "dense"])
def test_momentum_covariance_is_mass_matrix(kind):
    # closed form: p ~ N(0, M) with M = (inverse_mass)^-1; compare the sample covariance of 200k draws
    d = 4
    inverse = _spd(d) if kind == "dense" else torch.tensor([0.25, 1.0, 4.0, 9.0], dtype=torch.float64)
    metric = DenseMetric(inverse) if kind == "dense" else DiagonalMetric(inverse)
    mass = torch.linalg.inv(inverse if kind == "dense" else torch.diag(inverse))
    p = metric.sample_momentum(200_000, torch.Generator().manual_seed(1))
    sample_cov = torch.cov(p.T)
    # standard error of a covariance entry: sqrt((M_ii M_jj + M_ij^2) / n)
    se = ((mass.diagonal()[:, None] * mass.diagonal()[None, :] + mass ** 2) / 200_000).sqrt()
    assert torch.all((sample_cov - mass).abs() < 5 * se)


@pytest.mark.parametrize("kind", ["diag", "dense"])
def test_velocity_and_kinetic_energy_match_scipy(kind):
    d = 5
    inverse = _spd(d, 2) if kind == "dense" else torch.linspace(0.5, 3.0, d, dtype=torch.float64)
    metric = DenseMetric(inverse) if kind == "dense" else DiagonalMetric(inverse)
    mass = np.linalg.inv(inverse.numpy() if kind == "dense" else np.diag(inverse.numpy()))
    p = torch.randn(7, d, generator=torch.Generator().manual_seed(3), dtype=torch.float64)
    # scipy.linalg.solve: velocity = M^-1 p
    expected_v = scipy.linalg.solve(mass, p.numpy().T).T
    np.testing.assert_allclose(metric.velocity(p).numpy(), expected_v, rtol=1e-10, atol=1e-12)
    # scipy.stats.multivariate_normal: K(p) = -log N(p; 0, M) + const
    logpdf = scipy.stats.multivariate_normal(mean=np.zeros(d), cov=mass).logpdf(p.numpy())
    diff = metric.kinetic_energy(p).numpy() + logpdf
    np.testing.assert_allclose(diff, diff[0], atol=1e-10)


def test_state_dict_round_trip_and_errors():
    # common practice: state_dict / load_state_dict restore the same behaviour
    dense = DenseMetric(_spd(3))
    other = make_metric("dense", 3)
    other.load_state_dict(dense.state_dict())
    p = torch.randn(2, 3, dtype=torch.float64)
    assert torch.equal(other.velocity(p), dense.velocity(p))
    assert isinstance(metric_from_state(DiagonalMetric(torch.ones(3, dtype=torch.float64)).state_dict()), DiagonalMetric)
    with pytest.raises(ValueError, match="inverse_mass"):
        DiagonalMetric(torch.tensor([1.0, -1.0]))
    with pytest.raises(ValueError, match="inverse_mass.*positive-definite"):
        DenseMetric(torch.tensor([[1.0, 2.0], [2.0, 1.0]]))
    with pytest.raises(ValueError, match="metric: expected 'diag' or 'dense', got 'full'"):
        make_metric("full", 3)
    with pytest.raises(ValueError, match="kind 'diag'"):
        DiagonalMetric(torch.ones(3, dtype=torch.float64)).load_state_dict(dense.state_dict())


@pytest.mark.parametrize("dense", [False, True])
def test_pooled_moments_match_numpy(dense):
    # numpy.cov of all draws pooled over chains and iterations (divisor n - 1)
    g = torch.Generator().manual_seed(0)
    draws = 3.0 + torch.randn(50, 4, 6, generator=g, dtype=torch.float64) @ torch.diag(
        torch.linspace(0.1, 5.0, 6, dtype=torch.float64))
    moments = PooledMoments(6, dense)
    for batch in draws:
        moments.update(batch)
    expected = np.cov(draws.reshape(-1, 6).numpy().T)
    got = moments.covariance().numpy()
    np.testing.assert_allclose(got, expected if dense else np.diag(expected), rtol=1e-10)
    np.testing.assert_allclose(moments.mean.numpy(), draws.reshape(-1, 6).numpy().mean(0), rtol=1e-12)


def test_correlation_shrinkage_matches_sklearn_oas():
    # sklearn.covariance.oas on standardised data gives the shrunk correlation and its weight
    g = torch.Generator().manual_seed(1)
    n, d = 40, 12
    x = torch.randn(n, d, generator=g, dtype=torch.float64) @ torch.randn(d, d, generator=g, dtype=torch.float64)
    x = x * torch.logspace(-2, 2, d, dtype=torch.float64)
    cov = torch.cov(x.T)
    estimate, rho = shrink_covariance(cov, n)
    xs = x.numpy()
    z = (xs - xs.mean(0)) / xs.std(0)
    shrunk_corr, sk_rho = sklearn.covariance.oas(z)
    assert rho == pytest.approx(sk_rho, rel=1e-10)
    sd = estimate.diagonal().sqrt()
    np.testing.assert_allclose((estimate / sd[:, None] / sd[None, :]).numpy(), shrunk_corr, atol=1e-10)


def test_variance_shrinkage_helps_when_scales_are_equal_and_keeps_distinct_ones():
    # closed form truth: N(0, diag(var)); the estimate's mean squared log error must not get worse
    g = torch.Generator().manual_seed(2)
    for var in (torch.ones(50, dtype=torch.float64), torch.logspace(-4, 4, 50, dtype=torch.float64)):
        draws = torch.randn(100, 50, generator=g, dtype=torch.float64) * var.sqrt()
        raw = draws.var(0)
        shrunk = shrink_variances(raw, 100)
        err_raw = ((raw.log() - var.log()) ** 2).mean()
        err_shrunk = ((shrunk.log() - var.log()) ** 2).mean()
        assert err_shrunk <= err_raw * 1.01
    # equal true scales: the error should drop by most of the noise variance 2 / (n - 1)
    draws = torch.randn(100, 50, generator=g, dtype=torch.float64)
    assert ((shrink_variances(draws.var(0), 100).log()) ** 2).mean() < 0.25 * (draws.var(0).log() ** 2).mean()


def test_dual_averaging_finds_the_root_of_a_known_acceptance_curve():
    # closed form: with accept(eps) = exp(-eps) the target 0.8 is met at eps* = -log(0.8)
    # (the one dual averaging of the package: Langevin and NUTS both use it)
    rule = DualAveraging(np.array([0.5, 0.5, 0.5]), target=0.8)
    rule.restart(np.array([0.01, 1.0, 20.0]))
    step = rule.final
    np.testing.assert_allclose(step, [0.01, 1.0, 20.0], rtol=1e-12)   # before any update: the restart values
    for _ in range(2000):
        step = rule.update(np.exp(-step))
    np.testing.assert_allclose(rule.final, -math.log(0.8), rtol=0.05)
    # a faulty transition (NaN statistic) counts as acceptance 0: the step size shrinks
    before = rule.log_step.copy()
    rule.update(np.array([np.nan, np.nan, np.nan]))
    assert np.all(rule.log_step < before)


def test_schedule_windows_and_minimum():
    # common practice: doubling windows that tile the span between the step-size-only phases
    s = WarmupSchedule(1000, opening=50, first_window=25, closing=75)
    assert s.window_ends == [74, 124, 224, 424, 924]
    assert not s.in_window(49) and s.in_window(50) and s.in_window(924) and not s.in_window(925)
    assert WarmupSchedule(150, opening=50, first_window=25, closing=75).window_ends == [74]
    with pytest.raises(ValueError, match=r"warmup == 149; expected 0 \(no adaptation\) or at least 150 "):
        WarmupSchedule(149, opening=50, first_window=25, closing=75)
    with pytest.raises(ValueError, match="warmup == -1, must be >= 0"):
        WarmupSchedule(-1)
    with pytest.raises(TypeError, match="warmup must be an int"):
        WarmupSchedule(200.0)

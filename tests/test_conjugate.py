"""Default SVGD runs against closed-form posteriors.

Floor (issue "Core engine"): with ``st.svgd(target, particles=200, seed=0)`` and otherwise defaults,
every posterior mean within 0.05 posterior sd, every marginal sd within 5%, correlations within 0.05.

Sources: the conjugate Gaussian linear model with known noise (closed form:
Sigma_n = (X'X / s^2 + I / t^2)^-1, mu_n = Sigma_n X'y / s^2; handbook "Gaussian Processes for Machine
Learning", ch. 2, Bayesian linear regression); Gamma-Poisson and Beta-Binomial conjugacy with moments
from ``scipy.stats``; data from datasets scikit-learn ships (no downloads).
"""

import numpy as np
import pytest
import scipy.stats
import torch
from sklearn.datasets import load_breast_cancer, load_diabetes
from torch.distributions import Beta, Binomial, Gamma, Poisson, constraints

import stein_torch as st


def _gaussian_linear_model(x: np.ndarray, y: np.ndarray, noise: float, prior_sd: float):
    x = torch.as_tensor(x, dtype=torch.float64)
    y = torch.as_tensor(y, dtype=torch.float64)
    precision = x.T @ x / noise**2 + torch.eye(x.shape[1], dtype=torch.float64) / prior_sd**2
    cov = torch.linalg.inv(precision)
    mean = cov @ x.T @ y / noise**2

    def log_prob(beta):  # (..., d) -> (...)
        resid = y.to(beta.dtype) - beta @ x.T.to(beta.dtype)
        return -0.5 * (resid**2).sum(-1) / noise**2 - 0.5 * (beta**2).sum(-1) / prior_sd**2

    return st.Target(log_prob, dim=x.shape[1]), mean, cov


def _check_gaussian(run, mean, cov, mean_tol=0.05, sd_tol=0.05, corr_tol=0.05):
    draws = run.draws["x"][0]
    sd = cov.diagonal().sqrt()
    mean_err = ((draws.mean(0) - mean) / sd).abs().max().item()
    sd_ratio = draws.std(0) / sd
    corr_true = cov / sd[:, None] / sd[None, :]
    corr_err = (torch.corrcoef(draws.T) - corr_true).abs().max().item()
    assert mean_err <= mean_tol, f"mean error {mean_err:.3f} posterior sd"
    assert (sd_ratio - 1).abs().max().item() <= sd_tol, f"sd ratios {sd_ratio.min():.3f}..{sd_ratio.max():.3f}"
    assert corr_err <= corr_tol, f"correlation error {corr_err:.3f}"


def test_two_dimensional_correlated_gaussian_posterior():
    # Intercept and slope of diabetes progression on (uncentred) BMI: strongly correlated posterior.
    data = load_diabetes()
    bmi = data.data[:, 2] * 10 + 1.0  # shift so the intercept and slope are correlated
    x = np.stack([np.ones_like(bmi), bmi], 1)
    y = (data.target - data.target.mean()) / data.target.std()
    target, mean, cov = _gaussian_linear_model(x, y, noise=1.0, prior_sd=3.0)
    corr = (cov[0, 1] / cov.diagonal().prod().sqrt()).item()
    assert abs(corr) > 0.6  # the check is about a correlated posterior
    _check_gaussian(st.svgd(target, particles=200, seed=0), mean, cov)


def test_twenty_dimensional_gaussian_posterior():
    # Linear regression on the first 20 standardised features of the breast cancer data.
    data = load_breast_cancer()
    x = data.data[:80, :20]
    x = (x - x.mean(0)) / x.std(0)
    y = data.target[:80] - data.target[:80].mean()
    target, mean, cov = _gaussian_linear_model(x, y, noise=0.5, prior_sd=1.0)
    _check_gaussian(st.svgd(target, particles=200, seed=0), mean, cov)


def test_gamma_poisson_rate_on_the_positive_scale():
    # Gamma(a, b) prior, Poisson counts: posterior Gamma(a + sum y, b + n) (scipy.stats.gamma moments).
    counts = torch.tensor([3.0, 0.0, 2.0, 5.0, 1.0, 2.0, 4.0])
    a, b = 2.0, 1.0
    target = st.Target.from_priors(
        {"rate": Gamma(a, b)}, log_likelihood=lambda p: Poisson(p["rate"][..., None]).log_prob(counts).sum(-1)
    )
    run = st.svgd(target, particles=200, seed=0)
    post = scipy.stats.gamma(a + counts.sum().item(), scale=1 / (b + len(counts)))
    rate = run.draws["rate"][0].numpy()
    assert abs(rate.mean() - post.mean()) <= 0.05 * post.std()
    assert abs(rate.std(ddof=1) / post.std() - 1) <= 0.05
    assert (rate > 0).all()


def test_beta_binomial_probability_on_the_unit_interval():
    # Beta(2, 3) prior, 7 successes in 20 trials: posterior Beta(9, 16) (scipy.stats.beta moments).
    target = st.Target(
        lambda p: Beta(2.0, 3.0).log_prob(p["p"]) + Binomial(20, probs=p["p"]).log_prob(torch.tensor(7.0)),
        latents={"p": st.Latent(support=constraints.unit_interval)},
    )
    run = st.svgd(target, particles=200, seed=0)
    post = scipy.stats.beta(9, 16)
    p = run.draws["p"][0].numpy()
    assert abs(p.mean() - post.mean()) <= 0.05 * post.std()
    assert abs(p.std(ddof=1) / post.std() - 1) <= 0.05
    # quantiles too: the particle set matches the whole distribution, not only two moments
    np.testing.assert_allclose(np.quantile(p, [0.1, 0.5, 0.9]), post.ppf([0.1, 0.5, 0.9]), atol=0.1 * post.std())


def test_same_seed_same_draws_and_ensembles_are_independent():
    target, mean, cov = _gaussian_linear_model(np.eye(3), np.array([1.0, -1.0, 0.5]), 1.0, 1.0)
    a = st.svgd(target, particles=50, steps=100, seed=3, ensembles=2)
    b = st.svgd(target, particles=50, steps=100, seed=3, ensembles=2)
    c = st.svgd(target, particles=50, steps=100, seed=4, ensembles=2)
    assert torch.equal(a.draws["x"], b.draws["x"])
    assert not torch.equal(a.draws["x"], c.draws["x"])
    assert a.draws["x"].shape == (2, 50, 3)
    assert not torch.allclose(a.draws["x"][0], a.draws["x"][1])
    # each ensemble on its own is a good approximation
    for e in range(2):
        assert ((a.draws["x"][e].mean(0) - mean) / cov.diagonal().sqrt()).abs().max() < 0.05


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_float32_and_float64(dtype):
    target, mean, cov = _gaussian_linear_model(np.eye(2) * 2, np.array([1.0, -1.0]), 1.0, 1.0)
    run = st.svgd(target, particles=100, steps=200, seed=0, dtype=dtype)
    assert run.particles.dtype == dtype
    assert ((run.draws["x"][0].double().mean(0) - mean) / cov.diagonal().sqrt()).abs().max() < 0.05

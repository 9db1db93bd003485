"""Predictive checks the ArviZ way: a likelihood given as a torch Distribution scores and simulates.

Sources: the closed-form posterior predictive of Bayesian linear regression with known noise
("Gaussian Processes for Machine Learning", ch. 2.1, weight-space view); the marginal of a normal
with a normal prior on its mean (closed form: N(m0, s0^2 + sigma^2)); ``scipy.stats`` densities,
``kstest`` and distributions; ArviZ's own ``loo_pit``, ``plot_ppc`` and ``plot_dist_comparison``.
"""

from __future__ import annotations

import warnings

import matplotlib
import numpy as np
import pytest
import torch
from scipy import stats
from torch.distributions import Gamma, HalfNormal, Independent, MultivariateNormal, Normal, Poisson

import stein_torch as st

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

matplotlib.use("Agg")
F64 = torch.float64


def t64(value):
    return torch.tensor(value, dtype=F64)


# ------------------------------------------------------------------ scenario: rooftop solar arrays
def solar_data(seed: int = 11, arrays: int = 8, days: int = 20):
    """Invented: daily energy yield (kWh) of 8 rooftop arrays against hours of sunshine."""
    g = torch.Generator().manual_seed(seed)
    array = torch.arange(arrays).repeat_interleave(days)
    sunshine = 1.0 + 9.0 * torch.rand(arrays * days, generator=g, dtype=F64)
    base = 2.0 + 0.8 * torch.randn(arrays, generator=g, dtype=F64)
    kwh = base[array] + 1.1 * sunshine + 0.7 * torch.randn(arrays * days, generator=g, dtype=F64)
    return {"array": array, "sunshine": sunshine, "kwh": kwh}


def solar_target(data, noise: float | None = None) -> st.Target:
    """The model the data were generated with; with ``noise`` a wrong one that fixes the noise sd."""

    def likelihood(p, d):  # p[k]: (..., *shape); returns a Distribution with batch shape (..., n_obs)
        scale = p["noise"][..., None] if noise is None else noise
        return Normal(p["base"][..., d["array"]] + p["slope"][..., None] * d["sunshine"], scale)

    priors = {"base": Normal(torch.full((8,), 2.0, dtype=F64), 3.0), "slope": Normal(t64(0.0), 2.0)}
    if noise is None:
        priors["noise"] = HalfNormal(t64(2.0))
    return st.Target.from_priors(priors, log_likelihood=likelihood, data=data, observed="kwh")


def test_loo_pit_is_uniform_on_a_correctly_specified_model_and_not_on_a_wrong_one():
    data = solar_data()
    run = st.svgd(solar_target(data), particles=200, ensembles=2, seed=0, progress=False)
    idata = run.to_inference_data()
    pit = az.loo_pit(idata, y="kwh")
    # scipy.stats.kstest against U(0, 1): LOO-PIT values of a correctly specified model are uniform
    # (probability integral transform, common practice); 5% level, the test's usual one
    p_value = stats.kstest(pit, "uniform").pvalue
    assert p_value > 0.05, p_value
    # the same check has power: a model that assumes half the noise (0.35 kWh, generated with 0.7)
    wrong = st.svgd(solar_target(data, noise=0.35), particles=200, ensembles=2, seed=0, progress=False)
    assert stats.kstest(az.loo_pit(wrong.to_inference_data(), y="kwh"), "uniform").pvalue < 0.01


def test_arviz_plots_run_unchanged_on_both_predictive_groups():
    data = solar_data()
    target = solar_target(data)
    run = st.svgd(target, particles=60, steps=60, seed=1, progress=False)
    idata = run.to_inference_data()
    idata.extend(st.prior_predictive(target, draws=100, seed=2))
    assert {"posterior_predictive", "prior", "prior_predictive", "observed_data"} <= set(idata.groups())
    # ArviZ API: plot_ppc(group=...) and plot_dist_comparison read these groups by name
    assert np.size(az.plot_ppc(idata, num_pp_samples=20)) == 1
    assert np.size(az.plot_ppc(idata, group="prior", num_pp_samples=20)) == 1
    axes = az.plot_dist_comparison(idata)  # prior against posterior, from the prior group
    assert np.asarray(axes).shape == (10, 3)  # 8 bases + slope + noise; panels prior, posterior, both
    matplotlib.pyplot.close("all")


# ------------------------------------------------------------------ closed forms
def regression(n: int = 30, seed: int = 3):
    g = torch.Generator().manual_seed(seed)
    x = torch.linspace(-1.0, 2.0, n, dtype=F64)
    y = 0.5 + 1.5 * x + 0.8 * torch.randn(n, generator=g, dtype=F64)
    return x, y


def test_posterior_predictive_means_and_spread_match_the_closed_form():
    sigma, prior_sd = 0.8, 10.0
    x, y = regression()
    target = st.Target(
        lambda p: Normal(0.0, prior_sd).log_prob(p["w"]).sum(-1),
        latents={"w": st.Latent((2,))},
        log_likelihood=lambda p, d: Normal(p["w"][..., :1] + p["w"][..., 1:] * d["x"], sigma),
        data={"x": x, "y": y}, observed="y",
    )
    run = st.svgd(target, particles=200, ensembles=4, seed=0, progress=False)
    simulated = run.to_inference_data().posterior_predictive["y"].values.reshape(-1, x.shape[0])
    # GPML ch. 2.1: A = X^T X / sigma^2 + I / prior_sd^2, mean X A^-1 X^T y / sigma^2,
    # predictive variance sigma^2 + x^T A^-1 x
    design = np.stack([np.ones(x.shape[0]), x.numpy()], axis=1)
    precision = design.T @ design / sigma**2 + np.eye(2) / prior_sd**2
    covariance = np.linalg.inv(precision)
    mean = design @ covariance @ design.T @ y.numpy() / sigma**2
    variance = sigma**2 + np.einsum("ij,jk,ik->i", design, covariance, design)
    draws = simulated.shape[0]
    z = (simulated.mean(0) - mean) / np.sqrt(variance / draws)
    assert np.max(np.abs(z)) < 4.5  # 30 observations, 800 draws: Monte-Carlo error only
    ratio = simulated.var(0, ddof=1) / variance
    assert 0.95 < ratio.mean() < 1.05  # sd of a variance estimate from 800 draws ~5%, averaged over 30


def test_prior_predictive_matches_the_normal_marginal_and_the_prior():
    m0, s0, sigma = 1.0, 2.0, 0.5
    y = torch.zeros(5, dtype=F64)
    target = st.Target.from_priors(
        {"mu": Normal(t64(m0), t64(s0)), "spread": HalfNormal(t64(1.5))},
        log_likelihood=lambda p, d: Normal(p["mu"][..., None], sigma), data={"y": y}, observed="y",
    )
    idata = st.prior_predictive(target, draws=2000, seed=4)
    assert set(idata.groups()) == {"prior", "prior_predictive", "observed_data"}
    simulated = idata.prior_predictive["y"].values
    assert simulated.shape == (1, 2000, 5)
    # closed form: y = mu + e, mu ~ N(m0, s0), e ~ N(0, sigma) -> y ~ N(m0, sqrt(s0^2 + sigma^2))
    marginal = stats.norm(m0, np.sqrt(s0**2 + sigma**2))
    assert stats.kstest(simulated[0, :, 0], marginal.cdf).pvalue > 0.01
    # scipy.stats.halfnorm(scale=1.5) is the prior of "spread"
    assert stats.kstest(idata.prior["spread"].values.ravel(), stats.halfnorm(scale=1.5).cdf).pvalue > 0.01
    again = st.prior_predictive(target, draws=2000, seed=4)
    np.testing.assert_array_equal(again.prior_predictive["y"].values, simulated)  # same seed, same data sets
    other = st.prior_predictive(target, draws=2000, seed=5)
    assert not np.array_equal(other.prior_predictive["y"].values, simulated)


def test_prior_predictive_needs_a_prior_to_draw_from():
    target = st.Target(lambda p: -p["a"] ** 2, latents={"a": st.Latent()})
    with pytest.raises(ValueError, match="Target.from_priors"):
        st.prior_predictive(target, draws=10)
    with pytest.raises(ValueError, match="draws"):
        st.prior_predictive(solar_target(solar_data()), draws=0)


# ------------------------------------------------------------------ the distribution as a likelihood
def test_distribution_terms_equal_the_per_observation_log_densities():
    x, y = regression(n=12)
    common = dict(latents={"w": st.Latent((2,))}, data={"x": x, "y": y}, observed="y")
    as_dist = st.Target(lambda p: -0.5 * (p["w"] ** 2).sum(-1),
                        log_likelihood=lambda p, d: Normal(p["w"][..., :1] + p["w"][..., 1:] * d["x"], 0.8), **common)
    folded = st.Target(lambda p: -0.5 * (p["w"] ** 2).sum(-1),  # observation axis folded into the event
                       log_likelihood=lambda p, d: Independent(Normal(p["w"][..., :1] + p["w"][..., 1:] * d["x"], 0.8), 1),
                       **common)
    run = st.svgd(as_dist, particles=20, steps=5, seed=0, progress=False)
    terms = run.to_inference_data().log_likelihood["y"].values
    w = run.draws["w"].numpy()
    expected = stats.norm.logpdf(y.numpy(), w[..., :1] + w[..., 1:] * x.numpy(), 0.8)  # scipy.stats density
    np.testing.assert_allclose(terms, expected, rtol=1e-12)
    run_folded = st.svgd(folded, particles=20, steps=5, seed=0, progress=False)
    np.testing.assert_allclose(run_folded.to_inference_data().log_likelihood["y"].values, expected, rtol=1e-12)


def test_counts_are_simulated_as_counts_and_the_seed_repeats_them():
    g = torch.Generator().manual_seed(5)
    counts = torch.poisson(torch.full((40,), 3.0, dtype=F64), generator=g).long()

    target = st.Target.from_priors({"rate": Gamma(t64(2.0), t64(1.0))},
                                   log_likelihood=lambda p, d: Poisson(p["rate"][..., None].expand(*p["rate"].shape, 40)),
                                   data={"y": counts}, observed="y")
    run = st.svgd(target, particles=100, seed=0, progress=False)
    first = run.to_inference_data(predictive_seed=7).posterior_predictive["y"].values
    assert first.dtype == counts.numpy().dtype and first.min() >= 0
    np.testing.assert_array_equal(run.to_inference_data(predictive_seed=7).posterior_predictive["y"].values, first)
    # Gamma-Poisson conjugacy (closed form): rate | y ~ Gamma(2 + sum y, 1 + n); predictive mean = its mean
    posterior_mean = (2.0 + float(counts.sum())) / (1.0 + 40)
    assert abs(first.mean() - posterior_mean) < 4 * np.sqrt(posterior_mean / first.size) + 0.02


def test_minibatches_work_with_a_distribution_likelihood():
    x, y = regression(n=40)
    target = st.Target(lambda p: -0.5 * (p["w"] ** 2).sum(-1) / 100, latents={"w": st.Latent((2,))},
                       log_likelihood=lambda p, d: Normal(p["w"][..., :1] + p["w"][..., 1:] * d["x"], 0.8),
                       data={"x": x, "y": y}, observed="y", batch_size=10)
    run = st.svgd(target, particles=50, steps=30, seed=0, progress=False)
    assert run.to_inference_data().posterior_predictive["y"].shape == (1, 50, 40)


def test_a_distribution_needs_one_observed_key_and_the_right_shape():
    x, y = regression(n=10)
    no_key = st.Target(lambda p: -p["a"] ** 2, latents={"a": st.Latent()},
                       log_likelihood=lambda p, d: Normal(p["a"][..., None], 1.0), data={"x": x, "y": y})
    with pytest.raises(ValueError, match="observed="):
        st.svgd(no_key, particles=10, steps=2, seed=0, progress=False)
    whole = st.Target(lambda p: -p["a"] ** 2, latents={"a": st.Latent()}, observed="y", data={"x": x, "y": y},
                      log_likelihood=lambda p, d: MultivariateNormal(p["a"][..., None].expand(*p["a"].shape, 10),
                                                                     torch.eye(10, dtype=F64)))
    with pytest.raises(ValueError, match="batch_shape"):
        st.svgd(whole, particles=10, steps=2, seed=0, progress=False)


def test_langevin_results_get_the_same_groups():
    # a normal mean with known sd: posterior predictive mean = posterior mean (closed form, conjugate normal)
    y = torch.tensor([2.1, 3.5, 1.7, 2.9, 4.2, 2.6], dtype=F64)
    target = st.Target(lambda p: Normal(t64(1.0), 3.0).log_prob(p["mu"]), latents={"mu": st.Latent()},
                       log_likelihood=lambda p, d: Normal(p["mu"][..., None], 2.0), data={"y": y}, observed="y")
    run = st.langevin(target, chains=2, draws=1000, warmup=500, seed=0, progress=False)
    simulated = run.to_inference_data().posterior_predictive["y"].values
    assert simulated.shape == (2, 1000, 6)
    precision = 1 / 9 + 6 / 4
    mean, variance = (1 / 9 + float(y.sum()) / 4) / precision, 4 + 1 / precision
    # Monte-Carlo error of 12000 correlated simulated values: allow 5 sds of 2000 independent ones
    assert abs(simulated.mean() - mean) < 5 * np.sqrt(variance / 2000)

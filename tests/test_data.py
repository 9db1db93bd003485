"""Targets with data: per-observation log-likelihood, minibatches, the log_likelihood group, LOO.

Sources: the conjugate normal model (posterior of a normal mean with known variance, closed form,
"Bayesian Data Analysis", 3rd ed., section 2.5), scipy.stats.norm.logpdf for pointwise terms,
arviz.loo / arviz.compare as the consumers of the log_likelihood group.
"""

from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pytest
import scipy.stats
import torch
from torch.distributions import Normal

import stein_torch as st

N_OBS = 120
SIGMA, PRIOR_SD = torch.tensor(2.0, dtype=torch.float64), torch.tensor(10.0, dtype=torch.float64)


def observations(seed=0):
    g = torch.Generator().manual_seed(seed)
    return 1.5 + SIGMA * torch.randn(N_OBS, generator=g, dtype=torch.float64)


def normal_mean_target(y, batch_size=None, single_value=False):
    """y_i ~ N(mu, SIGMA^2), mu ~ N(0, PRIOR_SD^2), with per-observation terms."""
    if single_value:  # written for one value of mu: returns (n_obs,)
        def log_lik(p, d):
            return Normal(p["mu"], SIGMA).log_prob(d["y"])
    else:
        def log_lik(p, d):
            return Normal(p["mu"][..., None], SIGMA).log_prob(d["y"])
    return st.Target(
        lambda p: Normal(torch.zeros((), dtype=torch.float64), PRIOR_SD).log_prob(p["mu"]), latents={"mu": st.Latent()},
        log_likelihood=log_lik, data={"y": y}, batch_size=batch_size, observed="y",
    )


def closed_form(y):
    # conjugate normal posterior (BDA3 section 2.5): precision adds, mean is precision-weighted
    precision = 1 / PRIOR_SD**2 + len(y) / SIGMA**2
    return float(y.sum() / SIGMA**2 / precision), float(precision**-0.5)


def test_log_prob_is_prior_plus_sum_of_terms():
    y = observations()
    t = normal_mean_target(y)
    mu = torch.tensor([[0.3], [1.7]], dtype=torch.float64)
    expected = scipy.stats.norm.logpdf(mu.numpy(), 0, float(PRIOR_SD))[:, 0] + scipy.stats.norm.logpdf(
        y.numpy()[None, :], mu.numpy(), float(SIGMA)).sum(1)  # scipy.stats.norm
    np.testing.assert_allclose(t.log_prob(mu).numpy(), expected, rtol=1e-12)


def test_single_value_likelihood_is_vectorised_and_agrees():
    y = observations()
    batched, single = normal_mean_target(y), normal_mean_target(y, single_value=True)
    mu = torch.linspace(-1, 3, 7, dtype=torch.float64)[:, None]
    lp_b, s_b = batched.log_prob_and_score(mu)
    lp_s, s_s = single.log_prob_and_score(mu)
    torch.testing.assert_close(lp_s, lp_b)  # same density, vmap path vs batched (common practice)
    torch.testing.assert_close(s_s, s_b)


def test_minibatches_cover_each_epoch_and_average_to_the_full_density():
    y = observations()
    t = normal_mean_target(y, batch_size=30)
    t.data.start(torch.Generator().manual_seed(5))
    mu = torch.tensor([[0.8]], dtype=torch.float64)
    full = t.log_prob(mu)
    seen, estimates = [], []
    for _ in range(N_OBS // 30):
        with t.data.next_batch():
            seen.append(t.data.indices.clone())
            estimates.append(t.log_prob(mu))
    # one epoch is a permutation of all observations (by construction: reshuffled each epoch)
    assert torch.equal(torch.cat(seen).sort().values, torch.arange(N_OBS))
    # the n_obs / batch_size scaling makes the epoch average equal the full-data sum (exact identity)
    torch.testing.assert_close(torch.stack(estimates).mean(0), full)
    assert not torch.equal(estimates[0], full)  # a single minibatch is only an estimate
    with t.data.next_batch():  # the next epoch is reshuffled
        assert not torch.equal(t.data.indices, seen[0])
    assert t.data.indices is None  # full data outside a step


@pytest.mark.parametrize("batch_size", [None, 50])
def test_scores_in_observation_chunks_equal_the_single_pass(monkeypatch, batch_size):
    # A score over many particle-observation pairs is summed over chunks of the observations; the
    # prior and the log-Jacobian (here of a positive noise scale) must count once. Reference: the same
    # target scored in one autograd pass.
    import stein_torch.model.data as data_module

    y = observations()
    t = st.Target.from_priors(
        {"mu": Normal(torch.tensor(0.0, dtype=torch.float64), PRIOR_SD), "sigma": torch.distributions.HalfNormal(SIGMA)},
        lambda p, d: Normal(p["mu"][..., None], p["sigma"][..., None]).log_prob(d["y"]),
        data={"y": y}, batch_size=batch_size,
    )
    z = torch.randn(2, 7, 2, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    t.data.start(torch.Generator().manual_seed(0))
    with t.data.next_batch():
        assert len(t.data.score_chunks(14)) == 1
        lp_once, score_once = t.log_prob_and_score(z)
        monkeypatch.setattr(data_module, "SCORE_PAIRS", 14 * 9)  # 9 observations per chunk
        assert len(t.data.score_chunks(14)) == -(-t.data.in_use // 9) > 1
        lp_chunked, score_chunked = t.log_prob_and_score(z)
    np.testing.assert_allclose(lp_chunked.numpy(), lp_once.numpy(), rtol=1e-12)
    np.testing.assert_allclose(score_chunked.numpy(), score_once.numpy(), rtol=1e-10, atol=1e-12)


def test_minibatch_stream_is_seeded():
    y = observations()
    picks = []
    for _ in range(2):
        t = normal_mean_target(y, batch_size=16)
        sampler = st.Sampler(t, 20, seed=3)
        seen = []
        for _ in range(3):
            with t.data.next_batch():
                seen.append(t.data.indices.clone())
        picks.append(torch.cat(seen))
        del sampler
    assert torch.equal(picks[0], picks[1])


@pytest.mark.parametrize("batch_size", [None, 24])
def test_posterior_matches_conjugate_normal(batch_size):
    y = observations()
    mean, sd = closed_form(y)  # closed form (BDA3 section 2.5)
    run = st.svgd(normal_mean_target(y, batch_size), particles=100, steps=300, seed=0, progress=False)
    mu = run.draws["mu"].flatten()
    assert abs(float(mu.mean()) - mean) < 0.1 * sd
    # stochastic scores add spread (constant step, minibatch noise): a looser band for them
    tolerance = 0.1 if batch_size is None else 0.15
    assert abs(float(mu.std()) / sd - 1) < tolerance
    assert run.settings["batch_size"] == str(batch_size)


def test_log_likelihood_group_matches_scipy_and_feeds_loo():
    y = observations()
    run = st.svgd(normal_mean_target(y), particles=60, steps=100, ensembles=2, seed=1, progress=False)
    idata = run.to_inference_data()
    assert {"log_likelihood", "observed_data"} <= set(idata.groups())
    ll = idata.log_likelihood["y"]
    assert ll.dims == ("chain", "draw", "obs") and ll.shape == (2, 60, N_OBS)
    mu = run.draws["mu"].numpy()
    expected = scipy.stats.norm.logpdf(y.numpy()[None, None, :], mu[..., None], float(SIGMA))  # scipy.stats.norm
    np.testing.assert_allclose(ll.values, expected, rtol=1e-10)
    np.testing.assert_array_equal(idata.observed_data["y"].values, y.numpy())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ArviZ warns that particles are not chains (ess); not our check
        loo = az.loo(idata)
    # elpd_loo is a sum over observations of log predictive densities, so it lies below the
    # in-sample log predictive density (LOO is pessimistic about fitting, common practice)
    lppd = float(np.log(np.exp(ll.values.reshape(-1, N_OBS)).mean(0)).sum())
    assert np.isfinite(loo.elpd_loo) and loo.elpd_loo < lppd
    assert 0.3 < loo.p_loo < 3  # one parameter: effective number of parameters about 1 (common practice)


def test_compare_ranks_the_true_noise_model_first():
    y = observations()
    wrong = st.Target(
        lambda p: Normal(torch.zeros((), dtype=torch.float64), PRIOR_SD).log_prob(p["mu"]), latents={"mu": st.Latent()},
        log_likelihood=lambda p, d: Normal(p["mu"][..., None], 6 * SIGMA).log_prob(d["y"]),
        data={"y": y}, observed="y",
    )
    runs = {
        "right": st.svgd(normal_mean_target(y), particles=60, steps=100, seed=0, progress=False),
        "wrong": st.svgd(wrong, particles=60, steps=100, seed=0, progress=False),
    }
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = az.compare({k: r.to_inference_data() for k, r in runs.items()})
    assert table.index[0] == "right"  # data drawn with sd SIGMA (the generating model ranks first)


def test_from_priors_with_data_and_constant_data_group():
    g = torch.Generator().manual_seed(0)
    x = torch.randn(50, 2, generator=g, dtype=torch.float64)
    y = x @ torch.tensor([1.0, -2.0], dtype=torch.float64) + 0.5 * torch.randn(50, generator=g, dtype=torch.float64)
    t = st.Target.from_priors(
        {"w": Normal(0.0, 5.0).expand([2])},
        lambda p, d: Normal((d["x"] @ p["w"].unsqueeze(-1)).squeeze(-1), 0.5).log_prob(d["y"]),
        data={"x": x, "y": y}, observed="y",
    )
    run = st.svgd(t, particles=50, steps=100, seed=0, progress=False)
    idata = run.to_inference_data()
    assert idata.constant_data["x"].dims == ("obs", "x_dim_1")
    # least squares (numpy.linalg.lstsq) is the posterior mean up to the weak prior
    w_ls = np.linalg.lstsq(x.numpy(), y.numpy(), rcond=None)[0]
    np.testing.assert_allclose(run.draws["w"].mean((0, 1)).numpy(), w_ls, atol=0.05)


def test_bad_data_is_rejected_with_names():
    y = observations()
    prior = lambda p: -p["mu"] ** 2  # noqa: E731
    lik = lambda p, d: -(d["y"] - p["mu"][..., None]) ** 2  # noqa: E731
    with pytest.raises(ValueError, match=r"'y': 120.*'x': 7"):
        st.Target(prior, latents={"mu": st.Latent()}, log_likelihood=lik, data={"y": y, "x": torch.ones(7)})
    with pytest.raises(ValueError, match="batch_size == 500"):
        st.Target(prior, latents={"mu": st.Latent()}, log_likelihood=lik, data={"y": y}, batch_size=500)
    with pytest.raises(TypeError, match="batch_size must be an int"):
        st.Target(prior, latents={"mu": st.Latent()}, log_likelihood=lik, data={"y": y}, batch_size=2.5)
    with pytest.raises(ValueError, match="go together"):
        st.Target(prior, latents={"mu": st.Latent()}, data={"y": y})
    with pytest.raises(ValueError, match="observed"):
        st.Target(prior, latents={"mu": st.Latent()}, log_likelihood=lik, data={"y": y}, observed="z")
    with pytest.raises(ValueError, match="scalar"):
        st.Target(prior, latents={"mu": st.Latent()}, log_likelihood=lik, data={"y": torch.tensor(1.0)})
    with pytest.raises(TypeError, match="non-empty dict"):
        st.Target(prior, latents={"mu": st.Latent()}, log_likelihood=lik, data=[y])
    summed = st.Target(prior, latents={"mu": st.Latent()}, log_likelihood=lambda p, d: lik(p, d).sum(-1), data={"y": y})
    with pytest.raises(ValueError, match="one term per observation"):
        summed.log_prob(torch.zeros(3, 1, dtype=torch.float64))

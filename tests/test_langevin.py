"""Langevin baselines `st.langevin` (MALA / ULA) against closed forms and scipy.stats moments.

Sources: closed-form Gaussian moments; `scipy.stats` moments of Gamma and Beta laws; the stationary
variance of the unadjusted Langevin recursion on N(0, s^2), an AR(1) process
x' = (1 - eps / s^2) x + sqrt(2 eps) xi with variance 2 eps / (1 - (1 - eps / s^2)^2)
= s^2 / (1 - eps / (2 s^2)) (closed form, common practice); R-hat and ESS by `arviz`.
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pytest
import scipy.stats
import torch
from torch.distributions import constraints

import stein_torch as st
from stein_torch.samplers.langevin import TARGET_ACCEPT


def correlated_gaussian(dim=3):
    g = torch.Generator().manual_seed(5)
    a = torch.randn(dim, dim, generator=g, dtype=torch.float64) + 2 * torch.eye(dim, dtype=torch.float64)
    cov = a @ a.T * torch.logspace(-2, 2, dim, dtype=torch.float64)[:, None].sqrt() \
        * torch.logspace(-2, 2, dim, dtype=torch.float64)[None, :].sqrt()  # scales 0.1 .. 10 in sd
    mean = torch.linspace(-3, 3, dim, dtype=torch.float64)
    prec = torch.linalg.inv(cov)
    target = st.Target(lambda x: -0.5 * (((x - mean) @ prec) * (x - mean)).sum(-1), dim=dim)
    return target, mean, cov


def mcse_bound(idata, var, truth, sds=4.0):
    """|posterior mean - truth| <= sds x Monte-Carlo standard error (arviz.mcse), per coordinate."""
    mean = idata.posterior[var].mean(("chain", "draw")).values
    mcse = az.mcse(idata, var_names=[var]).to_array().values.reshape(mean.shape)
    return np.abs(mean - truth) <= sds * mcse


def test_mala_matches_a_badly_scaled_correlated_gaussian():
    target, mean, cov = correlated_gaussian()
    run = st.langevin(target, chains=4, draws=1000, warmup=500, seed=0)
    idata = run.to_inference_data()
    # closed form mean m: within 4 Monte-Carlo standard errors (arviz.mcse)
    assert mcse_bound(idata, "x", mean.numpy()).all()
    # closed form covariance: sd within 10%, correlations within 0.1
    x = run.draws["x"].reshape(-1, 3).numpy()
    sd = cov.diagonal().sqrt().numpy()
    np.testing.assert_allclose(x.std(0), sd, rtol=0.1)
    corr = cov / torch.outer(cov.diagonal().sqrt(), cov.diagonal().sqrt())
    np.testing.assert_allclose(np.corrcoef(x.T), corr.numpy(), atol=0.1)
    # arviz: chains agree (R-hat < 1.01 is the usual bar; 1.05 leaves room for 1000 draws)
    assert float(az.rhat(idata)["x"].max()) < 1.05
    assert float(az.ess(idata)["x"].min()) > 200


def test_acceptance_is_tuned_near_the_optimal_rate():
    # Optimal-scaling acceptance 0.574 for MALA ("Optimal scaling of discrete approximations to
    # Langevin diffusions", DOI 10.1111/1467-9868.00123, from memory): after dual averaging the mean
    # acceptance of the kept draws lies near it.
    target, _, _ = correlated_gaussian(dim=10)
    run = st.langevin(target, chains=4, draws=500, warmup=500, seed=1)
    accept = run.sample_stats["acceptance_rate"]
    assert accept.shape == (4, 500)
    assert abs(accept.mean() - TARGET_ACCEPT) < 0.1
    steps = run.sample_stats["step_size"]
    assert steps.shape == (4, 500) and (steps == steps[:, :1]).all()  # fixed after warmup


@pytest.mark.parametrize(
    "constraint, log_prob, law",
    [
        # Gamma(shape 3, rate 2) on x > 0: scipy.stats.gamma(a=3, scale=1/2)
        (constraints.positive, lambda x: (2 * torch.log(x) - 2 * x).sum(-1), scipy.stats.gamma(a=3, scale=0.5)),
        # Beta(2, 5) on (0, 1): scipy.stats.beta(2, 5)
        (constraints.unit_interval, lambda x: (torch.log(x) + 4 * torch.log1p(-x)).sum(-1), scipy.stats.beta(2, 5)),
    ],
)
def test_mala_matches_scipy_moments_on_constrained_laws(constraint, log_prob, law):
    target = st.Target(log_prob, dim=1, support=constraint)
    run = st.langevin(target, chains=8, draws=1000, warmup=300, seed=2)
    idata = run.to_inference_data()
    assert mcse_bound(idata, "x", np.array([law.mean()])).all()  # scipy.stats mean within 4 MCSE
    x = run.draws["x"].reshape(-1).numpy()
    assert x.std() == pytest.approx(law.std(), rel=0.1)  # scipy.stats sd
    assert (x > law.support()[0]).all() and (x < law.support()[1]).all()


def test_ula_bias_matches_its_stationary_variance_and_mala_removes_it():
    # ULA on N(0, 1) with eps = 0.5 is AR(1) with stationary variance 1 / (1 - eps / 2) = 4/3
    # (closed form); MALA at the same step targets N(0, 1) exactly.
    target = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=1)
    ula = st.langevin(target, chains=16, draws=1000, warmup=50, adjusted=False, step_size=0.5, seed=3,
                      precondition=None)
    mala = st.langevin(target, chains=16, draws=1000, warmup=50, step_size=0.5, seed=3, precondition=None)
    assert ula.settings["method"] == "ula" and mala.settings["method"] == "mala"
    assert ula.draws["x"].var().item() == pytest.approx(4 / 3, rel=0.06)
    assert mala.draws["x"].var().item() == pytest.approx(1.0, rel=0.06)


def test_result_shapes_inference_data_and_seed():
    target = st.Target(
        lambda p: -0.5 * (p["a"] ** 2).sum(-1) - p["b"],  # a ~ N(0, I_2), b ~ Exp(1)
        latents={"a": st.Latent((2,)), "b": st.Latent(support=constraints.positive)},
    )
    run = st.langevin(target, chains=3, draws=50, warmup=20, seed=7)
    assert run.draws["a"].shape == (3, 50, 2) and run.draws["b"].shape == (3, 50)
    assert run.settings["grad_evals"] == 3 * (1 + 20 + 50)
    assert run.history["acceptance_rate"].shape == (70, 3)
    idata = run.to_inference_data()
    assert idata.posterior.sizes["chain"] == 3 and idata.posterior.sizes["draw"] == 50
    assert idata.sample_stats["acceptance_rate"].shape == (3, 50)
    assert idata.attrs["method"] == "mala"
    again = st.langevin(target, chains=3, draws=50, warmup=20, seed=7)
    assert torch.equal(run.particles, again.particles)
    # init: given constrained starting points are used (first warmup step starts there)
    start = {"a": torch.zeros(3, 2), "b": torch.ones(3)}
    fixed = st.langevin(target, chains=3, draws=5, warmup=0, step_size=1e-8, init=start, seed=0)
    np.testing.assert_allclose(fixed.draws["b"].numpy(), 1.0, atol=1e-3)


def test_bad_input_is_named():
    target = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=2)
    with pytest.raises(ValueError, match="chains"):
        st.langevin(target, chains=0)
    with pytest.raises(TypeError, match="draws"):
        st.langevin(target, draws=10.0)
    with pytest.raises(ValueError, match="step_size"):
        st.langevin(target, step_size=-1.0)
    with pytest.raises(TypeError, match="adjusted"):
        st.langevin(target, adjusted="yes")
    with pytest.raises(ValueError, match="precondition"):
        st.langevin(target, precondition="diag")
    with pytest.raises(ValueError, match="init"):
        st.langevin(target, chains=2, init=torch.zeros(3, 2))
    with pytest.raises(TypeError, match="target"):
        st.langevin(lambda x: x)


def test_a_model_that_raises_for_some_proposals_is_contained():
    # The model raises (as a Cholesky factorisation does at an extreme length-scale) wherever x0 > 1.5;
    # such proposals are rejected and counted, so the chains sample N(0, 1) truncated at 1.5 in x0
    # (scipy.stats.truncnorm) and N(0, 1) in x1.
    def log_prob(x):
        if bool((x[..., 0] > 1.5).any()):
            raise torch.linalg.LinAlgError("cholesky: the matrix is not positive-definite")
        return -0.5 * (x**2).sum(-1)

    run = st.langevin(st.Target(log_prob, dim=2), chains=20, draws=600, warmup=300, seed=4)
    assert run.history["faults"].sum() > 0  # proposals were rejected, not fatal
    x = run.draws["x"].reshape(-1, 2).numpy()
    assert np.isfinite(x).all() and x[:, 0].max() <= 1.5
    truncated = scipy.stats.truncnorm(-np.inf, 1.5)
    assert abs(x[:, 0].mean() - truncated.mean()) < 0.1 and abs(x[:, 0].std() - truncated.std()) < 0.1
    assert abs(x[:, 1].mean()) < 0.1 and abs(x[:, 1].std() - 1) < 0.1


def test_langevin_resumes_bit_for_bit(tmp_path):
    # A run checkpointed in its warmup and continued from the file equals the uninterrupted run
    # (bitwise determinism on CPU, common practice).
    target, _, _ = correlated_gaussian()
    full = st.langevin(target, chains=3, draws=30, warmup=20, seed=5)
    sampler = st.Langevin(target, chains=3, draws=30, warmup=20, seed=5)
    sampler.run(steps=12, checkpoint=tmp_path / "mala.pt")
    partial = st.load(tmp_path / "mala.pt", target)  # a checkpoint in the warmup holds no draws yet
    assert partial.particles.shape == (3, 0, 3)
    resumed = st.langevin(target, chains=3, draws=30, warmup=20, seed=5, resume=tmp_path / "mala.pt")
    assert torch.equal(resumed.particles, full.particles)
    np.testing.assert_array_equal(resumed.sample_stats["acceptance_rate"], full.sample_stats["acceptance_rate"])
    np.testing.assert_array_equal(resumed.settings["step_size"], full.settings["step_size"])

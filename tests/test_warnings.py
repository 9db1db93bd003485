"""Warnings of a run, the mode search, the importance-sampling check and the run's torch threads.

Sources: scipy.stats.genpareto (draws with a known shape) for the Pareto fit of "Pareto Smoothed
Importance Sampling" (arXiv:1507.02646, from memory); closed-form Gaussian moments and mixture weights; the
Laplace mass of a Gaussian component, its weight (closed form).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from scipy import stats

import stein_torch as st
from stein_torch.samplers.importance import fit_generalized_pareto, smoothed_log_weights, spread_check
from stein_torch.samplers.modes import allocate, search_modes
from stein_torch.samplers.threads import choose_threads, run_threads


@pytest.mark.parametrize("shape", [0.2, 0.5, 0.9])
def test_generalized_pareto_fit_recovers_the_shape(shape):
    # scipy.stats.genpareto with shape c = k: the fit's k within 0.1 on 2000 draws (the estimator's
    # prior pulls k towards 0.5 with the weight of 10 draws, arXiv:1507.02646)
    x = np.sort(stats.genpareto(c=shape, scale=2.0).rvs(2000, random_state=1))
    k, sigma = fit_generalized_pareto(x)
    assert abs(k - shape) < 0.1 and abs(sigma / 2.0 - 1) < 0.2


def test_smoothing_flags_heavy_tailed_weights():
    # weights p/q with q too narrow: N(0, 1) target, N(0, 0.5^2) proposal has infinite-variance
    # weights (k > 0.5, closed form: exp(x^2 (1/(2*0.25) - 1/2)) grows faster than q decays); a wider
    # proposal N(0, 2^2) gives bounded weights (k < 0.5)
    rng = np.random.default_rng(0)
    narrow = rng.normal(0, 0.5, 4000)
    wide = rng.normal(0, 2.0, 4000)
    _, k_narrow = smoothed_log_weights(stats.norm.logpdf(narrow) - stats.norm(0, 0.5).logpdf(narrow))
    _, k_wide = smoothed_log_weights(stats.norm.logpdf(wide) - stats.norm(0, 2.0).logpdf(wide))
    assert k_narrow > 0.5 > k_wide


def test_spread_check_confirms_exact_particles_and_catches_narrow_ones():
    # N(0, diag(1, 4)) (closed form): exact draws pass; draws with half the spread are caught
    target = st.Target(lambda x: -0.5 * (x[..., 0] ** 2 + x[..., 1] ** 2 / 4), dim=2)
    g = torch.Generator().manual_seed(0)
    exact = torch.randn(1, 400, 2, generator=g, dtype=torch.float64) * torch.tensor([1.0, 2.0], dtype=torch.float64)
    k, worst, _ = spread_check(target, exact, torch.Generator().manual_seed(1))
    assert abs(worst) < 0.1 and k < 0.7
    k, worst, _ = spread_check(target, 0.5 * exact, torch.Generator().manual_seed(1))
    assert worst > 0.3 or k > 0.7


def mixture():
    # 0.7 N(4, 1) + 0.3 N(-1.5, 0.5^2) (closed form)
    def log_prob(x):
        x = x[..., 0]
        a = np.log(0.7) - 0.5 * (x - 4) ** 2
        b = np.log(0.3) - 0.5 * ((x + 1.5) / 0.5) ** 2 - np.log(0.5)
        return torch.logaddexp(a, b)

    return st.Target(log_prob, dim=1)


def test_mode_search_finds_both_modes_and_weights_them_by_laplace_mass():
    # each component is Gaussian, so its Laplace mass is its weight: 0.7 and 0.3 (closed form)
    found = search_modes(mixture(), torch.zeros(1, dtype=torch.float64), 8, torch.Generator().manual_seed(0), 10**6)
    assert len(found.modes) == 2 and found.runaways == 0
    centres = sorted(float(m.z[0]) for m in found.modes)
    assert abs(centres[0] + 1.5) < 1e-3 and abs(centres[1] - 4) < 1e-3
    masses = np.exp([m.log_mass for m in found.modes])
    assert abs(masses.max() / masses.sum() - 0.7) < 1e-3
    assert allocate([m.log_mass for m in found.modes], 200) == [140, 60]


def test_a_single_mode_posterior_starts_as_with_one_search():
    # the extra starts draw from their own generator: with one mode the particles are the same
    target = st.Target(lambda x: -0.5 * ((x - 1) ** 2).sum(-1), dim=3)
    many = st.Sampler(target, 50, seed=4)
    one = st.Sampler(target, 50, seed=4)  # same seed
    assert torch.equal(many.u, one.u)
    assert many.record.setup["modes"] == 1 and many.record.setup["starts"] >= 2


def test_the_loop_fallback_warning_reaches_the_result():
    def one_value(x):  # written for one value; .item() defeats vmap, so it is called once per particle
        if x.sum().item() > 1e9:
            return -(x**2).sum()
        return -0.5 * (x**2).sum()

    with pytest.warns(RuntimeWarning, match="Python loop"):
        run = st.svgd(st.Target(one_value, dim=2), particles=20, steps=5, seed=0)
    assert any("Python loop" in w for w in run.warnings)
    assert any("Python loop" in w for w in run.to_inference_data().posterior.attrs["warnings"])


def test_ensembles_that_disagree_are_reported():
    # two ensembles started in different modes of the mixture and run briefly: R-hat across them is
    # large (their means differ by about 5 sds of the within-ensemble spread)
    start = torch.stack([torch.full((30, 1), 4.0), torch.full((30, 1), -1.5)]).double()
    start = start + 0.1 * torch.randn(start.shape, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = st.svgd(mixture(), particles=30, ensembles=2, steps=20, init={"x": start}, precondition=None, seed=0)
    assert any("ensembles disagree" in w for w in run.warnings)


def test_a_run_that_meets_the_tolerance_carries_no_warning():
    # N(m, diag(s^2)) (closed form): mean and sd within the tolerance, and silent
    mean, sd = torch.tensor([1.0, -2.0, 0.5]), torch.tensor([0.5, 2.0, 1.0])
    target = st.Target(lambda x: -0.5 * (((x - mean.double()) / sd.double()) ** 2).sum(-1), dim=3)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        run = st.svgd(target, particles=200, seed=0)
    x = run.draws["x"][0]
    assert ((x.mean(0) - mean) / sd).abs().max() < 0.1 and ((x.std(0) / sd) - 1).abs().max() < 0.1
    assert run.warnings == [] and run.stop_reason == "settled"


def test_threads_are_chosen_for_the_run_and_given_back():
    before = torch.get_num_threads()
    torch.set_num_threads(2)  # the caller's setting (tests run with one thread: conftest.py)
    assert choose_threads(1, 200, 9) == 1 and choose_threads(1, 200, 9, requested=3) == 3
    assert choose_threads(4, 4096, 100) is None  # large steps keep the caller's setting
    with run_threads(1):
        assert torch.get_num_threads() == 1
    assert torch.get_num_threads() == 2
    seen = []

    def log_prob(x):  # records the threads the run uses while it evaluates the model
        seen.append(torch.get_num_threads())
        return -0.5 * (x**2).sum(-1)

    run = st.svgd(st.Target(log_prob, dim=2), particles=20, steps=3, seed=0)
    assert set(seen) == {1} and run.settings["threads"] == "1"
    assert torch.get_num_threads() == 2  # the caller's setting is back
    torch.set_num_threads(before)

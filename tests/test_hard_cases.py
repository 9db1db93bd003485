"""Hard posteriors: the default run meets the accuracy tolerance or says why it may not.

Tolerance (the project's): mean within 0.1 reference sd, sd within 10% of the reference. Where SVGD is
known to struggle (funnels, separated modes, long tails), a run that misses must carry a warning.
Cases and references: tests/hard_cases.py (invented data generated in code). Each check names its
source beside it.
"""

from __future__ import annotations

import functools
import math
import warnings

import numpy as np
import pytest
import torch
from scipy import integrate
from scipy.stats import wasserstein_distance

import hard_cases as hc
import stein_torch as st

pytestmark = pytest.mark.slow


@functools.lru_cache(maxsize=None)
def pk_reference():
    return hc.importance_reference(hc.pk_ode())


def default_run(case, seed):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # the warnings are read from the result
        return st.svgd(case.target, particles=200, seed=seed)


def flat(draws, names):
    return np.concatenate([np.asarray(draws[k], dtype=float).reshape(len(np.asarray(draws[k])), -1) for k in names], 1)


def within_tolerance(x, ref):
    mean_error = np.max(np.abs(x.mean(0) - ref.mean(0)) / ref.std(0, ddof=1))
    ratio = x.std(0, ddof=1) / ref.std(0, ddof=1)
    return mean_error <= 0.1 and ratio.min() >= 0.9 and ratio.max() <= 1.1


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_funnel_log_scale_within_ten_percent_or_warned(seed):
    # Neal's funnel, 5-D: v ~ N(0, 3^2) exactly (closed form), so the sd of v is 3
    case = hc.funnel5d()
    run = default_run(case, seed)
    v = run.draws["x"][0, :, 0].numpy()
    assert abs(v.std(ddof=1) / 3.0 - 1) <= 0.1 or run.warnings, (v.std(ddof=1), run.settings["steps"])
    if abs(v.std(ddof=1) / 3.0 - 1) > 0.1:
        assert any("cap" in w or "importance" in w or "ran away" in w for w in run.warnings)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_hierarchical_scale_within_ten_percent_of_quadrature_or_warned(seed):
    # hierarchical normal: p(tau | y) by scipy.integrate (trapezoid on 20,001 points), mu and theta
    # integrated out analytically (handbook "Bayesian Data Analysis", ch. 5, from memory)
    y, s = hc._hier_data()
    grid = np.linspace(1e-6, 3.0, 20001)
    log_density = hc.hier_tau_density(grid, y, s)
    density = np.exp(log_density - log_density.max())
    mass = integrate.trapezoid(density, grid)
    mean = integrate.trapezoid(grid * density, grid) / mass
    sd = math.sqrt(integrate.trapezoid((grid - mean) ** 2 * density, grid) / mass)
    run = default_run(hc.hier_normal(), seed)
    tau = run.draws["tau"][0].numpy()
    ok = abs(tau.std(ddof=1) / sd - 1) <= 0.1 and abs(tau.mean() - mean) <= 0.1 * sd
    assert ok or run.warnings, (tau.mean(), tau.std(ddof=1), mean, sd)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_mixture_mode_masses_within_a_tenth_or_warned(seed):
    # 0.7 N(4, 1) + 0.3 N(-1.5, 0.5^2): the heavy mode holds mass 0.7 (closed form; the density's
    # trough near x = 1.25 splits the modes, beyond it each component's tail mass is < 1e-3)
    run = default_run(hc.mixture1d(), seed)
    mass = hc.mode_mass(run.draws["x"][0].numpy())
    assert abs(mass - 0.7) <= 0.1 or any("modes" in w for w in run.warnings), mass


def test_banana_reaches_the_level_of_exact_draws():
    # 2-D banana, exact draws by its closed form (x1 ~ N(0, 2^2), x2 | x1 ~ N(0.5 (x1^2 - 4), 1)):
    # the run's 1-D Wasserstein distances (scipy.stats) per sd, averaged over the two coordinates, must
    # be at the level of 200 exact draws: at most the 90% quantile of 100 sets of 200 exact draws
    case = hc.banana2d()
    ref = case.reference()["draws"]["x"]
    sd = ref.std(0, ddof=1)
    rng = np.random.default_rng(0)
    pool = ref[rng.choice(len(ref), 10000, replace=False)]

    def w1(x):
        return np.mean([wasserstein_distance(x[:, i], pool[:, i]) / sd[i] for i in range(2)])

    exact = [w1(ref[rng.choice(len(ref), 200, replace=False)]) for _ in range(100)]
    run = default_run(case, 0)
    got = w1(run.draws["x"][0].numpy())
    print(f"banana2d seed 0: stopped at step {run.settings['steps']} ({run.stop_reason}), W1/sd {got:.3f}; "
          f"200 exact draws: median {np.median(exact):.3f}, 10-90% {np.quantile(exact, 0.1):.3f}-"
          f"{np.quantile(exact, 0.9):.3f}; warnings: {len(run.warnings)}")  # seen with pytest -s
    assert got <= np.quantile(exact, 0.9), (run.settings["steps"], np.median(exact))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_undeclared_truncation_runs_and_meets_the_tolerance_or_warns(seed):
    # rate declared real, density NaN below 0; posterior Gamma(3.5, rate 3.5) (conjugacy; scipy.stats)
    from scipy import stats

    case = hc.trunc_rate()
    run = default_run(case, seed)  # no FloatingPointError: the run is not lost
    x = run.draws["x"][0, :, 0].numpy()
    exact = stats.gamma(3.5, scale=1 / 3.5)
    ok = abs(x.mean() - exact.mean()) <= 0.1 * exact.std() and abs(x.std(ddof=1) / exact.std() - 1) <= 0.1
    assert ok or run.warnings


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_long_tailed_ode_model_misses_only_with_a_warning(seed):
    # pharmacokinetic ODE (RK4) with a long right tail in the absorption rate; reference by adaptive
    # importance sampling (tests/hard_cases.py); a run that misses the tolerance must say so
    case = hc.pk_ode()
    ref = pk_reference()
    assert ref["ess"] > 5000 and ref["max_weight"] < 1e-2  # the reference itself is well determined
    names = sorted(ref["draws"])
    run = default_run(case, seed)
    draws = {k: v[0].numpy() for k, v in run.draws.items()}
    if not within_tolerance(flat(draws, names), flat(ref["draws"], names)):
        assert any("importance-sampling" in w for w in run.warnings), run.warnings


def test_minor_mode_does_not_capture_the_particles():
    # two-state HMM: from the origin L-BFGS lands in a minor mode (log density about 47 lower); with
    # several starts the particles sit around the best mode; reference by importance sampling
    case = hc.hmm2()
    ref = hc.importance_reference(case, starts=25)
    assert ref["ess"] > 5000
    run = default_run(case, 0)
    names = sorted(ref["draws"])
    assert within_tolerance(flat({k: v[0].numpy() for k, v in run.draws.items()}, names), flat(ref["draws"], names))
    assert run.warnings == []

"""KSD monitoring and the stop rule of `st.sample`.

Sources: closed-form Gaussian moments and scores (target N(0, I) or N(m, C): score -(C^-1)(x - m));
the Stein kernel of "A Kernelized Stein Discrepancy for Goodness-of-fit Tests" (arXiv:1602.03253)
through `st.ksd` (tested in test_ksd.py); the rule's own definition (module docstring of
stein_torch.stopping) for the synthetic KSD sequences.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

import stein_torch as st
from stein_torch.samplers.stopping import StopRule, as_stop_rule


def feed(rule, values, first_check=1):
    """Feed per-check KSD values (list of lists) at steps k * every for k = first_check, first_check + 1,
    ...; return (step, reason) of the stop, or (None, None)."""
    every = rule.every
    for i, row in enumerate(values, start=first_check):
        reason = rule.update(i * every, torch.tensor(row))
        if reason:
            return i * every, reason
    return None, None


# --------------------------------------------------------------------------- the rule on synthetic sequences
def test_plateau_fires_after_the_window_and_min_steps():
    # Definition: stop at the first check >= min_steps where the best KSD of the last `window` steps
    # is not below (1 - rtol) x the best before it. Flat from check 5 on (step 50): the window of 100
    # steps (10 checks) is flat from step 150 on, min_steps = 200 delays it to step 200.
    rule = StopRule(every=10, window=100, rtol=0.01, min_steps=200)
    values = [[1.0 / i] for i in range(1, 5)] + [[0.2]] * 100
    assert feed(rule, values) == (200, "ksd_plateau")
    rule = StopRule(every=10, window=100, rtol=0.01, min_steps=0)
    assert feed(rule, values) == (150, "ksd_plateau")


def test_steady_improvement_never_plateaus():
    # A KSD falling 2% per check improves by far more than rtol = 1% over any 10-check window.
    rule = StopRule(every=10, window=100, rtol=0.01, min_steps=0)
    assert feed(rule, [[0.98**i] for i in range(300)]) == (None, None)
    assert rule.reason is None and len(rule.history) == 300


def test_tolerance_fires_when_every_ensemble_is_below():
    rule = StopRule(every=5, window=1000, tol=0.1, min_steps=20)
    values = [[0.5, 0.05]] * 5 + [[0.09, 0.05]] * 5
    # step 25 is the first check >= 20 ... but ensemble 0 only drops below 0.1 at check 6 (step 30)
    assert feed(rule, values) == (30, "ksd_tolerance")


def test_all_ensembles_must_plateau():
    rule = StopRule(every=10, window=50, rtol=0.01, min_steps=0)
    values = [[0.3, 0.97**i] for i in range(40)] + [[0.3, 0.97**40]] * 20
    step, reason = feed(rule, values)
    assert reason == "ksd_plateau" and step == 10 * (41 + 5)  # the last drop is at check 41; 5 flat checks after it


def test_state_dict_round_trip_continues_identically():
    values = [[1.0 / i + 0.1] for i in range(1, 200)]
    whole = StopRule(every=10, window=100, rtol=0.02, min_steps=50)
    expected = feed(whole, values)
    first = StopRule(every=10, window=100, rtol=0.02, min_steps=50)
    feed(first, values[:20])
    state = first.state_dict()
    resumed = StopRule()
    resumed.load_state_dict(state)
    assert feed(resumed, values[20:], first_check=21) == expected
    assert resumed.state_dict() == whole.state_dict()


def test_rule_arguments_are_checked():
    with pytest.raises(ValueError, match="every"):
        StopRule(every=0)
    with pytest.raises(TypeError, match="window"):
        StopRule(window=1.5)
    with pytest.raises(ValueError, match="rtol"):
        StopRule(rtol=1.0)
    with pytest.raises(ValueError, match="tol"):
        StopRule(tol=-1.0)
    with pytest.raises(ValueError, match="missing keys"):
        StopRule().load_state_dict({"every": 10})
    with pytest.raises(TypeError, match="stop must be"):
        as_stop_rule("yes")
    assert as_stop_rule(False) is None and isinstance(as_stop_rule(None), StopRule)


# --------------------------------------------------------------------------- wired into st.sample
def gaussian_target(dim=3):
    # N(m, C) with C = A A^T: closed-form mean m and sd sqrt(diag C).
    g = torch.Generator().manual_seed(11)
    a = torch.randn(dim, dim, generator=g, dtype=torch.float64) * 0.5 + torch.eye(dim, dtype=torch.float64)
    cov = a @ a.T
    mean = torch.arange(dim, dtype=torch.float64)
    prec = torch.linalg.inv(cov)
    return st.Target(lambda x: -0.5 * (((x - mean) @ prec) * (x - mean)).sum(-1), dim=dim), mean, cov


def test_default_rule_stops_early_and_keeps_the_answer():
    target, mean, cov = gaussian_target()
    run = st.svgd(target, particles=40, steps=3000, seed=0)
    assert run.stop_reason == "ksd_plateau"
    assert 500 <= run.settings["steps"] < 3000  # min_steps of the default rule
    x = run.draws["x"][0]
    sd = cov.diagonal().sqrt()
    # closed form: mean m, sd sqrt(diag C); accuracy floor of the project (0.1 sd, 10%)
    assert ((x.mean(0) - mean).abs() / sd).max() < 0.1
    assert ((x.std(0) / sd) - 1).abs().max() < 0.1


def test_ksd_trace_and_final_values():
    target = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=2)  # N(0, I): score -x (closed form)
    run = st.svgd(target, particles=40, steps=95, ensembles=2, seed=1, stop=False, precondition=None)
    assert run.stop_reason == "steps" and run.settings["steps"] == 95
    trace = run.history["ksd"]
    assert trace.shape == (95, 2)
    checked = np.isfinite(trace).all(1)
    assert checked.nonzero()[0].tolist() == list(range(9, 95, 10))  # after steps 10, 20, ..., 90
    # Without whitening the sampler's coordinates are the target's, so the final KSD is st.ksd of
    # the particles with the closed-form scores -x.
    z = run.particles
    np.testing.assert_allclose(run.settings["ksd"], st.ksd(z, -z).numpy(), rtol=1e-6)
    idata = run.to_inference_data()
    np.testing.assert_allclose(idata.attrs["ksd"], run.settings["ksd"])
    assert idata.attrs["stop_reason"] == "steps"
    # KSD falls from the initial spread-out set (arXiv:1703.01717: closer to p, lower KSD)
    assert trace[checked][-1].max() < trace[checked][0].min()


def test_tolerance_rule_records_its_reason():
    target = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=2)
    rule = StopRule(every=5, tol=10.0, min_steps=20)  # any set of 50 points of N(0, I) has KSD < 10
    run = st.svgd(target, particles=50, steps=500, seed=0, stop=rule)
    assert run.stop_reason == "ksd_tolerance" and run.settings["steps"] == 20
    assert run.to_inference_data().attrs["stop_reason"] == "ksd_tolerance"


def test_stop_argument_is_checked():
    target = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=2)
    with pytest.raises(TypeError, match="stop must be"):
        st.svgd(target, particles=10, steps=5, stop="auto")


def test_ksd_is_scale_free_in_whitened_coordinates():
    # The monitored KSD is taken after whitening, so rescaling coordinates leaves it unchanged (the
    # Laplace affine of N(0, diag(s^2)) is diag(s), exactly undoing the scale; closed form). Scales
    # stay within the 1e10 curvature range the whitening keeps unfloored.
    plain = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=2)
    scale = torch.tensor([30.0, 0.05], dtype=torch.float64)
    scaled = st.Target(lambda x: -0.5 * ((x / scale) ** 2).sum(-1), dim=2)
    a = st.svgd(plain, particles=30, steps=30, seed=3, stop=False).settings["ksd"]
    b = st.svgd(scaled, particles=30, steps=30, seed=3, stop=False).settings["ksd"]
    np.testing.assert_allclose(a, b, rtol=1e-3)
    assert math.isfinite(float(a[0]))

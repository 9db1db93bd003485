"""KSD monitoring and the stop rules of `st.svgd`.

Sources: closed-form Gaussian moments and scores (target N(0, I) or N(m, C): score -(C^-1)(x - m));
the Stein kernel of "A Kernelized Stein Discrepancy for Goodness-of-fit Tests" (arXiv:1602.03253)
through `st.ksd` (tested in test_ksd.py) and its Rademacher wild bootstrap (same source) for the
noise band; the rules' own definitions (module docstring of stein_torch.samplers.stopping) for the
synthetic sequences; the sum of a geometric series (closed form) for the predicted remaining change.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

import stein_torch as st
from stein_torch.samplers.monitor import ksd_band, moment_velocity
from stein_torch.samplers.stopping import KSDPlateau, StopRule, as_stop_rule


def feed(rule, values, first_check=1):  # the plateau rule (KSDPlateau), fed KSD values directly
    """Feed per-check KSD values (list of lists) at steps k * every for k = first_check, first_check + 1,
    ...; return (step, reason) of the stop, or (None, None)."""
    every = rule.every
    for i, row in enumerate(values, start=first_check):
        reason = rule.update(i * every, torch.tensor(row))
        if reason:
            return i * every, reason
    return None, None


# --------------------------------------------------------------------------- the plateau rule on synthetic sequences
def test_plateau_fires_after_the_window_and_min_steps():
    # Definition: stop at the first check >= min_steps where the best KSD of the last `window` steps
    # is not below (1 - rtol) x the best before it. Flat from check 5 on (step 50): the window of 100
    # steps (10 checks) is flat from step 150 on, min_steps = 200 delays it to step 200.
    rule = KSDPlateau(every=10, window=100, rtol=0.01, min_steps=200)
    values = [[1.0 / i] for i in range(1, 5)] + [[0.2]] * 100
    assert feed(rule, values) == (200, "ksd_plateau")
    rule = KSDPlateau(every=10, window=100, rtol=0.01, min_steps=0)
    assert feed(rule, values) == (150, "ksd_plateau")


def test_steady_improvement_never_plateaus():
    # A KSD falling 2% per check improves by far more than rtol = 1% over any 10-check window.
    rule = KSDPlateau(every=10, window=100, rtol=0.01, min_steps=0)
    assert feed(rule, [[0.98**i] for i in range(300)]) == (None, None)
    assert rule.reason is None and len(rule.history) == 300


def test_tolerance_fires_when_every_ensemble_is_below():
    rule = KSDPlateau(every=5, window=1000, tol=0.1, min_steps=20)
    values = [[0.5, 0.05]] * 5 + [[0.09, 0.05]] * 5
    # step 25 is the first check >= 20 ... but ensemble 0 only drops below 0.1 at check 6 (step 30)
    assert feed(rule, values) == (30, "ksd_tolerance")


def test_all_ensembles_must_plateau():
    rule = KSDPlateau(every=10, window=50, rtol=0.01, min_steps=0)
    values = [[0.3, 0.97**i] for i in range(40)] + [[0.3, 0.97**40]] * 20
    step, reason = feed(rule, values)
    assert reason == "ksd_plateau" and step == 10 * (41 + 5)  # the last drop is at check 41; 5 flat checks after it


def test_state_dict_round_trip_continues_identically():
    values = [[1.0 / i + 0.1] for i in range(1, 200)]
    whole = KSDPlateau(every=10, window=100, rtol=0.02, min_steps=50)
    expected = feed(whole, values)
    first = KSDPlateau(every=10, window=100, rtol=0.02, min_steps=50)
    feed(first, values[:20])
    state = first.state_dict()
    resumed = KSDPlateau()
    resumed.load_state_dict(state)
    assert feed(resumed, values[20:], first_check=21) == expected
    assert resumed.state_dict() == whole.state_dict()


def test_rule_arguments_are_checked():
    with pytest.raises(ValueError, match="every"):
        KSDPlateau(every=0)
    with pytest.raises(TypeError, match="window"):
        KSDPlateau(window=1.5)
    with pytest.raises(ValueError, match="rtol"):
        KSDPlateau(rtol=1.0)
    with pytest.raises(ValueError, match="tol"):
        KSDPlateau(tol=-1.0)
    with pytest.raises(ValueError, match="missing keys"):
        KSDPlateau().load_state_dict({"every": 10})
    with pytest.raises(ValueError, match="missing keys"):
        StopRule().load_state_dict({"tol": 0.02})
    with pytest.raises(ValueError, match="tol"):
        StopRule(tol=-0.1)
    with pytest.raises(ValueError, match="window"):
        StopRule(window=0)
    with pytest.raises(TypeError, match="stop must be"):
        as_stop_rule("yes")
    assert as_stop_rule(False) is None and isinstance(as_stop_rule(None), StopRule)


# --------------------------------------------------------------------------- wired into st.svgd
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
    assert run.stop_reason == "settled" and run.warnings == []
    assert run.settings["steps"] < 300  # settled long before the cap (the old rule ran at least 300 steps)
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
    rule = KSDPlateau(every=5, tol=10.0, min_steps=20)  # any set of 50 points of N(0, I) has KSD < 10
    run = st.svgd(target, particles=50, steps=500, seed=0, stop=rule)
    assert run.stop_reason == "ksd_tolerance" and run.settings["steps"] == 20
    assert run.to_inference_data().attrs["stop_reason"] == "ksd_tolerance"


def test_stop_argument_is_checked():
    target = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=2)
    with pytest.raises(TypeError, match="stop must be"):
        st.svgd(target, particles=10, steps=5, stop="auto")
    with pytest.raises(TypeError, match="threads"):
        st.svgd(target, particles=10, steps=5, threads=1.5)


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


# --------------------------------------------------------------------------- the settled rule
class FakeWatch:
    """What the sampler hands the rule at one step: given velocities, moments and band."""

    def __init__(self, mean_v, sd_v, mean=0.0, log_sd=0.0, ustat=-1.0, noise=1.0):
        self.v = (torch.tensor([mean_v]), torch.tensor([sd_v]))
        self.m = (torch.tensor([[mean]]), torch.tensor([[log_sd]]))
        self.b = (torch.tensor([ustat]), torch.tensor([noise]))
        self.band_calls = 0

    def velocity(self):
        return self.v

    def moments(self):
        return self.m

    def band(self):
        self.band_calls += 1
        return self.b


def run_rule(rule, watches):
    for step, watch in enumerate(watches):
        if rule.check(step, watch):
            return step
    return None


def test_settled_rule_predicts_the_geometric_tail():
    # velocity v r^t per step: the remaining change is the geometric sum v_t / (1 - r) (closed form);
    # with v0 = 0.1, r = 0.8: remaining 0.5 * 0.8^t <= 0.02 first at t = 15 (0.5 * 0.8^15 = 0.0176)
    rule = StopRule(tol=0.02, band_every=1)
    watches = [FakeWatch(0.1 * 0.8**t, 0.05 * 0.8**t) for t in range(100)]
    assert run_rule(rule, watches) == 15 and rule.reason == "settled"
    assert rule.checks[-1]["how"] == "predicted"
    assert math.isclose(rule.remaining()[0], 0.1 * 0.8**15 / 0.2, rel_tol=1e-6)  # float32 figures


def test_settled_rule_waits_for_the_band():
    # settled moments but a KSD U-statistic 3 noise sds above zero: no stop until it drops into the band
    rule = StopRule(tol=0.02, band_every=1)
    watches = [FakeWatch(1e-4 * 0.5**t, 1e-4 * 0.5**t, ustat=3.0 if t < 40 else 0.5) for t in range(60)]
    assert run_rule(rule, watches) == 40


def test_settled_rule_needs_contraction_or_a_settled_window():
    # a constant velocity never contracts (r = 1): the prediction is unbounded, so only the observed
    # window can stop the run; moments moving 0.01 sd per step move 0.2 sd over 20 steps: no stop
    rule = StopRule(tol=0.02, window=20, window_tol=0.02, band_every=1)
    assert run_rule(rule, [FakeWatch(0.01, 0.0, mean=0.01 * t) for t in range(200)]) is None
    # frozen moments with a noisy, non-contracting velocity: the window settles after 20 steps
    rule = StopRule(tol=0.02, window=20, window_tol=0.02, band_every=1)
    noisy = [FakeWatch(1e-3 * (1 + (t % 2)), 1e-3) for t in range(200)]
    assert run_rule(rule, noisy) == 20 and rule.checks[-1]["how"] == "observed"


def same_state(a, b):
    """Equal nested states, tensors compared exactly."""
    if isinstance(a, torch.Tensor) or isinstance(b, torch.Tensor):
        return isinstance(a, torch.Tensor) and isinstance(b, torch.Tensor) and torch.equal(a, b)
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(same_state(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return isinstance(b, (list, tuple)) and len(a) == len(b) and all(same_state(x, y) for x, y in zip(a, b))
    return a == b


def test_settled_rule_state_round_trip():
    watches = [FakeWatch(0.1 * 0.9**t, 0.05 * 0.9**t, mean=0.01 * t) for t in range(200)]
    whole = StopRule()
    expected = run_rule(whole, watches)
    first = StopRule()
    run_rule(first, watches[:20])
    resumed = StopRule()
    resumed.load_state_dict(first.state_dict())
    step = None
    for t, watch in enumerate(watches[20:], start=20):
        if resumed.check(t, watch):
            step = t
            break
    assert step == expected and same_state(resumed.state_dict(), whole.state_dict())


def test_moment_velocity_is_the_flow_of_the_moments():
    # d mean/dt = mean(phi) and d var/dt = 2 cov(z, phi) (calculus): a small Euler step of the flow
    # changes the moments by the predicted amounts
    g = torch.Generator().manual_seed(0)
    z = torch.randn(1, 500, 3, generator=g, dtype=torch.float64)
    phi = 0.3 - 0.5 * z + 0.1 * torch.randn(1, 500, 3, generator=g, dtype=torch.float64)
    dt = 1e-6
    moved = z + dt * phi
    mean_rate, sd_rate = moment_velocity(z, phi)
    sd = z.std(1, unbiased=False)
    mean_change = ((moved.mean(1) - z.mean(1)).abs() / sd).max() / dt
    log_sd_change = (moved.std(1, unbiased=False).log() - sd.log()).abs().max() / dt
    assert math.isclose(float(mean_rate), float(mean_change), rel_tol=1e-4)
    assert math.isclose(float(sd_rate), float(log_sd_change), rel_tol=1e-4)


def test_ksd_band_is_the_wild_bootstrap_sd():
    # arXiv:1602.03253: U = sum_{i != j} H_ij / (N (N - 1)) (st.ksd with ustat=True), and the
    # Rademacher wild-bootstrap statistic sum_{i != j} W_i W_j H_ij / (N (N - 1)) has sd
    # sqrt(2 sum_{i != j} H_ij^2) / (N (N - 1)) -- checked against 4000 bootstrap replicates
    g = torch.Generator().manual_seed(1)
    x = torch.randn(2, 60, 3, generator=g, dtype=torch.float64)
    s = -x + 0.2 * torch.randn(2, 60, 3, generator=g, dtype=torch.float64)
    ustat, noise = ksd_band(x, s)
    torch.testing.assert_close(ustat, st.ksd(x, s, ustat=True))
    ustat_chunked, noise_chunked = ksd_band(x, s, chunk=7)
    torch.testing.assert_close(ustat_chunked, ustat)
    torch.testing.assert_close(noise_chunked, noise)
    # the Stein kernel matrix by its definition, u(x, y) = k s_x.s_y + s_x.grad_y k + s_y.grad_x k
    # + tr(grad_x grad_y k), with the IMQ's derivatives by hand: grad_x k = -q^(-3/2) (x - y),
    # tr(grad_x grad_y k) = d q^(-3/2) - 3 q^(-5/2) |x - y|^2, q = 1 + |x - y|^2
    diff = x[:, :, None] - x[:, None]  # x_i - x_j
    r2 = (diff**2).sum(-1)
    q = 1 + r2
    h = (q**-0.5 * (s @ s.mT) + q**-1.5 * (s[:, :, None] * diff).sum(-1) - q**-1.5 * (s[:, None] * diff).sum(-1)
         + 3 * q**-1.5 - 3 * q**-2.5 * r2)
    h = h - torch.diag_embed(torch.diagonal(h, dim1=-2, dim2=-1))
    torch.testing.assert_close(h.sum((-1, -2)) / (60 * 59), ustat)
    w = torch.randint(0, 2, (4000, 60), generator=g).to(torch.float64) * 2 - 1
    boot = torch.einsum("bi,eij,bj->eb", w, h, w) / (60 * 59)
    np.testing.assert_allclose(boot.std(-1).numpy(), noise.numpy(), rtol=0.06)


def test_exact_draws_sit_inside_the_band():
    # exact draws of N(0, I) with their exact scores -x: U / noise averages about 0 (an unbiased
    # U-statistic of KSD^2 = 0, arXiv:1602.03253) and lies below 1 for most sets
    g = torch.Generator().manual_seed(2)
    x = torch.randn(200, 50, 2, generator=g, dtype=torch.float64)
    ustat, noise = ksd_band(x, -x)
    ratio = (ustat / noise).numpy()
    assert abs(ratio.mean()) < 0.3 and np.mean(ratio <= 1.0) > 0.75

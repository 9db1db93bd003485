"""The batched no-U-turn transition: invariance of the target (scipy.stats), cost accounting, faults,
and stopping exactly where the plain recursive algorithm stops.

Reference for the second part: the recursive tree building of "The No-U-Turn Sampler"
(arXiv:1111.4246, Algorithm 3), with the generalised criterion of "A Conceptual Introduction to
Hamiltonian Monte Carlo" (arXiv:1701.02434: a segment turned when p#_a . rho <= 0 or p#_b . rho <= 0,
rho its momentum sum) and, at every merge of sibling trees E (built first) and F, the two extra checks
E + first(F) and last(E) + F (common practice). It is written plainly below, over the trajectory the
kernel evaluated (recorded, and its momenta rebuilt by the leapfrog equations).
"""

import numpy as np
import pytest
import scipy.stats
import torch

from stein_torch.samplers.metric import DenseMetric, DiagonalMetric
from stein_torch.samplers.trajectory import NoUTurnTransition

CHAINS = 2000


class Counting:
    """Wrap ``evaluate`` to count calls and evaluated rows."""

    def __init__(self, evaluate):
        self.evaluate, self.calls, self.rows = evaluate, 0, 0

    def __call__(self, x):
        self.calls += 1
        self.rows += x.shape[0]
        return self.evaluate(x)


def _gumbel(x):
    # standard Gumbel (scipy.stats.gumbel_r): log p = -(x + exp(-x)) on coordinate 0, N(0, 10^2) on 1
    u, w = x[:, 0], x[:, 1]
    lp = -(u + torch.exp(-u)) - 0.5 * (w / 10.0) ** 2
    grad = torch.stack([-1.0 + torch.exp(-u), -w / 100.0], 1)
    return lp, grad, torch.zeros(x.shape[0], dtype=torch.bool)


def _run(evaluate, x, metric, step, transitions, seed=0, **kw):
    kernel = NoUTurnTransition(**kw)
    g = torch.Generator().manual_seed(seed)
    lp, grad, _ = evaluate(x)
    eps = torch.full((x.shape[0],), step, dtype=x.dtype)
    stats = []
    for _ in range(transitions):
        x, lp, grad, s = kernel(x, lp, grad, eps, metric, evaluate, g)
        stats.append(s)
    return x, lp, grad, stats


@pytest.mark.parametrize("kind", ["diag", "dense"])
def test_kernel_leaves_a_skewed_target_invariant(kind):
    # Start 2000 independent chains at exact draws (scipy.stats.gumbel_r, normal); after 15 transitions
    # each chain's state must still follow the target: KS tests against scipy.stats.
    rng = np.random.default_rng(0)
    x0 = torch.tensor(np.stack([scipy.stats.gumbel_r.rvs(size=CHAINS, random_state=rng),
                                10.0 * rng.standard_normal(CHAINS)], 1))
    metric = (DiagonalMetric(torch.tensor([1.0, 4.0], dtype=torch.float64)) if kind == "diag"
              else DenseMetric(torch.tensor([[1.0, 0.3], [0.3, 4.0]], dtype=torch.float64)))
    x, lp, grad, stats = _run(_gumbel, x0, metric, 0.3, 15)
    assert scipy.stats.kstest(x[:, 0].numpy(), scipy.stats.gumbel_r.cdf).pvalue > 1e-3
    assert scipy.stats.kstest(x[:, 1].numpy(), scipy.stats.norm(scale=10.0).cdf).pvalue > 1e-3
    # the chains moved (not a kernel that stands still): most draws differ from the start
    assert (x[:, 0] != x0[:, 0]).double().mean() > 0.9
    # returned lp and grad are those of the returned points
    lp_check, grad_check, _ = _gumbel(x)
    assert torch.allclose(lp, lp_check) and torch.allclose(grad, grad_check)


def test_one_batched_call_per_leapfrog_step_and_step_counts():
    # tree doubling ("The No-U-Turn Sampler", arXiv:1111.4246): depth j means 2^(j-1) <= steps <= 2^j - 1;
    # all building chains share a call, so calls = max steps and evaluated rows = total steps
    g = torch.Generator().manual_seed(1)
    x = torch.randn(8, 3, generator=g, dtype=torch.float64) * torch.tensor([0.1, 1.0, 10.0], dtype=torch.float64)
    scales = torch.tensor([0.1, 1.0, 10.0], dtype=torch.float64)

    def gauss(y):
        return -0.5 * ((y / scales) ** 2).sum(1), -y / scales ** 2, torch.zeros(y.shape[0], dtype=torch.bool)

    counter = Counting(gauss)
    kernel = NoUTurnTransition()
    lp, grad, _ = gauss(x)
    eps = torch.linspace(0.02, 0.2, 8, dtype=torch.float64)
    for _ in range(20):
        counter.calls = counter.rows = 0
        x, lp, grad, s = kernel(x, lp, grad, eps, DiagonalMetric(torch.ones(3, dtype=torch.float64)), counter, g)
        assert counter.calls == int(s["n_steps"].max())
        assert counter.rows == int(s["n_steps"].sum())
        assert torch.all(s["n_steps"] >= 2 ** (s["tree_depth"] - 1))
        assert torch.all(s["n_steps"] <= 2 ** s["tree_depth"] - 1)
        assert torch.all((s["acceptance_rate"] >= 0) & (s["acceptance_rate"] <= 1))
    assert len(set(s["n_steps"].tolist())) > 1          # chains did stop at different lengths


def test_bad_points_act_as_a_wall_and_are_reported():
    # evaluate flags x >= 1 as bad; rejecting those trajectories samples N(0, 1) truncated at 1:
    # KS test against scipy.stats.truncnorm, starting from exact draws of it
    def walled(y):
        lp, grad = -0.5 * (y * y).sum(1), -y
        bad = y[:, 0] >= 1.0
        return lp.masked_fill(bad, 123.0), grad.masked_fill(bad[:, None], 7.0), bad   # finite junk

    rng = np.random.default_rng(1)
    truncated = scipy.stats.truncnorm(-np.inf, 1.0)
    x0 = torch.tensor(truncated.rvs(size=(CHAINS, 1), random_state=rng))
    x, _, _, stats = _run(walled, x0, DiagonalMetric(torch.ones(1, dtype=torch.float64)), 0.4, 10)
    assert float(x.max()) < 1.0
    assert scipy.stats.kstest(x[:, 0].numpy(), truncated.cdf).pvalue > 1e-3
    assert int(sum(s["diverging"].sum() for s in stats)) > 0


def test_max_depth_caps_the_trajectory():
    # arXiv:1111.4246: at most 2^depth_limit - 1 leapfrog steps
    x0 = torch.zeros(4, 2, dtype=torch.float64)

    def flat_ish(y):
        return -0.5e-6 * (y * y).sum(1), -1e-6 * y, torch.zeros(y.shape[0], dtype=torch.bool)

    _, _, _, stats = _run(flat_ish, x0, DiagonalMetric(torch.ones(2, dtype=torch.float64)), 0.01, 3, depth_limit=3)
    for s in stats:
        assert torch.all(s["tree_depth"] == 3) and torch.all(s["n_steps"] == 7)


def test_argument_errors():
    with pytest.raises(ValueError, match="depth_limit: expected an integer in \\[1, 30\\], got 0"):
        NoUTurnTransition(depth_limit=0)
    with pytest.raises(ValueError, match="max_energy_error: expected a positive number, got -1"):
        NoUTurnTransition(max_energy_error=-1)


# ---------------------------------------------------------------- against the recursive algorithm

COV = torch.tensor([[1.0, 0.8, 0.0], [0.8, 1.0, 0.3], [0.0, 0.3, 4.0]], dtype=torch.float64)
PREC = torch.linalg.inv(COV)


def _gauss(x):
    grad = -(x @ PREC)
    return 0.5 * (x * grad).sum(1), grad, torch.zeros(x.shape[0], dtype=torch.bool)


def _leapfrog(state, eps, inv_mass):
    x, p = state
    p = p + 0.5 * eps * _gauss(x[None])[1][0]
    x = x + eps * (inv_mass @ p)
    p = p + 0.5 * eps * _gauss(x[None])[1][0]
    return x, p


def _no_turn(rho, sharp_a, sharp_b):
    return float(sharp_a @ rho) > 0 and float(sharp_b @ rho) > 0


def _merge_ok(left, right, inv_mass):
    """Checks when E = left (built first) and F = right merge; items are (x, p) in build order."""
    sharp = lambda s: inv_mass @ s[1]
    rho_l, rho_r = sum(s[1] for s in left), sum(s[1] for s in right)
    return (_no_turn(rho_l + rho_r, sharp(left[0]), sharp(right[-1]))
            and _no_turn(rho_l + right[0][1], sharp(left[0]), sharp(right[0]))
            and _no_turn(left[-1][1] + rho_r, sharp(left[-1]), sharp(right[-1])))


def _subtree(states, inv_mass):
    """Recursive validity of a sub-tree (states in build order) and the steps used before stopping."""
    if len(states) == 1:
        return True, 1
    half = len(states) // 2
    ok, used = _subtree(states[:half], inv_mass)
    if not ok:
        return False, used
    ok, more = _subtree(states[half:], inv_mass)
    if not ok:
        return False, used + more
    return _merge_ok(states[:half], states[half:], inv_mass), len(states)


def _reference(x0, calls, eps, inv_mass, depth_limit):
    """Replay the recorded points with the recursive algorithm; return (depth, n_steps)."""
    x1 = calls[0]
    p0 = torch.linalg.solve(inv_mass, (x1 - x0) / eps) - 0.5 * eps * _gauss(x0[None])[1][0]
    forward_end, backward_end = (x0, p0), (x0, p0)       # direction of the first step taken as forward
    trajectory_fw, trajectory_bw = [(x0, p0)], []
    used, j = 0, 0
    while j < depth_limit:
        size = 1 << j
        segment = calls[used:used + size]
        new, state = [], forward_end
        if not torch.allclose(_leapfrog(forward_end, eps, inv_mass)[0], segment[0], atol=1e-9):
            state, sign = backward_end, -1.0
        else:
            sign = 1.0
        for _ in range(len(segment)):
            state = _leapfrog(state, sign * eps, inv_mass)
            new.append(state)
        assert all(torch.allclose(s[0], c, atol=1e-9) for s, c in zip(new, segment))
        ok, steps = _subtree(new, inv_mass)
        used += steps
        j += 1
        if not ok:
            return j, used
        # in build order: old trajectory from its far end to the end being extended, then the new points
        old_in_build_order = (list(reversed(trajectory_bw)) + trajectory_fw if sign > 0
                              else list(reversed(trajectory_fw)) + trajectory_bw)
        if sign > 0:
            trajectory_fw = trajectory_fw + new
            forward_end = new[-1]
        else:
            trajectory_bw = trajectory_bw + new
            backward_end = new[-1]
        if not _merge_ok(old_in_build_order, new, inv_mass):
            return j, used
    return j, used


@pytest.mark.parametrize("seed", range(40))
def test_stops_where_the_recursive_algorithm_stops(seed):
    g = torch.Generator().manual_seed(seed)
    x0 = torch.randn(1, 3, generator=g, dtype=torch.float64) @ torch.linalg.cholesky(COV).T
    inv_mass = torch.tensor([[1.2, 0.5, 0.1], [0.5, 0.9, 0.0], [0.1, 0.0, 2.0]], dtype=torch.float64)
    eps = [0.05, 0.2, 0.6, 0.9, 1.0, 1.1][seed % 6]     # up to near the leapfrog stability limit 1.15
    calls = []

    def recording(x):
        calls.append(x[0].clone())
        return _gauss(x)

    lp, grad, _ = _gauss(x0)
    depth_limit = 10
    _, _, _, stats = NoUTurnTransition(depth_limit=depth_limit)(
        x0, lp, grad, torch.tensor([eps], dtype=torch.float64), DenseMetric(inv_mass), recording, g)
    depth, n_steps = _reference(x0[0], calls, eps, inv_mass, depth_limit)
    assert n_steps == len(calls) == int(stats["n_steps"][0])
    assert depth == int(stats["tree_depth"][0])

"""Numeric faults: a log density that is NaN/inf or raises for some inputs is survived and contained.

The target is a Gaussian N((3, 0), 0.5^2 I) (closed form) whose function "glitches" at isolated
inputs: on a grid of narrow holes (x0 within 1e-5 of a multiple of 0.001, 1% of the line) it returns
NaN/inf or raises, as numerical code can. Particles moving from the origin to the mode land in a hole
now and then. Outside the holes the function is exact, so the same function without holes is the
fault-free reference.
"""

import numpy as np
import pytest
import torch

import stein_torch as st
from stein_torch.samplers.faults import MAX_BACKTRACK
from stein_torch.samplers.svgd import FAULT_PATIENCE

MEAN = torch.tensor([3.0, 0.0], dtype=torch.float64)
SD = 0.5
PARTICLES = 40


def clean(x):
    return -0.5 * (((x - MEAN.to(x.dtype)) / SD) ** 2).sum(-1)


def in_hole(x):
    return torch.frac(1000 * x[..., 0]).abs() < 0.01


def nan_in_hole(x):
    lp = clean(x)
    return torch.where(in_hole(x), torch.full_like(lp, float("nan")), lp)


def inf_in_hole(x):
    lp = clean(x)
    return torch.where(in_hole(x), torch.full_like(lp, float("inf")), lp)


def raises_in_hole(x):
    if bool(in_hole(x).any()):
        raise ValueError("the model's numerics fail at this x0")
    return clean(x)


def start():
    g = torch.Generator().manual_seed(0)
    return 0.3 * torch.randn(PARTICLES, 2, generator=g, dtype=torch.float64)


def sampler(fn):
    return st.Sampler(st.Target(fn, dim=2), PARTICLES, init=start(), precondition=None, seed=0)


@pytest.mark.parametrize("fn", [nan_in_hole, inf_in_hole, raises_in_hole])
def test_faulty_particles_are_shrunk_and_the_others_take_the_fault_free_step(fn):
    faulty, reference = sampler(fn), sampler(clean)
    for _ in range(200):
        before = faulty.u.clone()
        faulty.step()
        reference.step()
        if faulty.history["faults"][-1]:
            break
        # no fault yet: both runs are the same computation (common practice: bitwise determinism on CPU)
        assert torch.equal(faulty.u, reference.u)
    else:
        pytest.fail("no particle landed in a hole; the scenario did not exercise the fault path")
    proposal = reference.u  # where every particle would have gone without the hole
    hit = in_hole(proposal[0])
    # the fault count in the trace is the number of particles whose proposal fell in the hole
    assert faulty.history["faults"][-1] == int(hit.sum())
    # the other particles are unaffected: bit for bit the fault-free step
    assert torch.equal(faulty.u[0, ~hit], proposal[0, ~hit])
    # the faulty ones moved back along their own step, by a power of two, out of the hole
    for i in hit.nonzero().flatten().tolist():
        old, new, prop = before[0, i], faulty.u[0, i], proposal[0, i]
        assert not bool(in_hole(new)) and bool(torch.isfinite(new).all())
        fractions = [2.0**-k for k in range(1, MAX_BACKTRACK + 1)] + [0.0]
        assert any(torch.allclose(new, old + f * (prop - old), rtol=0, atol=1e-12) for f in fractions)
    assert torch.isfinite(faulty.lp).all() and torch.isfinite(faulty.score).all()


def test_a_run_through_the_hole_reaches_the_target_and_raising_equals_nan():
    runs = {
        fn.__name__: st.svgd(st.Target(fn, dim=2), PARTICLES, 150, init=start(), precondition=None, seed=0)
        for fn in (nan_in_hole, raises_in_hole)
    }
    nan_run, raise_run = runs["nan_in_hole"], runs["raises_in_hole"]
    assert nan_run.history["faults"].sum() > 0  # the hole was hit and counted
    # a function that raises is treated exactly like one that returns NaN there
    assert torch.equal(nan_run.particles, raise_run.particles)
    np.testing.assert_array_equal(nan_run.history["faults"], raise_run.history["faults"])
    x = nan_run.draws["x"][0]
    assert torch.isfinite(x).all() and torch.isfinite(nan_run.lp).all()
    # closed form: mean (3, 0), sd 0.5 per coordinate; 40 particles, tolerance common practice
    assert torch.allclose(x.mean(0), MEAN, atol=0.1 * SD)
    assert torch.allclose(x.std(0), torch.full((2,), SD, dtype=torch.float64), rtol=0.15)


def wall(x):
    """NaN beyond x0 = 1.5 although the density there is large: a model bug that never goes away."""
    lp = clean(x)
    return torch.where(x[..., 0] > 1.5, torch.full_like(lp, float("nan")), lp)


def test_particles_held_at_a_wall_warn_and_the_run_goes_on():
    # The density is NaN beyond x0 = 1.5 (an undeclared truncation): particles pile against it, the run
    # is not lost, and the result carries a warning naming the boundary, the counts and the hint.
    run = sampler(wall)
    run.run(400)
    faults = run.history["faults"]
    assert faults.sum() > 0 if hasattr(faults, "sum") else sum(faults) > 0
    result = run.result()
    assert torch.isfinite(result.particles).all() and bool((result.draws["x"][..., 0] <= 1.5).all())
    message = next(w for w in result.warnings if "NaN/inf" in w)
    assert f"of {PARTICLES} particles" in message and "Hint" in message and "support" in message
    # closed form: a normal N(3, 0.5^2) cut at 1.5 (three sds below its mean) keeps its mass within a
    # few tenths of the cut; the particles are there, not back at the start
    x0 = result.draws["x"][0, :, 0]
    assert float(x0.mean()) > 1.2


def breaks_after(calls: int):
    """A model whose numerics break for good after ``calls`` evaluations (a simulator that starts
    failing mid-run): every particle is then faulty at every step."""
    count = {"n": 0}

    def log_prob(x):
        count["n"] += 1
        lp = clean(x)
        return lp if count["n"] <= calls else torch.full_like(lp, float("nan"))

    return log_prob


def test_an_ensemble_that_cannot_move_raises_with_step_count_hint_and_result():
    run = st.Sampler(st.Target(breaks_after(30), dim=2), PARTICLES, init=start(), precondition=None, seed=0, stop=False)
    with pytest.raises(FloatingPointError) as info:
        run.run(400)
    message = str(info.value)
    faults = run.history["faults"]
    # it gives up after FAULT_PATIENCE consecutive steps in which no particle could move (the
    # documented rule), naming the step
    assert all(f == PARTICLES for f in faults[-(FAULT_PATIENCE - 1):])
    assert f"step {run.step_count + 1}" in message
    assert f"of {PARTICLES} particles" in message and "Hint" in message and "support" in message
    assert torch.isfinite(run.u).all()  # the particles it holds are still the last finite ones
    kept = info.value.result  # the run so far comes with the error
    assert kept.stop_reason == "faults" and torch.equal(kept.particles, run.affine.to_z(run.u))


def test_a_persistent_raise_names_the_error_in_the_warning_and_keeps_the_checkpoint(tmp_path):
    def raising_wall(x):
        if bool((x[..., 0] > 1.5).any()):
            raise ValueError("scale must be positive")
        return clean(x)

    path = tmp_path / "run.pt"
    with pytest.warns(RuntimeWarning, match="ValueError: scale must be positive"):
        run = st.svgd(st.Target(raising_wall, dim=2), PARTICLES, 400, init=start(), precondition=None, seed=0,
                      checkpoint=path, checkpoint_every=5)
    assert any("ValueError: scale must be positive" in w for w in run.warnings)
    saved = st.load(path, st.Target(raising_wall, dim=2))  # still a valid file with finite particles
    assert saved.settings["steps"] == run.settings["steps"] and torch.isfinite(saved.particles).all()


def test_a_stuck_ensemble_leaves_its_state_in_the_checkpoint(tmp_path):
    path = tmp_path / "run.pt"
    with pytest.raises(FloatingPointError) as info:
        st.svgd(st.Target(breaks_after(30), dim=2), PARTICLES, 400, init=start(), precondition=None, seed=0,
                stop=False, checkpoint=path, checkpoint_every=1000)
    saved = st.load(path, st.Target(breaks_after(10**9), dim=2))
    assert torch.equal(saved.particles, info.value.result.particles)


def test_initial_draws_where_the_function_raises_are_pulled_to_the_mode():
    def defined_near_mode(x):  # N(0, 0.3^2 I), but the function only accepts |x_i| < 0.75 (2.5 sd)
        if bool((x.abs() >= 0.75).any()):
            raise ValueError("outside the region where the model is defined")
        return -0.5 * (x**2).sum(-1) / 0.3**2

    n, seed = 200, 1
    raw = 0.3 * torch.randn((1, n, 2), generator=torch.Generator().manual_seed(seed), dtype=torch.float64)
    assert bool((raw.abs() >= 0.75).any())  # the Laplace draws (sd 0.3 at the mode) do leave the region
    run = st.Sampler(st.Target(defined_near_mode, dim=2), n, seed=seed)
    z = run.affine.to_z(run.u)
    assert torch.isfinite(z).all() and bool((z.abs() < 0.75).all())
    assert torch.isfinite(run.lp).all()


def test_a_function_that_raises_everywhere_surfaces_its_own_error():
    def broken(x):
        raise ZeroDivisionError("bug in the model")

    with pytest.raises(ZeroDivisionError, match="bug in the model"):
        st.svgd(st.Target(broken, dim=2), 10, 5, seed=0)

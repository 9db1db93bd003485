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


def test_a_persistent_fault_raises_with_step_count_and_hint():
    run = sampler(wall)
    with pytest.raises(FloatingPointError) as info:
        run.run(400)
    message = str(info.value)
    faults = run.history["faults"]
    # it gives up after FAULT_PATIENCE consecutive faulty steps (the documented rule), naming the step
    assert all(f > 0 for f in faults[-(FAULT_PATIENCE - 1):])
    assert f"step {run.step_count + 1}" in message
    assert f"of {PARTICLES} particles" in message and "Hint" in message and "support" in message
    assert torch.isfinite(run.u).all()  # the particles it holds are still the last finite ones


def test_a_persistent_raise_names_the_error_and_keeps_the_checkpoint(tmp_path):
    def raising_wall(x):
        if bool((x[..., 0] > 1.5).any()):
            raise ValueError("scale must be positive")
        return clean(x)

    path = tmp_path / "run.pt"
    with pytest.raises(FloatingPointError, match="ValueError: scale must be positive"):
        st.svgd(st.Target(raising_wall, dim=2), PARTICLES, 400, init=start(), precondition=None, seed=0,
                  checkpoint=path, checkpoint_every=5)
    saved = st.load(path, st.Target(raising_wall, dim=2))  # still a valid file with finite particles
    assert saved.settings["steps"] % 5 == 0 and torch.isfinite(saved.particles).all()


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

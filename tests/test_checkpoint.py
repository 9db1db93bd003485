"""Checkpoints: deterministic resume, refusal of foreign checkpoints, atomic files, saved results.

The model is a small hierarchical-style regression of invented data (named parameters, one of them
positive), run as two ensembles with the default kernel, stepper and Laplace whitening, so the state
covers whitening, optimizer moments, generator, minibatch stream and trace.
"""

import functools
import importlib
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as hst
from torch.distributions import HalfNormal, Normal

import stein_torch as st
from stein_torch import io as st_io

STEPS = 24
RUN = dict(particles=16, ensembles=2, seed=3)


def make_target():
    g = torch.Generator().manual_seed(11)
    x = torch.linspace(-1, 1, 20, dtype=torch.float64)
    y = 0.7 + 1.3 * x + 0.4 * torch.randn(20, generator=g, dtype=torch.float64)

    def log_likelihood(p):
        mean = p["a"][..., None] + p["b"][..., None] * x
        return Normal(mean, p["sigma"][..., None]).log_prob(y).sum(-1)

    five, two = torch.tensor(5.0, dtype=torch.float64), torch.tensor(2.0, dtype=torch.float64)
    priors = {"a": Normal(0.0 * five, five), "b": Normal(0.0 * five, five), "sigma": HalfNormal(two)}
    return st.Target.from_priors(priors, log_likelihood)


@functools.lru_cache(maxsize=None)
def uninterrupted():
    return st.svgd(make_target(), steps=STEPS, **RUN)


def assert_same_run(a, b):
    # deterministic resume is the requirement; bitwise equality checked with torch.equal / array_equal
    assert torch.equal(a.particles, b.particles)
    assert torch.equal(a.lp, b.lp)
    assert a.history.keys() == b.history.keys()
    for key in a.history:
        np.testing.assert_array_equal(a.history[key], b.history[key], err_msg=key)
    assert a.settings == b.settings


@settings(max_examples=4, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(stop_at=hst.integers(1, STEPS - 1))
def test_resume_from_any_step_gives_the_uninterrupted_draws(tmp_path, stop_at):
    path = tmp_path / f"run{stop_at}.pt"
    first = st.svgd(make_target(), steps=stop_at, checkpoint=path, **RUN)
    assert first.settings["steps"] == stop_at
    resumed = st.svgd(make_target(), steps=STEPS, resume=path, **RUN)
    assert_same_run(resumed, uninterrupted())


def test_resume_restores_the_setup_instead_of_recomputing_it(tmp_path, monkeypatch):
    path = tmp_path / "run.pt"
    st.svgd(make_target(), steps=5, checkpoint=path, **RUN)
    setup_module = importlib.import_module("stein_torch.samplers.setup")  # where the set-up runs

    def no_setup(*args, **kwargs):
        raise AssertionError("the mode search ran again on resume")

    monkeypatch.setattr(setup_module, "laplace_whitening", no_setup)  # single mode search + Laplace whitening
    monkeypatch.setattr(setup_module, "search_modes", no_setup)  # the default search from several starts
    resumed = st.svgd(make_target(), steps=STEPS, resume=path, **{**RUN, "seed": None})  # seed from the file
    assert_same_run(resumed, uninterrupted())


def test_periodic_checkpoints_continue_the_same_run(tmp_path):
    path = tmp_path / "run.pt"
    st.svgd(make_target(), steps=STEPS, checkpoint=path, checkpoint_every=5, **RUN)
    state = st_io.load_checkpoint(path)
    assert state["step"] == STEPS and state["stop_reason"] == "steps"
    # a finished run can be extended: its checkpoint is the state after the last step
    longer = st.svgd(make_target(), steps=STEPS + 6, **RUN)
    extended = st.svgd(make_target(), steps=STEPS + 6, resume=path, **RUN)
    assert_same_run(extended, longer)


def make_minibatch_target():
    """The regression above with its data attached, scored on minibatches of 8 of the 20 points."""
    g = torch.Generator().manual_seed(11)
    x = torch.linspace(-1, 1, 20, dtype=torch.float64)
    y = 0.7 + 1.3 * x + 0.4 * torch.randn(20, generator=g, dtype=torch.float64)

    def log_likelihood(p, data):
        mean = p["a"][..., None] + p["b"][..., None] * data["x"]
        return Normal(mean, p["sigma"][..., None]).log_prob(data["y"])

    five, two = torch.tensor(5.0, dtype=torch.float64), torch.tensor(2.0, dtype=torch.float64)
    priors = {"a": Normal(0.0 * five, five), "b": Normal(0.0 * five, five), "sigma": HalfNormal(two)}
    return st.Target.from_priors(priors, log_likelihood, data={"x": x, "y": y}, batch_size=8, observed="y")


@pytest.mark.parametrize("part", ["stepper", "data_stream"])
def test_optimizer_moments_and_minibatch_stream_are_part_of_the_resume(tmp_path, part):
    # Adam: a step rule with moments (the default gradient step keeps none); minibatches of 8 from 20
    # observations: the shuffle generator, order and position within the epoch
    adam = functools.partial(torch.optim.Adam, lr=0.05)
    run = dict(particles=20, seed=8, precondition=None, stepper=adam)
    full = st.svgd(make_minibatch_target(), steps=8, **run)
    path = tmp_path / "run.pt"
    st.svgd(make_minibatch_target(), steps=3, checkpoint=path, **run)
    assert torch.equal(st.svgd(make_minibatch_target(), steps=8, resume=path, **run).particles, full.particles)

    # control: the same checkpoint with that part's state dropped gives other draws
    state = st_io.load_checkpoint(path)
    broken = dict(state, components={**state["components"], part: {}})
    st_io.save_checkpoint(tmp_path / "broken.pt", broken)
    other = st.svgd(make_minibatch_target(), steps=8, resume=tmp_path / "broken.pt", **run)
    assert not torch.equal(other.particles, full.particles)


@pytest.mark.parametrize(
    "other",
    [
        lambda: st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=3),  # same dimension, other names
        lambda: st.Target(lambda p: -(p["a"] ** 2 + p["b"] ** 2 + p["c"] ** 2),
                          latents={"a": st.Latent(), "b": st.Latent(), "c": st.Latent()}),  # constraint differs
        lambda: st.Target(lambda p: -(p["a"] ** 2).sum(-1), latents={"a": st.Latent((4,))}),  # shapes differ
    ],
)
def test_a_checkpoint_of_another_target_is_refused(tmp_path, other):
    path = tmp_path / "run.pt"
    st.svgd(make_target(), steps=2, checkpoint=path, **RUN)
    before = path.read_bytes()
    with pytest.raises(ValueError, match=r"resume: the file was written for a different target"):
        st.svgd(other(), steps=4, resume=path, **RUN)
    assert path.read_bytes() == before


@pytest.mark.parametrize(
    "change", [dict(particles=17), dict(ensembles=1), dict(seed=4), dict(kernel=st.kernels.IMQ()),
               dict(dtype=torch.float32)]
)
def test_a_checkpoint_with_other_settings_is_refused(tmp_path, change):
    path = tmp_path / "run.pt"
    st.svgd(make_target(), steps=2, checkpoint=path, **RUN)
    key = next(iter(change))
    with pytest.raises(ValueError, match=rf"resume: the checkpoint was written with other settings \({key}="):
        st.svgd(make_target(), steps=4, resume=path, **{**RUN, **change})


class CountingRule:
    """Stand-in for any part with its own state (a stop rule, a schedule): counts steps it saw."""

    def __init__(self):
        self.seen = 0
        self.history = np.zeros(0)

    def state_dict(self):
        return {"seen": self.seen, "history": self.history}  # numpy is converted on save

    def load_state_dict(self, state):
        self.seen = int(state["seen"])
        self.history = np.asarray(state["history"])


def test_state_dict_collects_every_part_that_has_one(tmp_path):
    target = make_target()
    run = st.Sampler(target, 8, seed=0)
    run.rule = CountingRule()
    run.rule.seen, run.rule.history = 7, np.arange(3.0)
    state = run.state_dict()
    # stop rule: on by default; record: what the warnings read (set-up outcome, moments)
    assert set(state["components"]) == {"kernel", "stepper", "stop_rule", "record", "rule"}
    path = tmp_path / "state.pt"
    run.save(path)
    loaded = st_io.load_checkpoint(path)

    fresh = st.Sampler(target, 8, seed=0)
    with pytest.raises(ValueError, match=r"holds state for \['kernel', 'record', 'rule', 'stepper', 'stop_rule'\]"):
        fresh.load_state_dict(loaded)
    fresh.rule = CountingRule()
    fresh.load_state_dict(loaded)
    assert fresh.rule.seen == 7 and np.array_equal(fresh.rule.history, np.arange(3.0))


def test_checkpoints_hold_only_plain_data(tmp_path):
    run = st.Sampler(make_target(), 8, seed=0)
    run.run(2)
    run.save(tmp_path / "state.pt")

    def leaves(obj):
        if isinstance(obj, dict):
            for v in obj.values():
                yield from leaves(v)
        elif isinstance(obj, (list, tuple)):
            for v in obj:
                yield from leaves(v)
        else:
            yield obj

    # weights_only loading (torch's restricted unpickler) accepts the file; leaves are plain types
    state = torch.load(tmp_path / "state.pt", weights_only=True)
    assert all(v is None or isinstance(v, (torch.Tensor, bool, int, float, str)) for v in leaves(state))
    with pytest.raises(TypeError, match=r"checkpoint\['components'\]\['bad'\]"):
        st_io.save_checkpoint(tmp_path / "bad.pt", {**state, "components": {"bad": object()}})
    assert not (tmp_path / "bad.pt").exists()


def _half_then_fail(obj, f):
    f.write(b"PK\x03\x04 partial zip header")
    raise OSError("disk full (simulated)")


def test_a_failed_write_leaves_the_previous_checkpoint(tmp_path, monkeypatch):
    path = tmp_path / "run.pt"
    run = st.Sampler(make_target(), 8, seed=0)
    run.save(path)
    good = path.read_bytes()
    run.run(1)
    monkeypatch.setattr(st_io.torch, "save", _half_then_fail)
    with pytest.raises(OSError, match="disk full"):
        run.save(path)
    monkeypatch.undo()
    assert path.read_bytes() == good  # previous checkpoint intact
    assert sorted(os.listdir(tmp_path)) == ["run.pt"]  # no temporary file left behind
    assert st_io.load_checkpoint(path)["step"] == 0

    # control: the same failure while writing in place tears the file (what atomic writing prevents)
    with open(path, "wb") as f, pytest.raises(OSError):
        _half_then_fail(None, f)
    with pytest.raises(ValueError, match="not a readable stein_torch file"):
        st_io.load_checkpoint(path)


KILL_SCRIPT = textwrap.dedent(
    """
    import sys, torch
    from stein_torch import io
    path = sys.argv[1]
    payload = torch.arange(2_000_000, dtype=torch.float64)
    for i in range(1, 10_000):
        io.save_checkpoint(path, {"step": i, "payload": payload + i})
        print(i, flush=True)
    """
)


@pytest.mark.parametrize("after", [2, 5])
def test_a_hard_kill_during_writes_never_leaves_a_torn_checkpoint(tmp_path, after):
    path = tmp_path / "run.pt"
    script = tmp_path / "writer.py"
    script.write_text(KILL_SCRIPT)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([os.getcwd(), os.environ.get("PYTHONPATH", "")])}
    proc = subprocess.Popen([sys.executable, str(script), str(path)], stdout=subprocess.PIPE, text=True, env=env)
    last = 0
    try:
        for line in proc.stdout:
            last = int(line)
            if last >= after:
                proc.kill()  # SIGKILL: no cleanup runs, possibly in the middle of the next write
                break
    finally:
        proc.kill()
        proc.wait()
    state = st_io.load_checkpoint(path)  # readable: the previous or the next complete file
    assert state["step"] in (last, last + 1)
    assert torch.equal(state["payload"], torch.arange(2_000_000, dtype=torch.float64) + state["step"])


def test_saved_results_round_trip(tmp_path):
    target, run = make_target(), uninterrupted()
    run.save(tmp_path / "result.pt")
    back = st.load(tmp_path / "result.pt", target)
    assert_same_run(back, run)
    assert back.stop_reason == run.stop_reason
    for name in run.draws:
        assert torch.equal(back.draws[name], run.draws[name])
    with pytest.raises(ValueError, match="path: the file was written for a different target"):
        st.load(tmp_path / "result.pt", st.Target(lambda x: -(x**2).sum(-1), dim=3))

    import arviz as az

    run.save(tmp_path / "result.nc")
    idata = az.from_netcdf(tmp_path / "result.nc")  # ArviZ reads it back (NetCDF round trip)
    np.testing.assert_array_equal(idata.posterior["sigma"].values, run.draws["sigma"].numpy())
    assert sorted(os.listdir(tmp_path)) == ["result.nc", "result.pt"]


def test_atomic_write_replaces_only_on_success(tmp_path):
    path = tmp_path / "notes.txt"
    with st_io.atomic_write(path, "w", encoding="utf-8") as f:
        f.write("first\n")
    with pytest.raises(RuntimeError, match="stop"):
        with st_io.atomic_write(path, "w", encoding="utf-8") as f:
            f.write("second, unfinished")
            raise RuntimeError("stop")
    assert path.read_text() == "first\n" and os.listdir(tmp_path) == ["notes.txt"]
    with pytest.raises(ValueError, match="path: folder .* does not exist"):
        with st_io.atomic_write(tmp_path / "missing" / "x.txt"):
            pass



@pytest.mark.parametrize("ensembles", [1, 2])
def test_loading_a_checkpoint_after_rewhitening_gives_the_run_itself(tmp_path, ensembles):
    # Default settings for 30 steps: the particles were re-whitened at step 25, one affine map per
    # ensemble (B, d, d). The checkpoint read back by st.load must hold the run's own particles.
    path = tmp_path / "run.pt"
    run = st.svgd(make_target(), particles=16, ensembles=ensembles, steps=30, seed=3, checkpoint=path)
    assert st_io.load_checkpoint(path)["affine"]["matrix"].shape == (ensembles, 3, 3)
    loaded = st.load(path, make_target())
    assert loaded.particles.shape == run.particles.shape == (ensembles, 16, 3)
    torch.testing.assert_close(loaded.particles, run.particles, rtol=0, atol=1e-12)
    for name in run.draws:
        torch.testing.assert_close(loaded.draws[name], run.draws[name], rtol=1e-12, atol=1e-12)
    assert loaded.settings["steps"] == 30

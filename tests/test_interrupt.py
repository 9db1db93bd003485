"""Ctrl-C: the first SIGINT returns the particles so far (and checkpoints them), a second one aborts.

The subprocess tests run a sampling script in a child process and send it real SIGINTs. The child's
log density announces a chosen evaluation on stdout and then waits on stdin, so the signals arrive
while sampling is certainly in progress, without any timing assumptions. The expected behaviour is
the requirement of the issue; "common practice" for command-line programs: first Ctrl-C stops
cleanly, a second one aborts.
"""

import os
import random
import signal
import subprocess
import sys
import textwrap

import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as hst

import stein_torch as st
from stein_torch import io as st_io

STEPS = 16
SETUP_CALLS = 1  # precondition=None: the first evaluation (the batched-or-not probe keeps its output)


def scaled_normal(x):
    return -0.5 * (x**2 * torch.arange(1, 4, dtype=x.dtype)).sum(-1)


def run_kwargs(**extra):
    # stop=False: these runs are about Ctrl-C, so they take all STEPS steps (the default rule would end
    # a 3-D Gaussian run within them); resuming with the rule on is checked in test_checkpoint.py
    return dict(particles=20, steps=STEPS, seed=5, precondition=None, progress=False, stop=False, **extra)


def test_setup_calls_are_what_the_trigger_assumes():
    calls = []
    st.Sampler(st.Target(lambda x: calls.append(1) or scaled_normal(x), dim=3), 20, seed=5, precondition=None)
    assert len(calls) == SETUP_CALLS


@settings(max_examples=3, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(stop_in=hst.integers(1, STEPS - 1))
def test_sigint_in_process_returns_the_run_so_far_and_resumes_exactly(tmp_path, stop_in):
    calls = 0

    def log_prob(x):
        nonlocal calls
        calls += 1
        if calls == SETUP_CALLS + stop_in:  # during the evaluation of step `stop_in`
            signal.raise_signal(signal.SIGINT)
        return scaled_normal(x)

    path = tmp_path / f"run{stop_in}.pt"
    handler = signal.getsignal(signal.SIGINT)
    run = st.svgd(st.Target(log_prob, dim=3), checkpoint=path, **run_kwargs())
    assert signal.getsignal(signal.SIGINT) is handler  # the previous handler is back
    assert run.stop_reason == "interrupted" and run.settings["steps"] == stop_in
    saved = st_io.load_checkpoint(path)
    assert saved["step"] == stop_in and saved["stop_reason"] == "interrupted"
    resumed = st.svgd(st.Target(scaled_normal, dim=3), resume=path, **run_kwargs())
    full = st.svgd(st.Target(scaled_normal, dim=3), **run_kwargs())
    assert resumed.stop_reason == "steps"
    assert torch.equal(resumed.particles, full.particles)  # bitwise: requirement of deterministic resume


def test_a_keyboard_interrupt_inside_a_step_keeps_the_last_consistent_checkpoint(tmp_path):
    calls = 0

    def log_prob(x):  # raised by code, not by a signal: arrives in the middle of step 7
        nonlocal calls
        calls += 1
        if calls == SETUP_CALLS + 7:
            raise KeyboardInterrupt
        return scaled_normal(x)

    path = tmp_path / "run.pt"
    with pytest.warns(RuntimeWarning, match="interrupted inside step 7"):
        run = st.svgd(st.Target(log_prob, dim=3), checkpoint=path, checkpoint_every=5, **run_kwargs())
    assert run.stop_reason == "interrupted" and run.settings["steps"] == 6
    assert st_io.load_checkpoint(path)["step"] == 5  # the last state saved at a step boundary
    assert torch.isfinite(run.particles).all()


CHILD = textwrap.dedent(
    """
    import sys, torch, stein_torch as st
    mode, path, out, trigger, steps = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5])
    calls = 0

    def log_prob(x):
        global calls
        calls += 1
        if mode in ("interrupt", "abort") and calls == trigger:
            print("READY", flush=True)
            sys.stdin.readline()  # hold here until the parent has sent its signals
        return -0.5 * (x ** 2 * torch.arange(1, 4, dtype=x.dtype)).sum(-1)

    kwargs = dict(particles=20, steps=steps, seed=5, precondition=None, progress=False, stop=False)
    target = st.Target(log_prob, dim=3)
    if mode in ("interrupt", "abort"):
        run = st.svgd(target, checkpoint=path, checkpoint_every=4, **kwargs)
    elif mode == "resume":
        run = st.svgd(target, resume=path, **kwargs)
    else:
        run = st.svgd(target, **kwargs)
    print(f"stop_reason={run.stop_reason} steps={run.settings['steps']}", flush=True)
    torch.save({"particles": run.particles, "lp": run.lp}, out)
    """
)


def child(tmp_path, mode, trigger=0):
    script = tmp_path / "child.py"
    script.write_text(CHILD)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([os.getcwd(), os.environ.get("PYTHONPATH", "")])}
    args = [sys.executable, str(script), mode, str(tmp_path / "run.pt"), str(tmp_path / f"{mode}.out"),
            str(trigger), str(STEPS)]
    return subprocess.Popen(args, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env)


def wait_for(stream, text):
    seen = []
    for line in stream:
        seen.append(line)
        if text in line:
            return "".join(seen)
    raise AssertionError(f"child ended before printing {text!r}: {''.join(seen)}")


def finish(proc):
    out, err = proc.communicate(timeout=600)  # a guard against hanging, not a timing assertion
    return proc.returncode, out, err


STOP_IN = random.Random(6).randint(5, STEPS - 2)  # a fixed "random" step, reproducible


def test_sigint_to_a_child_returns_interrupted_and_its_checkpoint_resumes_exactly(tmp_path):
    proc = child(tmp_path, "interrupt", trigger=SETUP_CALLS + STOP_IN)
    wait_for(proc.stdout, "READY")
    proc.send_signal(signal.SIGINT)
    wait_for(proc.stderr, "interrupt received")
    proc.stdin.write("\n")
    proc.stdin.flush()
    code, out, err = finish(proc)
    assert code == 0, err
    assert f"stop_reason=interrupted steps={STOP_IN}" in out
    saved = st_io.load_checkpoint(tmp_path / "run.pt")
    assert saved["step"] == STOP_IN and saved["stop_reason"] == "interrupted"

    for mode in ("resume", "full"):
        code, out, err = finish(child(tmp_path, mode))
        assert code == 0, err
        assert f"stop_reason=steps steps={STEPS}" in out
    resumed = torch.load(tmp_path / "resume.out", weights_only=True)
    full = torch.load(tmp_path / "full.out", weights_only=True)
    assert torch.equal(resumed["particles"], full["particles"])  # bitwise: deterministic resume
    assert torch.equal(resumed["lp"], full["lp"])


def test_a_second_sigint_aborts_the_child(tmp_path):
    proc = child(tmp_path, "abort", trigger=SETUP_CALLS + STOP_IN)
    wait_for(proc.stdout, "READY")
    proc.send_signal(signal.SIGINT)
    wait_for(proc.stderr, "interrupt received")
    proc.send_signal(signal.SIGINT)
    code, out, err = finish(proc)
    assert code != 0
    assert "stop_reason" not in out and "KeyboardInterrupt" in err
    # the periodic checkpoint written before the abort is intact
    assert st_io.load_checkpoint(tmp_path / "run.pt")["step"] == 4 * ((STOP_IN - 1) // 4)

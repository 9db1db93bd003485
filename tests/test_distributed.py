"""Sharded runs over real process groups (gloo on 127.0.0.1, 2 and 3 ranks; nothing mocks a collective).

Sources of the checks: the single-process run with the same seed is the reference for "same answers"
(the requirement is agreement to 1e-10 relative in float64: the ranks add partial sums in another
order, so bits may differ); the closed-form posterior of a conjugate Gaussian linear regression
(normal prior, known noise) for accuracy; for failures, the requirement that the other ranks stop
with one line naming the rank, within the stated times (docs/distributed.md: at once for a rank that
raises, about 3 s for one that dies, the timeout for one that hangs), checked here only against a
generous limit that separates "stopped" from "hung" (common practice: no timing asserts). Processes
are started by torch.multiprocessing (the script's own group) or by torchrun (the library starts
the group from torchrun's environment).
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import torch

import stein_torch as st
from dist_workers import CASES, case_run, regression_posterior, spawn, summary

RELATIVE = 1e-10  # the requirement: float64 draws of a sharded run match one process to this
HERE = os.path.dirname(__file__)


def relative_difference(a, b) -> float:
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    assert a.shape == b.shape
    finite = np.isfinite(b)
    assert np.array_equal(finite, np.isfinite(a)), "NaN/inf in different places"
    scale = np.maximum(np.abs(b[finite]), 1e-300)
    return float(np.max(np.abs(a[finite] - b[finite]) / scale, initial=0.0))


def assert_same_answers(sharded: dict, single: dict) -> float:
    """Every draw, log density and history figure within RELATIVE (same NaN pattern); returns the
    largest relative difference of the draws."""
    assert sharded.keys() <= single.keys() and {k for k in single if k != "log_likelihood"} <= sharded.keys()
    worst = 0.0
    for key in sharded:
        if key == "stop_reason":
            assert sharded[key] == single[key]
            continue
        diff = relative_difference(sharded[key], single[key])
        assert diff < RELATIVE, f"{key}: relative difference {diff:.2e}"
        if key.startswith("draw_"):
            worst = max(worst, diff)
    return worst


def ranks_ok(out: dict, world: int) -> list:
    problems = {r: out.get(r) for r in range(world) if out.get(r, ("missing",))[0] != "ok"}
    assert not problems, f"ranks failed: {problems}; exit codes {out['exitcodes']}"
    return [out[r][1] for r in range(world)]


@pytest.fixture(scope="module")
def references():
    """Single-process runs of every case (the reference of the equality checks)."""
    return {name: summary(case_run(name, single=True), pointwise=name.startswith("data")) for name in CASES}


# ------------------------------------------------------------------------------------------------ input
def test_bad_distributed_arguments_name_the_argument():
    target = st.Target(lambda x: -0.5 * (x * x).sum(-1), dim=2)
    with pytest.raises(ValueError, match="distributed must be"):  # common practice: the argument is named
        st.svgd(target, particles=10, steps=1, distributed="gpus")
    with pytest.raises(ValueError, match="needs a target with data="):
        st.svgd(target, particles=10, steps=1, distributed="data")
    with pytest.raises(ValueError, match="Sharding: mode"):
        st.Sharding("rows")
    with pytest.raises(ValueError, match="Sharding: timeout"):
        st.Sharding("data", timeout=0)


def test_without_group_or_torchrun_the_error_says_how_to_launch(monkeypatch):
    import torch.distributed as dist

    if dist.is_initialized():
        pytest.skip("a process group is already initialised in this process")
    for key in ("RANK", "WORLD_SIZE", "MASTER_ADDR", "MASTER_PORT"):
        monkeypatch.delenv(key, raising=False)
    target = st.Target(lambda x: -0.5 * (x * x).sum(-1), dim=2)
    with pytest.raises(RuntimeError, match="torchrun --nproc-per-node"):
        st.svgd(target, particles=10, steps=1, distributed=True)


# ------------------------------------------------------------------------------------------- same answers
@pytest.fixture(scope="module")
def two_ranks():
    """The cases, and the accuracy run, on one group of 2 ranks."""
    return ranks_ok(spawn("work_cases", 2, list(CASES), True), 2)


def test_two_ranks_give_the_single_process_answers(references, two_ranks):
    for name in CASES:
        worst = assert_same_answers(two_ranks[0][name], references[name])
        print(f"{name}: 2 ranks, largest relative difference of the draws {worst:.1e}")
        # every rank returns the full Result (the same draws everywhere)
        for key in references[name]:
            if key.startswith("draw_"):
                np.testing.assert_array_equal(two_ranks[1][name][key], two_ranks[0][name][key])
    # data sharding gathers the pointwise log-likelihood on rank 0 (what arviz.loo reads), compared above
    assert "log_likelihood" in two_ranks[0]["data"] and "log_likelihood" not in two_ranks[1]["data"]
    assert "log_likelihood" in two_ranks[0]["data_minibatch"]
    # the NaN region was reached by the last rank's particles only, and contained as in one process
    faults = np.asarray(two_ranks[0]["nan_one_rank"]["history_faults"])
    assert faults.sum() > 0
    np.testing.assert_array_equal(faults, references["nan_one_rank"]["history_faults"])


def test_data_sharding_reaches_the_closed_form_posterior(two_ranks):
    """Source: the conjugate Gaussian posterior of a linear regression with known noise (closed form)."""
    draws = two_ranks[0]["accuracy"]
    mean, cov = regression_posterior()
    sd = cov.diagonal().sqrt().numpy()
    flat = draws.reshape(-1, draws.shape[-1])
    got_mean, got_sd = flat.mean(0), flat.std(0, ddof=1)
    assert np.all(np.abs(got_mean - mean.numpy()) < 0.1 * sd), (got_mean, mean)
    assert np.all(np.abs(got_sd / sd - 1) < 0.1), (got_sd, sd)


@pytest.mark.slow
def test_three_ranks_give_the_single_process_answers(references):
    names = list(CASES)
    per_rank = ranks_ok(spawn("work_cases", 3, names + ["particles_noseed"]), 3)
    for name in names:
        worst = assert_same_answers(per_rank[0][name], references[name])
        print(f"{name}: 3 ranks, largest relative difference of the draws {worst:.1e}")
    # without a seed the ranks agree on rank 0's: the same draws everywhere (common practice)
    for rank in (1, 2):
        np.testing.assert_array_equal(per_rank[rank]["particles_noseed"]["draw_x"],
                                      per_rank[0]["particles_noseed"]["draw_x"])


@pytest.mark.slow
def test_the_library_starts_the_group_from_torchrun(tmp_path, references):
    script = tmp_path / "script.py"
    script.write_text(textwrap.dedent(f"""
        import os, sys, torch
        sys.path.insert(0, {HERE!r})
        torch.set_num_threads(1)
        import dist_workers
        out = dist_workers.summary(dist_workers.case_run("data"))
        if os.environ["RANK"] == "0":
            torch.save(out, {str(tmp_path / "out.pt")!r})
    """))
    env = dict(os.environ, GLOO_SOCKET_IFNAME="lo", OMP_NUM_THREADS="1", LOGLEVEL="ERROR")
    command = [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc-per-node=3", str(script)]
    done = subprocess.run(command, capture_output=True, text=True, env=env, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    sharded = torch.load(tmp_path / "out.pt", weights_only=False)
    assert_same_answers(sharded, references["data"])


# ------------------------------------------------------------------------------------------------ failures
def _resumed_equals_uninterrupted(checkpoint: str) -> int:
    """The checkpoint left by a failed run is complete: resumed in one process it continues to the
    draws of an uninterrupted one-process run (reference: that run, same seed)."""
    from dist_workers import FailingStep, gaussian_target

    state = st.io.load_checkpoint(checkpoint)
    options = dict(particles=30, steps=12, seed=4, stop=False, precondition=None, progress=False)
    resumed = st.svgd(gaussian_target(), stepper=FailingStep("none", 0, -1), resume=checkpoint, **options)
    whole = st.svgd(gaussian_target(), stepper=FailingStep("none", 0, -1), **options)
    assert relative_difference(resumed.particles.numpy(), whole.particles.numpy()) < RELATIVE
    return int(state["step"])


def test_a_rank_that_raises_stops_the_others_with_its_name(tmp_path):
    checkpoint = str(tmp_path / "run.pt")
    out = spawn("work_failure", 2, "raise", 8, checkpoint, 600.0)
    assert out[1][0] == "raised" and "disk quota" in out[1][1]
    report = out[0][1]
    assert report["kind"] == "RankFailure" and "\n" not in report["error"]
    assert report["error"].startswith("rank 1 raised OSError: disk quota exceeded"), report["error"]
    assert report["seconds"] < 60, report  # stopped, not hung (it takes well under a second)
    # "seconds": from rank 1's failure to rank 0's error, on this machine's clock
    print(f"raising rank: rank 0 stopped {report['seconds']:.2f} s after rank 1 raised: {report['error']}")
    assert _resumed_equals_uninterrupted(checkpoint) == 6  # written every 3 steps; step 8 failed


@pytest.mark.slow
def test_a_rank_that_dies_is_named_by_the_others(tmp_path):
    checkpoint = str(tmp_path / "run.pt")
    out = spawn("work_failure", 3, "kill", 5, checkpoint, 600.0)
    assert out["exitcodes"][2] == -9
    for rank in (0, 1):
        report = out[rank][1]
        assert report["error"].startswith("rank 2 stopped responding"), report["error"]
        assert report["seconds"] < 60, report  # stopped, not hung (about 3 s)
        print(f"killed rank: rank {rank} stopped {report['seconds']:.2f} s after rank 2 was killed: {report['error']}")
    assert _resumed_equals_uninterrupted(checkpoint) == 3


@pytest.mark.slow
def test_a_rank_that_hangs_is_named_after_the_timeout(tmp_path):
    out = spawn("work_failure", 2, "hang", 4, str(tmp_path / "run.pt"), 3.0, timeout=200)
    report = out[0][1]
    assert report["error"].startswith("rank 1 did not reach the exchange within the timeout of 3 s"), report
    assert report["seconds"] < 60, report
    print(f"hung rank: rank 0 stopped {report['seconds']:.2f} s after rank 1 hung: {report['error']}")


@pytest.mark.slow
def test_ranks_given_different_settings_refuse_to_start():
    out = spawn("work_mismatch", 2)
    for rank in (0, 1):
        assert out[rank][0] == "raised"
        assert "ValueError" in out[rank][1] and "particles on rank 1" in out[rank][1], out[rank][1]


@pytest.mark.slow
def test_ctrl_c_on_one_rank_stops_every_rank_after_the_same_step():
    per_rank = ranks_ok(spawn("work_interrupt", 2), 2)
    assert per_rank[0] == per_rank[1]
    assert per_rank[0][0] == "interrupted" and per_rank[0][1] < 40


# ---------------------------------------------------------------------------------------------- checkpoints
@pytest.mark.slow
def test_checkpoints_are_written_once_and_resume_on_another_number_of_ranks(tmp_path):
    checkpoint = str(tmp_path / "run.pt")
    first = ranks_ok(spawn("work_checkpoint", 2, checkpoint, 12, None), 2)
    assert first[0]["writes"] == 4 and first[1]["writes"] == 0  # every 3 steps, rank 0 only
    assert [p for p in os.listdir(tmp_path) if p != "run.pt"] == []  # no stray temporary files
    second = ranks_ok(spawn("work_checkpoint", 3, checkpoint, 20, checkpoint), 3)
    whole = summary(st.svgd(CASES["particles"][0](), **dict(CASES["particles"][1], steps=20, stop=False,
                                                            distributed=None, progress=False)))
    assert_same_answers(second[0]["summary"], whole)


# ---------------------------------------------------------------------------------------------- command line
MODEL = """
import os, signal, torch, stein_torch as st
calls = {"n": 0}
def log_prob(x):  # a correlated Gaussian; rank 1 kills itself in its 15th evaluation when asked to
    calls["n"] += 1
    if os.environ.get("KILL_RANK_1") and os.environ.get("RANK") == "1" and calls["n"] == 15:
        os.kill(os.getpid(), signal.SIGKILL)
    return -0.5 * (x[..., 0] ** 2 + (x[..., 1] - 0.5 * x[..., 0]) ** 2 / 0.25)
target = st.Target(log_prob, dim=2)
"""


def _cli(tmp_path, *args, **env):
    (tmp_path / "model.py").write_text(MODEL)
    command = [sys.executable, "-m", "stein_torch", "run", "model.py", "--steps", "20", "--particles", "50", *args]
    environment = dict(os.environ, PYTHONPATH=os.path.dirname(HERE), **env)
    return subprocess.run(command, capture_output=True, text=True, cwd=tmp_path, env=environment, timeout=600)


def test_ranks_must_be_a_positive_integer(capsys):
    from stein_torch.cli import main

    assert main(["run", "model.py", "--ranks", "0"]) == 2  # usage error, argument named (common practice)
    assert "--ranks" in capsys.readouterr().err


@pytest.mark.slow
def test_command_line_ranks_match_one_process(tmp_path):
    import arviz as az

    one, two = _cli(tmp_path, "--out", "one.nc"), _cli(tmp_path, "--out", "two.nc", "--ranks", "2")
    assert one.returncode == 0 and two.returncode == 0, two.stderr[-2000:]
    assert "on 2 ranks" in two.stdout and two.stdout.count("wrote two.nc") == 1  # rank 0 prints and writes
    a, b = az.from_netcdf(tmp_path / "one.nc"), az.from_netcdf(tmp_path / "two.nc")
    assert relative_difference(b.posterior["x"].values, a.posterior["x"].values) < RELATIVE
    assert int(b.posterior.attrs["ranks"]) == 2


@pytest.mark.slow
def test_command_line_names_a_killed_worker_in_one_line(tmp_path):
    done = _cli(tmp_path, "--out", "bad.nc", "--ranks", "2", KILL_RANK_1="1")
    assert done.returncode == 1
    last = done.stderr.strip().splitlines()[-1]
    assert last.startswith("stein-torch: WorkersFailed: rank 1 of 2 was killed by SIGKILL"), done.stderr[-2000:]
    assert not (tmp_path / "bad.nc").exists()


@pytest.mark.slow
def test_bench_distributed_quick_prints_every_row(capsys):
    from stein_torch.benchmarks.distributed import main

    assert main(["--quick"]) == 0
    out = capsys.readouterr().out
    for tag in ("(a)", "(b)", "(c)", "(d)", "(e)"):
        assert tag in out
    assert "projection" in out and "64" in out

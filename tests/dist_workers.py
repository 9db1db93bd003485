"""Process groups for the distributed tests: real gloo groups on 127.0.0.1, started with
torch.multiprocessing (spawn); nothing mocks a collective.

:func:`spawn` starts ``world`` processes that join a process group the way a user's script does
(``init_process_group`` over TCP on 127.0.0.1) and run a worker function of this module; it returns
what each rank returned or raised. The targets and workers below are shared by the parent (which runs
the single-process reference) and the ranks.
"""

from __future__ import annotations

import math
import os
import queue as queue_module
import signal
import socket
import time
import traceback

import numpy as np
import torch

import stein_torch as st

# ---------------------------------------------------------------------------------------------- targets
NOISE = 0.5
PRIOR_SD = 1.0


def regression_data(n_obs: int = 240, d: int = 3):
    """Invented data: a linear model with known noise (the conjugate Gaussian case)."""
    g = torch.Generator().manual_seed(11)
    x = torch.randn(n_obs, d, generator=g, dtype=torch.float64)
    w = torch.linspace(1.0, -0.5, d, dtype=torch.float64)
    y = x @ w + NOISE * torch.randn(n_obs, generator=g, dtype=torch.float64)
    return x, y


def regression_target(n_obs: int = 240, d: int = 3, batch_size: int | None = None) -> st.Target:
    """Bayesian linear regression: w ~ N(0, PRIOR_SD^2 I), y | w ~ N(x w, NOISE^2), per-observation terms."""
    x, y = regression_data(n_obs, d)

    def log_prior(p):
        return -0.5 * (p["w"] ** 2).sum(-1) / PRIOR_SD**2

    def log_likelihood(p, data):
        mean = p["w"] @ data["x"].T
        return -0.5 * ((data["y"] - mean) / NOISE) ** 2 - math.log(NOISE * math.sqrt(2 * math.pi))

    return st.Target(log_prior, latents={"w": st.Latent((d,))}, log_likelihood=log_likelihood,
                     data={"x": x, "y": y}, observed="y", batch_size=batch_size)


def regression_target_distribution(n_obs: int = 240, d: int = 3) -> st.Target:
    """The same model with the likelihood given as a torch Distribution over data["y"]."""
    x, y = regression_data(n_obs, d)

    def log_prior(p):
        return -0.5 * (p["w"] ** 2).sum(-1) / PRIOR_SD**2

    def likelihood(p, data):
        return torch.distributions.Normal(p["w"] @ data["x"].T, NOISE)

    return st.Target(log_prior, latents={"w": st.Latent((d,))}, log_likelihood=likelihood,
                     data={"x": x, "y": y}, observed="y")


def regression_posterior(n_obs: int = 240, d: int = 3):
    """Closed-form posterior of :func:`regression_target` (conjugate Gaussian): mean and covariance."""
    x, y = regression_data(n_obs, d)
    precision = x.T @ x / NOISE**2 + torch.eye(d, dtype=torch.float64) / PRIOR_SD**2
    cov = torch.linalg.inv(precision)
    return cov @ (x.T @ y) / NOISE**2, cov


def gaussian_target(d: int = 2) -> st.Target:
    """A correlated Gaussian without data."""
    a = torch.tensor([[1.0, 0.6], [0.6, 2.0]], dtype=torch.float64)[:d, :d]
    precision = torch.linalg.inv(a)
    return st.Target(lambda x: -0.5 * ((x @ precision) * x).sum(-1), dim=d)


HOLE = 1.2  # the log density is NaN where x[0] > HOLE


def holed_target() -> st.Target:
    """A normal centred at (2, 0) whose log density is NaN beyond x[0] = HOLE (a model bug region)."""

    def log_prob(x):
        lp = -0.5 * ((x[..., 0] - 2) ** 2 + x[..., 1] ** 2)
        return torch.where(x[..., 0] > HOLE, torch.full_like(lp, float("nan")), lp)

    return st.Target(log_prob, dim=2)


def holed_start(n: int) -> torch.Tensor:
    """Starting points: the first half around (-2, 0), too far to reach the hole in the case's 8 steps;
    the second half (the last rank's rows on 2 ranks) just below the hole, drawn into it at once."""
    g = torch.Generator().manual_seed(5)
    start = 0.3 * torch.randn(n, 2, generator=g, dtype=torch.float64)
    start[: n // 2, 0] -= 2.0
    start[n // 2 :, 0] = HOLE - 0.05 + 0.02 * torch.rand(n - n // 2, generator=g, dtype=torch.float64)
    return start


CASES = {
    # name: (target factory, svgd keyword arguments)
    "particles": (lambda: gaussian_target(), dict(particles=41, steps=40, seed=3, ensembles=2, distributed="particles")),
    "particles_regression": (lambda: regression_target(), dict(particles=30, steps=30, seed=1, distributed=True)),
    "data": (lambda: regression_target(), dict(particles=30, steps=30, seed=1, distributed="data")),
    "data_minibatch": (lambda: regression_target(batch_size=64),
                       dict(particles=30, steps=30, seed=2, ensembles=2, distributed="data")),
    "data_distribution": (lambda: regression_target_distribution(), dict(particles=30, steps=20, seed=5,
                                                                         distributed="data")),
    "nan_one_rank": (holed_target, dict(particles=40, steps=8, seed=0, precondition=None,
                                        init=holed_start(40), stop=False, distributed="particles")),
}


CASES_EXTRA = {
    "particles_noseed": (lambda: gaussian_target(), dict(particles=41, steps=10, distributed="particles")),
}


def case_run(name: str, single: bool = False):
    """Run case ``name``; single=True: one process (the reference), else distributed as listed."""
    make, options = {**CASES, **CASES_EXTRA}[name]
    options = dict(options, progress=False)
    if single:
        options.pop("distributed")
    return st.svgd(make(), **options)


def summary(run, pointwise: bool = False) -> dict:
    """What the tests compare, as numpy arrays. The pointwise log-likelihood is included when the
    run gathered it (rank 0 of a data-sharded run) or, with ``pointwise``, computed here."""
    out = {f"draw_{k}": v.numpy() for k, v in run.draws.items()}
    out["lp"] = run.lp.numpy()
    out.update({f"history_{k}": np.asarray(v, dtype=float) for k, v in run.history.items()})
    out["stop_reason"] = run.stop_reason
    if run._likelihood is not None:
        out["log_likelihood"] = next(iter(run._likelihood["groups"]["log_likelihood"].values()))
    elif pointwise and run.target.data is not None:
        from stein_torch.model.data import pointwise_log_likelihood

        out["log_likelihood"] = pointwise_log_likelihood(run.target, run.particles)
    return out


# ---------------------------------------------------------------------------------------------- workers
def work_cases(rank: int, world: int, names: list[str], accuracy: bool = False) -> dict:
    out = {name: summary(case_run(name)) for name in names}
    if accuracy:  # the closed-form check: default settings, 200 particles, data sharding
        run = st.svgd(regression_target(), particles=200, seed=0, distributed="data", progress=False)
        out["accuracy"] = run.draws["w"].numpy()
    return out


def work_mismatch(rank: int, world: int):
    st.svgd(gaussian_target(), particles=20 + rank, steps=2, seed=0, distributed=True, progress=False)


def work_interrupt(rank: int, world: int):
    """Rank 1 gets a SIGINT (as from Ctrl-C) in its 10th step; returns (stop_reason, steps)."""

    class Signalling(st.steppers.GradientStep):
        calls = 0

        def step(self, u, phi, velocity):
            Signalling.calls += 1
            if Signalling.calls == 10 and rank == 1:
                os.kill(os.getpid(), signal.SIGINT)
            return super().step(u, phi, velocity)

        def __repr__(self):
            return "Signalling()"

    run = st.svgd(gaussian_target(), particles=30, steps=40, seed=0, stop=False, stepper=Signalling(0.1),
                  distributed=True, progress=False)
    return run.stop_reason, int(run.settings["steps"])


def work_checkpoint(rank: int, world: int, checkpoint: str, steps: int, resume: str | None):
    """Case "particles" with checkpoints every 3 steps, counting this rank's checkpoint writes."""
    import stein_torch.io as st_io

    writes = {"n": 0}
    original = st_io.save_checkpoint

    def counting(path, state):
        writes["n"] += 1
        return original(path, state)

    st_io.save_checkpoint = counting
    try:
        make, options = CASES["particles"]
        run = st.svgd(make(), **dict(options, steps=steps, stop=False, progress=False), checkpoint=checkpoint,
                      checkpoint_every=3, resume=resume)
    finally:
        st_io.save_checkpoint = original
    return {"writes": writes["n"], "summary": summary(run)}


class FailingStep(st.steppers.GradientStep):
    """Gradient steps, except that rank ``rank`` fails in step ``at`` in the way ``how`` says."""

    def __init__(self, how: str, at: int, rank: int, clock_file: str | None = None):
        super().__init__(0.1, max_move=0.3)
        self.how, self.at, self.rank, self.calls, self.clock_file = how, at, rank, 0, clock_file

    def step(self, u, phi, velocity):
        self.calls += 1
        if self.calls == self.at and int(os.environ.get("STEIN_TEST_RANK", -1)) == self.rank:
            if self.clock_file:  # when the failure happened (wall clock of this machine)
                with open(self.clock_file, "w") as f:
                    f.write(repr(time.time()))
            if self.how == "raise":
                raise OSError("disk quota exceeded while writing scratch data")
            if self.how == "kill":
                os.kill(os.getpid(), signal.SIGKILL)
            if self.how == "hang":
                time.sleep(20)
        return super().step(u, phi, velocity)

    def __repr__(self):
        return "FailingStep()"


def work_failure(rank: int, world: int, how: str, at: int, checkpoint: str, timeout: float):
    target = gaussian_target()
    clock = os.path.join(os.path.dirname(checkpoint), "failed_at")
    try:
        st.svgd(target, particles=30, steps=50, seed=4, stop=False, precondition=None, progress=False,
                stepper=FailingStep(how, at, world - 1, clock), checkpoint=checkpoint, checkpoint_every=3,
                distributed=st.Sharding("particles", timeout=timeout))
    except st.RankFailure as err:
        stopped = time.time()
        with open(clock) as f:
            failed = float(f.read())
        return {"error": str(err), "kind": "RankFailure", "seconds": stopped - failed}
    return {"error": None}


# ---------------------------------------------------------------------------------------------- spawn
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _entry(rank: int, world: int, port: int, worker: str, args: tuple, results) -> None:
    os.environ["STEIN_TEST_RANK"] = str(rank)
    torch.set_num_threads(1)
    import torch.distributed as dist

    try:
        dist.init_process_group("gloo", init_method=f"tcp://127.0.0.1:{port}", rank=rank, world_size=world)
        out = globals()[worker](rank, world, *args)
        results.put((rank, "ok", out))
    except BaseException as err:  # noqa: BLE001 - reported to the parent
        results.put((rank, "raised", f"{type(err).__name__}: {err}", traceback.format_exc()))
    finally:
        if dist.is_initialized():
            dist.destroy_process_group()


def spawn(worker: str, world: int, *args, timeout: float = 300.0) -> dict:
    """Run ``worker(rank, world, *args)`` on ``world`` fresh processes sharing a gloo group on
    127.0.0.1. Returns rank -> ("ok", value) or ("raised", message, traceback), plus "exitcodes".
    A rank that neither reports nor exits within ``timeout`` seconds is killed and shows as missing."""
    ctx = torch.multiprocessing.get_context("spawn")
    results = ctx.Queue()
    port = free_port()
    env = {"GLOO_SOCKET_IFNAME": "lo", "OMP_NUM_THREADS": "1"}
    saved = {k: os.environ.get(k) for k in env}
    os.environ.update(env)
    try:
        procs = [ctx.Process(target=_entry, args=(r, world, port, worker, args, results)) for r in range(world)]
        for p in procs:
            p.start()
    finally:
        for k, v in saved.items():
            os.environ.pop(k) if v is None else os.environ.__setitem__(k, v)
    out: dict = {}
    deadline = time.monotonic() + timeout
    while len(out) < world and time.monotonic() < deadline:
        try:
            item = results.get(timeout=0.5)
            out[item[0]] = item[1:]
        except queue_module.Empty:
            if all(not p.is_alive() for p in procs) and results.empty():
                break
    for p in procs:
        p.join(max(0.1, deadline - time.monotonic()))
        if p.is_alive():
            p.kill()
            p.join()
    out["exitcodes"] = [p.exitcode for p in procs]
    return out

"""Core speed and memory figures: ``stein-torch bench core [--quick]``.

Rows printed, all measured in one run (medians of interleaved repeats after warm-up):

(a), (b) time of one SVGD direction (:func:`stein_torch.svgd_direction`, float32; kernels
    ``RBF() + Linear()``, plain ``RBF()`` and the default ``IMQ() + Linear(radius=2.0)``,
    median-heuristic bandwidth included) divided by the
    time of the bare batched matmuls the direction cannot avoid, X X^T of shape (N, d) x (d, N)
    and K [S, X] of shape (N, N) x (N, 2d) (timed in the faster layout, (S, X)^T K^T). The
    directions keep their pairwise buffers between calls (:class:`stein_torch.stein.Scratch`), as a
    sampler does. Floor 3.0, aim 1.5.
(c) peak resident memory of one full SVGD step (:meth:`stein_torch.Sampler.step`, float64) at
    N = 50,000, d = 10, in a fresh subprocess: the kernel's high-water mark (VmHWM) is reset just
    before the step (``/proc/self/clear_refs``), so the figure is the process's peak during the step
    itself (torch and Python included). Floor 3 GB.
(d) one full default ``Sampler.step`` (scores by batched autograd, ``IMQ() + Linear(radius=2)``
    with the median heuristic, gradient step with a move cap, fault checks, a KSD check every
    10 steps) against a naive step that calls autograd once per particle and builds the RBF
    direction with a Python loop over particles (N = 256, d = 20, Bayesian logistic regression on
    invented data). The naive step does less work (no linear kernel, no checks). Medians of 31
    interleaved repeats: the ratio moves by about +-10% between runs on a shared machine. Floor 20x.
(e) a default ``st.svgd`` run of the README's quickstart model against the same run with one torch
    thread set by the caller, each in a fresh subprocess while another process keeps a core busy
    (:mod:`stein_torch.benchmarks.threads`); also the run with torch's default thread count, what a run
    used before the sampler chose its threads. Medians of interleaved repeats. Bound 1.2x.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import statistics
import subprocess
import sys
import time
from typing import Callable

import torch

import stein_torch as st
from stein_torch.kernels import IMQ, RBF, Linear
from stein_torch.stein import Scratch, svgd_direction

__all__ = ["main", "build_parser"]

FULL = {"directions": [(4096, 64), (1024, 16)], "memory": (50_000, 10), "loop": (256, 20), "repeats": 15,
        "threads": (150, 3)}
QUICK = {"directions": [(256, 8), (64, 4)], "memory": (2_000, 10), "loop": (32, 4), "repeats": 3, "threads": (5, 1)}
BOUNDS = {"direction": 3.0, "memory_gb": 3.0, "loop": 20.0, "threads": 1.2}


def _interleaved_medians(
    functions: list[Callable[[], object]], repeats: int, warmup: int = 2
) -> tuple[list[float], list[float]]:
    """Median wall time and median process CPU time (all threads) of each function, timed in turn
    so that changes in machine load hit all of them alike."""
    for _ in range(warmup):
        for f in functions:
            f()
    wall = [[] for _ in functions]
    cpu = [[] for _ in functions]
    for _ in range(repeats):
        for f, w, c in zip(functions, wall, cpu):
            c0, w0 = time.process_time(), time.perf_counter()
            f()
            w.append(time.perf_counter() - w0)
            c.append(time.process_time() - c0)
    return [statistics.median(t) for t in wall], [statistics.median(t) for t in cpu]


# --------------------------------------------------------------------------------- (a), (b) direction
def direction_ratios(n: int, d: int, repeats: int) -> dict[str, float]:
    """Seconds of one direction per kernel and of the bare matmuls, and their ratios."""
    g = torch.Generator().manual_seed(0)
    x = torch.randn(1, n, d, generator=g, dtype=torch.float32)
    score = -x + 0.1 * torch.randn(1, n, d, generator=g, dtype=torch.float32)
    gram = torch.rand(1, n, n, generator=g, dtype=torch.float32)
    score_x = torch.cat([score, x], -1)  # (1, N, 2d)
    score_x_t = score_x.transpose(1, 2).contiguous()
    x_t = x.transpose(1, 2).contiguous()
    kernels = {"RBF()+Linear()": RBF() + Linear(), "RBF()": RBF(), "IMQ()+Linear(2) default": IMQ() + Linear(radius=2.0)}
    scratch = {name: Scratch() for name in kernels}  # as in a sampler: pairwise buffers kept between steps

    def bare():  # K [S, X] as the engine takes it, (S, X)^T K^T: the faster layout (see DEVELOPERS.md)
        torch.bmm(x, x_t)
        torch.bmm(score_x_t, gram.transpose(1, 2))

    calls = [bare] + [lambda k=k, name=name: svgd_direction(x, score, k, scratch=scratch[name])
                      for name, k in kernels.items()]
    with torch.no_grad():
        wall, cpu = _interleaved_medians(calls, repeats)
    out = {"bare": wall[0]}
    for name, w, c in zip(kernels, wall[1:], cpu[1:]):
        out[name] = w
        out[name + " ratio"] = w / wall[0]
        out[name + " cpu ratio"] = c / cpu[0]
    return out


# ----------------------------------------------------------------------------------------- (c) memory
def _rss_kib(field: str) -> int | None:
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith(field + ":"):
                    return int(line.split()[1])
    except OSError:
        pass
    return None


def _memory_child(n: int, d: int) -> dict:
    """Runs in the subprocess: set up a sampler, reset the high-water mark, take one step."""
    torch.manual_seed(0)
    a = torch.randn(d, d, dtype=torch.float64) / math.sqrt(d)
    precision = a @ a.T + 0.5 * torch.eye(d, dtype=torch.float64)
    target = st.Target(lambda x: -0.5 * ((x @ precision) * x).sum(-1), dim=d)
    sampler = st.Sampler(target, n, seed=0)
    sampler.step()  # first step allocates optimizer state; measure a steady-state step
    before = _rss_kib("VmRSS")
    reset = False
    try:
        with open("/proc/self/clear_refs", "w") as refs:
            refs.write("5")  # reset VmHWM to the current RSS (Linux >= 4.0)
        reset = True
    except OSError:
        pass
    sampler.step()
    peak = _rss_kib("VmHWM") if reset else None
    if peak is None:  # no reset possible: the process-lifetime peak (an over-estimate)
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"rss_before_kib": before, "peak_kib": peak, "hwm_reset": reset}


def step_memory(n: int, d: int) -> dict:
    """Peak memory of one SVGD step in a fresh interpreter (see module docstring)."""
    command = [sys.executable, "-m", "stein_torch.benchmarks.core", "--memory-child", str(n), str(d)]
    command += ["--threads", str(torch.get_num_threads())]
    done = subprocess.run(command, capture_output=True, text=True, timeout=900, env=os.environ.copy())
    if done.returncode != 0:
        tail = (done.stderr.strip().splitlines() or ["no output"])[-1]
        raise RuntimeError(f"memory subprocess failed: {tail}")
    return json.loads(done.stdout.strip().splitlines()[-1])


# ------------------------------------------------------------------------------------ (d) naive loop
def _logistic_model(n_obs: int, d: int):
    """Bayesian logistic regression on invented data: returns the batched log density."""
    g = torch.Generator().manual_seed(3)
    features = torch.randn(n_obs, d, generator=g, dtype=torch.float64)
    truth = torch.randn(d, generator=g, dtype=torch.float64) / math.sqrt(d)
    labels = torch.bernoulli(torch.sigmoid(features @ truth), generator=g)

    def log_prob(w):  # (..., d) -> (...)
        logits = w @ features.T
        log_lik = (labels * logits - torch.nn.functional.softplus(logits)).sum(-1)
        return log_lik - 0.5 * (w * w).sum(-1)

    return log_prob


def naive_direction(x: torch.Tensor, log_prob, h: float | None = None) -> torch.Tensor:
    """RBF SVGD direction with one autograd call per particle and a loop over particles.

    x : (N, d); returns (N, d). Bandwidth: median heuristic unless ``h`` is given.
    """
    n = x.shape[0]
    scores = []
    for i in range(n):
        xi = x[i].detach().clone().requires_grad_(True)
        (grad,) = torch.autograd.grad(log_prob(xi), xi)
        scores.append(grad)
    score = torch.stack(scores)
    if h is None:
        i, j = torch.triu_indices(n, n, offset=1)
        h = float(((x[i] - x[j]) ** 2).sum(-1).median()) / math.log(n + 1)
    phi = torch.empty_like(x)
    for i in range(n):
        diff = x - x[i]  # x_j - x_i
        k = torch.exp(-(diff * diff).sum(-1) / h)  # (N,)
        phi[i] = (k @ score - (2 / h) * (k[:, None] * diff).sum(0)) / n
    return phi


def loop_speedup(n: int, d: int, repeats: int) -> dict:
    log_prob = _logistic_model(4 * max(d, 25), d)
    target = st.Target(log_prob, dim=d)
    sampler = st.Sampler(target, n, seed=0)
    x = sampler.affine.to_z(sampler.u)[0].detach().clone()

    # the naive direction is the real one: compare with the batched engine at a fixed bandwidth
    _, score = target.log_prob_and_score(x)
    h = 1.7
    reference = svgd_direction(x[None], score[None], RBF(bandwidth=h))[0]
    agreement = float((naive_direction(x, log_prob, h) - reference).abs().max() / reference.abs().max())

    state = {"x": x}

    def naive_step():
        state["x"] = state["x"] + 0.01 * naive_direction(state["x"], log_prob)

    wall, cpu = _interleaved_medians([sampler.step, naive_step], 2 * repeats + 1, warmup=1)
    return {
        "step": wall[0], "naive": wall[1], "speedup": wall[1] / wall[0], "cpu speedup": cpu[1] / cpu[0],
        "agreement": agreement,
    }


# ---------------------------------------------------------------------------------------------- main
def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="stein-torch bench core",
        description="SVGD direction against the bare matmuls, peak memory of a step, against a per-particle loop")
    parser.add_argument("--quick", action="store_true", help="small sizes (for tests; figures not meaningful)")
    parser.add_argument("--memory-child", nargs=2, type=int, metavar=("N", "D"), help=argparse.SUPPRESS)
    parser.add_argument("--threads", type=int, help=argparse.SUPPRESS)
    return parser


def main(args: list[str]) -> int:
    """Print the core table; return 1 if a figure misses its bound."""
    opts = build_parser().parse_args(args)
    if opts.threads:
        torch.set_num_threads(opts.threads)
    if opts.memory_child:
        print(json.dumps(_memory_child(*opts.memory_child)))
        return 0
    sizes = QUICK if opts.quick else FULL
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    cores = os.cpu_count() or 1
    print(
        f"stein_torch {st.__version__}, torch {torch.__version__}, {torch.get_num_threads()} torch threads, "
        f"{cores} cores, load average {load:.1f}"
        + ("  [--quick: small sizes, figures not meaningful]" if opts.quick else "")
    )
    if load > cores:
        print("note: the machine is busy; wall-clock ratios are inflated by waiting, CPU-time ratios are steadier")
    print(f"{'figure':<52} {'wall':>8} {'cpu':>8} {'bound':>7}  status")
    failures = 0

    def row(label, wall, cpu, bound, unit="x", lower_is_better=True):
        nonlocal failures
        ok = wall <= bound if lower_is_better else wall >= bound
        failures += 0 if ok or opts.quick else 1
        cpu_text = f"{cpu:>7.2f}{unit}" if cpu == cpu else f"{'-':>8}"
        print(f"{label:<52} {wall:>7.2f}{unit} {cpu_text} {bound:>6.1f}{unit}  {'ok' if ok else 'MISSED'}", flush=True)

    for tag, (n, d) in zip("ab", sizes["directions"]):
        r = direction_ratios(n, d, sizes["repeats"])
        names = ("RBF()+Linear()", "RBF()", "IMQ()+Linear(2) default")
        for kernel in names:
            label = f"({tag}) direction / matmuls, {kernel} N={n} d={d}"
            row(label, r[kernel + " ratio"], r[kernel + " cpu ratio"], BOUNDS["direction"])
        seconds = ", ".join(f"{k} {r[k]:.4f}" for k in names)
        print(f"    median seconds: matmuls {r['bare']:.4f}, {seconds}")

    n, d = sizes["memory"]
    m = step_memory(n, d)
    row(f"(c) peak RSS of one step N={n} d={d}, GB", m["peak_kib"] / 2**20, float("nan"), BOUNDS["memory_gb"], unit="")
    extra = (m["peak_kib"] - m["rss_before_kib"]) / 2**10 if m["hwm_reset"] and m["rss_before_kib"] else float("nan")
    how = "high-water mark reset just before the step" if m["hwm_reset"] else "process lifetime peak"
    print(f"    RSS before the step {m['rss_before_kib'] / 2**10:.0f} MiB, the step adds {extra:.0f} MiB ({how})")

    n, d = sizes["loop"]
    s = loop_speedup(n, d, sizes["repeats"])
    row(f"(d) naive loop / sample step, N={n} d={d}", s["speedup"], s["cpu speedup"], BOUNDS["loop"], lower_is_better=False)
    print(
        f"    median seconds per step: stein_torch {s['step']:.4f}, naive loop {s['naive']:.4f}; "
        f"naive direction matches the engine to {s['agreement']:.1e} (relative)"
    )

    from .threads import thread_ratios

    steps, repeats = sizes["threads"]
    t = thread_ratios(steps, repeats)
    row("(e) default threads / one thread, quickstart, 1 busy", t["default_over_one"], float("nan"), BOUNDS["threads"])
    sec = t["seconds"]
    print(
        f"    median seconds: default {sec['default']:.2f} ({t['default_threads']} thread(s) chosen), one thread "
        f"{sec['one']:.2f}, torch's {t['torch_threads']} threads {sec['torch']:.2f} ({t['torch_over_one']:.2f}x)"
    )
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))

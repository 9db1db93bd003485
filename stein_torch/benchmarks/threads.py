"""Torch threads of a default run against one thread, with another busy process: row (e) of
``stein-torch bench core``.

Each timing runs in a fresh subprocess (torch's thread pool is per process) on the README's
quickstart model (9 coordinates, 200 particles, a fixed number of steps with the stop rule off, so
every run does the same work) while one other process keeps a core busy, as on a shared machine:

- ``default``: ``st.svgd(target, ...)`` with torch's threads as the process starts (the sampler then
  chooses them, :mod:`stein_torch.samplers.threads`);
- ``one``: the caller sets ``torch.set_num_threads(1)`` first;
- ``torch``: the sampler is told to use torch's default thread count (``threads=``), which is what a
  run did before it chose its threads.

Repeats are interleaved (default, one, torch, default, ...) and the medians compared within one run.
"""

from __future__ import annotations

import json
import os
import statistics
import subprocess
import sys

__all__ = ["thread_ratios"]

WORKER = r'''
import json, sys, time, torch
mode, steps = sys.argv[1], int(sys.argv[2])
torch_default = torch.get_num_threads()
if mode == "one":
    torch.set_num_threads(1)
import stein_torch as st
from torch.distributions import HalfNormal, Normal
g = torch.Generator().manual_seed(1)
charger = torch.arange(6).repeat_interleave(5)
hours = (2.5 + 0.3 * torch.randn(6, generator=g)[charger] + 0.2 * torch.randn(30, generator=g)).double()
def log_likelihood(p):
    mean = p["mu"][..., None] + p["tau"][..., None] * p["offset"][..., charger]
    return Normal(mean, p["sigma"][..., None]).log_prob(hours).sum(-1)
target = st.Target.from_priors({"mu": Normal(2.0, 1.0), "tau": HalfNormal(1.0), "sigma": HalfNormal(1.0),
                                "offset": Normal(torch.zeros(6), 1.0)}, log_likelihood=log_likelihood)
threads = torch_default if mode == "torch" else None
run = lambda n: st.svgd(target, particles=200, steps=n, seed=0, stop=False, progress=False, threads=threads)
run(2)  # warm-up
t0 = time.perf_counter()
result = run(steps)
print(json.dumps({"seconds": time.perf_counter() - t0, "threads": result.settings["threads"],
                  "torch_default": torch_default}))
'''


def _time(mode: str, steps: int) -> dict:
    out = subprocess.run([sys.executable, "-c", WORKER, mode, str(steps)], capture_output=True, text=True, check=True,
                         env={k: v for k, v in os.environ.items() if k not in ("OMP_NUM_THREADS", "MKL_NUM_THREADS")})
    return json.loads(out.stdout.strip().splitlines()[-1])


def thread_ratios(steps: int = 150, repeats: int = 3, busy: bool = True) -> dict:
    """Median seconds of the three modes and their ratios to ``one``; with ``busy`` another process
    spins on one core throughout."""
    spinner = subprocess.Popen([sys.executable, "-c", "while True: pass"]) if busy else None
    try:
        times = {"default": [], "one": [], "torch": []}
        info = {}
        for _ in range(repeats):
            for mode in times:
                row = _time(mode, steps)
                times[mode].append(row["seconds"])
                info[mode] = row
    finally:
        if spinner is not None:
            spinner.kill()
            spinner.wait()
    med = {mode: statistics.median(t) for mode, t in times.items()}
    return {"seconds": med, "default_over_one": med["default"] / med["one"], "torch_over_one": med["torch"] / med["one"],
            "torch_threads": info["torch"]["torch_default"], "default_threads": info["default"]["threads"]}


if __name__ == "__main__":
    print(json.dumps(thread_ratios()))

"""Module-target score speed: ``stein-torch bench module [--quick]``.

One score evaluation (log density and its gradient for every particle) of a Bayesian network built by
:meth:`stein_torch.Target.from_module`: 50 particles of a one-hidden-layer network (10 inputs, 50 tanh
units, one output, Gaussian likelihood) on 10,000 invented observations.

- vmap: ``target.log_prob_and_score(z)`` for all particles at once (functional_call under vmap,
  one backward pass);
- loop: the same log density, one particle at a time in a Python loop (a call and a backward pass
  per particle), which is what a per-particle implementation does.

Two rows: the full data (10,000 observations per score, taken by both paths in chunks of the
observations, see :meth:`stein_torch.ObservedData.score_chunks`), and a minibatch of 100 of them
(``batch_size=100``, the stochastic score a large data set is sampled with). The figure is the
ratio of median times, timed interleaved so machine load hits both paths alike. Floor 5x on the
full-data row; the exit status is 1 when it is missed.

A third line bounds what any batching can gain on the full data: the loop's time on a single
observation is its per-particle overhead (Python, dispatch, autograd bookkeeping); the rest of its
full-data time is arithmetic that a batched path must do too. Batching removes at most the overhead,
so loop / (loop - overhead) is the ratio a batched path reaches if its arithmetic runs as fast per
element as the loop's. ``--quick`` takes fewer repeats.
"""

from __future__ import annotations

import argparse
import json
import statistics
import time

import torch
from torch import nn
from torch.distributions import Normal

import stein_torch as st

__all__ = ["main", "build_parser"]

PARTICLES, OBSERVATIONS, INPUTS, HIDDEN = 50, 10_000, 10, 50
BOUND = 5.0
MINIBATCH = 100


def build(seed: int = 0, batch_size: int | None = None):
    """The network target and a particle set z (PARTICLES, dim), float64."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(OBSERVATIONS, INPUTS, generator=g)
    y = torch.tanh(x[:, :3].sum(1)) + 0.3 * torch.randn(OBSERVATIONS, generator=g)
    net = nn.Sequential(nn.Linear(INPUTS, HIDDEN), nn.Tanh(), nn.Linear(HIDDEN, 1))
    target = st.Target.from_module(
        net, prior=Normal(0.0, 1.0), data=(x, y),
        likelihood=lambda out, targets: Normal(out[..., 0], 0.3).log_prob(targets), batch_size=batch_size,
    )
    z = 0.3 * torch.randn(PARTICLES, target.dim, generator=g, dtype=torch.float64)
    return target, z


def vmap_scores(target, z):
    return target.log_prob_and_score(z)


def loop_scores(target, z):
    """Per-particle scores: one forward and one backward per particle in a Python loop."""
    lps, scores = [], []
    for i in range(z.shape[0]):
        lp, score = target.log_prob_and_score(z[i : i + 1])
        lps.append(lp)
        scores.append(score)
    return torch.cat(lps), torch.cat(scores)


def measure(repeats: int, batch_size: int | None = None) -> dict:
    """Median times of both paths on one (mini)batch, and whether they agree."""
    target, z = build(batch_size=batch_size)
    target.data.start(torch.Generator().manual_seed(0))
    with target.data.next_batch():  # a fixed minibatch (no-op for the full data)
        lp_v, s_v = vmap_scores(target, z)
        lp_l, s_l = loop_scores(target, z)
        agree = bool(torch.allclose(lp_v, lp_l, rtol=1e-10) and torch.allclose(s_v, s_l, rtol=1e-8, atol=1e-8))
        times = {"vmap": [], "loop": []}
        for _ in range(repeats):
            for name, fn in (("vmap", vmap_scores), ("loop", loop_scores)):
                t0 = time.perf_counter()
                fn(target, z)
                times[name].append(time.perf_counter() - t0)
    vmap_s, loop_s = statistics.median(times["vmap"]), statistics.median(times["loop"])
    return {
        "particles": PARTICLES, "observations": OBSERVATIONS, "batch_size": batch_size, "parameters": target.dim,
        "vmap_s": vmap_s, "loop_s": loop_s, "ratio": loop_s / vmap_s, "agree": agree,
        "threads": torch.get_num_threads(),
    }


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="stein-torch bench module",
                                     description="nn.Module scores: vmap against a loop over particles")
    parser.add_argument("--quick", action="store_true", help="fewer repeats (same sizes; fails only if vmap and loop disagree)")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    return parser


def main(args: list[str] | None = None) -> int:
    """Print the table; return 0 when the ratio meets the bound and both paths agree, else 1."""
    options = build_parser().parse_args(args)
    repeats = 3 if options.quick else 11
    rows = [measure(repeats), measure(repeats, batch_size=MINIBATCH)]
    overhead = measure(repeats, batch_size=1)["loop_s"]  # the loop on one observation: overhead only
    ceiling = rows[0]["loop_s"] / max(rows[0]["loop_s"] - overhead, 1e-12)
    if options.json:
        print(json.dumps({"rows": rows, "bound": BOUND, "loop_overhead_s": overhead, "ceiling": ceiling}))
    else:
        print(f"module scores: {PARTICLES} particles x {rows[0]['parameters']} parameters, "
              f"{OBSERVATIONS} observations, {rows[0]['threads']} threads")
        print(f"  {'observations per score':<24}{'vmap ms':>10}{'loop ms':>10}{'ratio':>8}  agree")
        for row in rows:
            label = "all 10,000" if row["batch_size"] is None else f"minibatch {row['batch_size']}"
            print(f"  {label:<24}{1e3 * row['vmap_s']:10.1f}{1e3 * row['loop_s']:10.1f}{row['ratio']:7.1f}x  {row['agree']}")
        print(f"  bound {BOUND:.0f}x on the full-data row: {'met' if rows[0]['ratio'] >= BOUND else 'MISSED'}")
        print(f"  loop overhead (one observation per score) {1e3 * overhead:.1f} ms of the loop's "
              f"{1e3 * rows[0]['loop_s']:.1f} ms on the full data: removing all of it gives {ceiling:.2f}x")
    agree = all(r["agree"] for r in rows)
    if options.quick:  # few repeats on a shared machine: the ratio is not a measurement, agreement still is
        return 0 if agree else 1
    return 0 if rows[0]["ratio"] >= BOUND and agree else 1

if __name__ == "__main__":
    raise SystemExit(main())

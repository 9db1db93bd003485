"""Torch intra-op threads for the duration of a run, chosen for the run's problem size.

On a machine whose cores are shared (other jobs, other samplers), torch's intra-op threads spend
most of a small step waiting on each other: measured here (2 shared cores, torch 2.13 CPU), torch's
default threads made the README's quickstart (200 particles, 9 coordinates) 11.5 times slower than
one thread, and a 1,000-particle, 50-coordinate regression 2.9-7.5 times slower
(``stein-torch bench threads``; docs/benchmarks.md). Below :data:`PAIRWISE_WORK_FOR_THREADS`
multiply-adds of pairwise work per step, a run therefore uses one thread and gives the caller's
setting back afterwards; above it, the caller's setting is kept (large steps can use several cores).
``threads=`` of the sampler overrides the choice.
"""

from __future__ import annotations

import contextlib

import torch

from ..checks import check_int

__all__ = ["choose_threads", "run_threads", "PAIRWISE_WORK_FOR_THREADS"]

# ensembles x particles^2 x coordinates of one step above which several threads may pay off; no
# problem measured on 2 shared cores reached it with more than one thread being faster
PAIRWISE_WORK_FOR_THREADS = 4e9


def choose_threads(ensembles: int, particles: int, dim: int, requested: int | None = None) -> int | None:
    """Threads for a run: ``requested`` when given, 1 for steps below the pairwise-work bound, else
    None (keep the caller's setting)."""
    if requested is not None:
        return check_int(requested, "threads")
    work = float(ensembles) * float(particles) ** 2 * float(dim)
    return 1 if work < PAIRWISE_WORK_FOR_THREADS else None


@contextlib.contextmanager
def run_threads(threads: int | None):
    """Set torch's intra-op threads to ``threads`` inside the block (None: leave them), then restore."""
    if threads is None:
        yield
        return
    before = torch.get_num_threads()
    if before != threads:
        torch.set_num_threads(threads)
    try:
        yield
    finally:
        if torch.get_num_threads() != before:
            torch.set_num_threads(before)

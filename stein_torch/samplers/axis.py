"""The particle axis: which particles this process owns, and the two collectives that cross it.

Every reduction over the particles of an ensemble is computed either on the gathered particle set
(bandwidth, centring, standardiser, re-whitening: the same on every process) or as partial sums
over this process's rows that :meth:`ParticleAxis.sum` completes (kernel Stein discrepancy, fault
counts). In one process both collectives are the identity; a distributed backend
(:mod:`stein_torch.samplers.distributed`) replaces them with all-gathers and changes nothing else.
"""

from __future__ import annotations

import torch

__all__ = ["ParticleAxis"]


class ParticleAxis:
    """All N particles of each ensemble live in this process.

    Parameters
    ----------
    n : int
        Particles per ensemble.

    Attributes
    ----------
    rows : slice
        The particles this process evaluates and moves (here all of them).
    rank, world : int
        This process's index and the number of processes sharing the particles.
    """

    rank = 0
    world = 1

    def __init__(self, n: int):
        self.n = n
        self.rows = slice(0, n)

    def gather(self, local: torch.Tensor) -> torch.Tensor:
        """Rows of every process along the particle axis (dim 1): (B, rows, ...) -> (B, N, ...)."""
        return local

    def gather_many(self, *locals_: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """:meth:`gather` of several tensors (B, rows) or (B, rows, k) in one exchange."""
        return locals_

    def sum(self, partial: torch.Tensor) -> torch.Tensor:
        """Sum of a per-process partial result over the processes."""
        return partial

    def agree(self, requested: bool, particles: torch.Tensor) -> bool:
        """Whether any process asks to stop (e.g. Ctrl-C), so that all stop after the same step."""
        return bool(requested)

    def __repr__(self) -> str:
        return f"{type(self).__name__}(n={self.n})"

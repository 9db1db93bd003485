"""Data sharding: every rank scores all particles on its own slice of the observations.

The log density of a target with data is log prior + log-Jacobian + sum_i l_i over the observations
(:mod:`stein_torch.model.data`). Rank r evaluates the terms of observations ``lo_r .. hi_r - 1``
(contiguous blocks of about n_obs / R), rank 0 adds the prior and log-Jacobian, and
:class:`ShardedTarget` sums the parts of all ranks in rank order, so every rank sees the same log
density and score and takes the same step. With minibatches every rank draws the same seeded
minibatch of the whole data and scores the part of it that falls in its slice.
"""

from __future__ import annotations

import numpy as np
import torch

from ..model import Target
from ..model.data import likelihood_groups, pointwise_log_likelihood
from .comm import block_counts

__all__ = ["ShardedTarget", "observation_split", "gather_likelihood"]


def observation_split(n_obs: int, comm) -> tuple[int, int]:
    """Observations ``(lo, hi)`` of this rank: contiguous blocks, the first n_obs % R one larger."""
    counts = block_counts(n_obs, comm.world)
    lo = sum(counts[: comm.rank])
    return lo, lo + counts[comm.rank]


class ShardedTarget(Target):
    """A view of a target whose log density and score are summed over the ranks' observation slices.

    It shares every attribute of the user's target (latents, data, signature); only :meth:`log_prob`
    and :meth:`log_prob_and_score` differ. An evaluation that raises on some rank is reported on
    every rank (the rank's own error there, a RuntimeError naming it elsewhere) after the exchange, so
    all ranks stay in step and isolate the faulty points together.

    Parameters
    ----------
    target : Target
        The user's target, with ``target.data.shard`` set to this rank's slice.
    comm : Comm
    """

    def __init__(self, target: Target, comm):
        vars(self).update(vars(target))
        self.unsharded = target
        self.comm = comm

    def _summed(self, evaluate, z: torch.Tensor, with_score: bool):
        lead, d = z.shape[:-1], z.shape[-1]
        error = None
        try:
            parts = evaluate(z)
            parts = parts if isinstance(parts, tuple) else (parts,)
            flat = torch.cat([p.detach().reshape(-1).to(z.dtype) for p in parts])
        except Exception as err:  # noqa: BLE001 - reported on every rank below
            error = err
            flat = torch.zeros(lead.numel() * (1 + (d if with_score else 0)), dtype=z.dtype, device=z.device)
        flags = torch.zeros(self.comm.world, dtype=z.dtype, device=z.device)
        flags[self.comm.rank] = float(error is not None)
        total = self.comm.ordered_sum(torch.cat([flat, flags]))
        raised = [r for r in range(self.comm.world) if total[flat.numel() + r] != 0]
        if raised:
            if error is not None:
                raise error
            raise RuntimeError(f"the log density raised on rank {', '.join(map(str, raised))} (see its message there)")
        lp = total[: lead.numel()].reshape(lead)
        if not with_score:
            return lp
        return lp, total[lead.numel() : flat.numel()].reshape(*lead, d)

    def log_prob(self, z: torch.Tensor) -> torch.Tensor:
        """Log density (...) of z (..., dim) on the whole data: this rank's part plus the others'."""
        return self._summed(self.unsharded.log_prob, z, with_score=False)

    def log_prob_and_score(self, z: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Log density (...) and score (..., dim) on the whole data, summed over the ranks."""
        return self._summed(self.unsharded.log_prob_and_score, z, with_score=True)

    def __repr__(self) -> str:
        lo, hi = self.data.shard
        return f"ShardedTarget({self.unsharded!r}, observations {lo}..{hi - 1} on rank {self.comm.rank})"


def gather_likelihood(target: Target, particles: torch.Tensor, comm) -> dict | None:
    """The ``log_likelihood``, ``observed_data`` and ``constant_data`` groups on rank 0, with the
    pointwise terms of each rank's observations gathered there; None on the other ranks.

    Parameters
    ----------
    particles : Tensor of shape (B, N, dim)
        Unconstrained particles (the same on every rank).
    """
    data = target.data
    local = pointwise_log_likelihood(target, particles, observations=observation_split(data.n_obs, comm))
    full = comm.gather_last_to_lead(torch.from_numpy(np.ascontiguousarray(local)), block_counts(data.n_obs, comm.world))
    if full is None:
        return None
    return likelihood_groups(target, particles, values=full.numpy())

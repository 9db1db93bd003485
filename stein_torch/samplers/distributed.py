"""Sharded runs over torch.distributed: particles or observations shared between processes.

The same script runs on every process (``torchrun --standalone --nproc-per-node=R script.py``)::

    run = st.svgd(target, particles=4096, seed=0, distributed="particles")   # or "data"

:func:`sharding` sets a run up: it joins the script's process group (or starts one from torchrun's
environment when the script has none), opens the run's own group with the run's timeout
(:class:`~stein_torch.samplers.comm.Comm`), checks that every rank was given the same settings and
data, agrees on a seed, and hands the sampler what it needs:

- ``"particles"``: a :class:`DistributedAxis`. Each rank evaluates the scores of its own block of
  about N/R particles and the SVGD direction of those rows; the axis all-gathers log densities,
  scores, fault flags and directions, so every rank holds the full particle set and takes the same
  step, bandwidth, standardiser, re-whitening and stop decision as a single process would.
- ``"data"``: every rank holds all particles and scores them on its slice of the observations
  (:class:`~stein_torch.samplers.data_shards.ShardedTarget` sums the parts in rank order); the
  prior and log-Jacobian count on rank 0 only, minibatches come from the same seeded stream on every
  rank, and the ``log_likelihood`` group is gathered on rank 0 at the end.

Rank 0 writes checkpoints and shows progress; every rank returns the full :class:`Result` (rank 0's
also carries the gathered ``log_likelihood`` group of a data-sharded run).
"""

from __future__ import annotations

import atexit
import contextlib
import datetime
import hashlib
import os
import secrets
import warnings
from dataclasses import dataclass

import numpy as np
import torch
import torch.distributed as dist

from ..checks import check_choice, check_int, check_real
from .axis import ParticleAxis
from .comm import Comm, RankFailure, block_counts
from .data_shards import ShardedTarget, gather_likelihood, observation_split
from .state import plain_repr

__all__ = ["Sharding", "DistributedAxis", "Shard", "sharding", "as_sharding", "MODES", "DEFAULT_TIMEOUT"]

MODES = ("particles", "data")
DEFAULT_TIMEOUT = 600.0  # seconds an exchange waits for the slowest rank (a hung rank is named after it)
TORCHRUN_ENV = ("RANK", "WORLD_SIZE", "MASTER_ADDR", "MASTER_PORT")


class Sharding:
    """How a run is shared between the processes of a torch.distributed group.

    Parameters
    ----------
    mode : {"particles", "data"}, default="particles"
        "particles": each rank evaluates and moves about N/R particles. "data": each rank scores all
        particles on about n_obs/R observations (targets with ``data=``).
    timeout : float, default=600
        Seconds a rank waits at an exchange for the others. A rank that raises or dies is reported at
        once (within a few seconds); one that hangs is reported after ``timeout``.
    """

    def __init__(self, mode: str = "particles", *, timeout: float = DEFAULT_TIMEOUT):
        self.mode = check_choice(mode, "Sharding: mode", MODES)
        self.timeout = check_real(timeout, "Sharding: timeout", low=0, low_open=True)

    def __repr__(self) -> str:
        return f"Sharding({self.mode!r}, timeout={self.timeout:g})"


def as_sharding(value) -> Sharding | None:
    """``distributed=`` of :func:`stein_torch.svgd` as a :class:`Sharding` (None: one process)."""
    if value is None or value is False:
        return None
    if value is True:
        return Sharding("particles")
    if isinstance(value, Sharding):
        return value
    if isinstance(value, str) and value in MODES:
        return Sharding(value)
    raise ValueError(
        f"distributed must be None, False, True, 'particles', 'data' or st.Sharding(...); got {value!r}"
    )


class DistributedAxis(ParticleAxis):
    """The particle axis of a sharded run.

    Parameters
    ----------
    n : int
        Particles per ensemble.
    comm : Comm
    shard : bool
        True: this rank owns a contiguous block of rows and the collectives cross the ranks
        (particle sharding). False: every rank owns all rows (data sharding), gather and sum are
        the identity, and only :meth:`agree` crosses the ranks.
    """

    def __init__(self, n: int, comm: Comm, shard: bool = True):
        super().__init__(n)
        self.comm, self.shard = comm, shard
        self.rank, self.world = comm.rank, comm.world
        self.counts = block_counts(n, comm.world) if shard else [n]
        if shard:
            start = sum(self.counts[: comm.rank])
            self.rows = slice(start, start + self.counts[comm.rank])
        self._warned = False

    def gather(self, local: torch.Tensor) -> torch.Tensor:
        return self.comm.gather_rows(local, self.counts) if self.shard else local

    def gather_many(self, *locals_: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """Several tensors (B, rows) or (B, rows, k) packed into one exchange (bool and float64
        values survive the packing exactly)."""
        if not self.shard or self.world == 1:
            return locals_
        dtype = next(t.dtype for t in locals_ if t.is_floating_point())
        columns = [t.to(dtype).reshape(*t.shape[:2], -1) for t in locals_]
        packed = self.gather(torch.cat(columns, -1))
        out, start = [], 0
        for t, c in zip(locals_, columns):
            part = packed[..., start : start + c.shape[-1]].reshape(packed.shape[0], packed.shape[1], *t.shape[2:])
            out.append(part.to(t.dtype) if t.dtype == torch.bool else part.contiguous())
            start += c.shape[-1]
        return tuple(out)

    def sum(self, partial: torch.Tensor) -> torch.Tensor:
        return self.comm.ordered_sum(partial) if self.shard else partial

    def agree(self, requested: bool, particles: torch.Tensor) -> bool:
        """Whether any rank asks to stop (Ctrl-C), so that all stop after the same step; also checks
        that every rank still holds the same particles (their sums, bit for bit).

        Raises
        ------
        RuntimeError
            The ranks' particles differ by more than rounding (they would no longer exchange
            matching data). A difference in the last digits only warns once.
        """
        total = particles.detach().double().sum().reshape(1).cpu()
        rows = torch.stack(self.comm.gather(torch.cat([torch.tensor([float(requested)], dtype=torch.float64), total])))
        sums = rows[:, 1]
        bits = sums.view(torch.int64)  # bit for bit: NaN sums equal on every rank still agree
        if (bits != bits[0]).any():
            spread = float((sums - sums[0]).abs().max()) / max(1.0, float(sums.abs().max()))
            if not spread < 1e-6:
                raise RuntimeError(
                    f"the ranks hold different particles (relative difference {spread:.1e} in their sums): every "
                    "rank must run the same script with the same torch build and number of threads"
                )
            if not self._warned:
                warnings.warn(f"the ranks' particles differ in the last digits ({spread:.1e} relative): different "
                              "CPU types or thread counts per rank; results match one process only to rounding",
                              RuntimeWarning, stacklevel=2)
                self._warned = True
        return bool(rows[:, 0].any())

    def __repr__(self) -> str:
        what = f"rows={self.rows.start}:{self.rows.stop}" if self.shard else "all rows"
        return f"DistributedAxis(n={self.n}, rank={self.rank}, world={self.world}, {what})"


@dataclass
class Shard:
    """What a run needs to know about its share of the work.

    Attributes
    ----------
    target : Target
        The target this process evaluates (data sharding: a :class:`ShardedTarget`).
    seed : int or None
        The run's seed (agreed between ranks when none was given).
    axis : ParticleAxis or None
        None: one process.
    lead : bool
        This process writes files and shows progress (rank 0).
    mode : {"particles", "data"} or None
        None: one process.
    user_target : Target or None
        The target the user passed (what the :class:`Result` carries).
    comm : Comm or None
        The run's exchanges.
    """

    target: object
    seed: int | None
    axis: ParticleAxis | None = None
    lead: bool = True
    mode: str | None = None
    user_target: object = None
    comm: Comm | None = None

    def finish(self, result):
        """The run's :class:`Result` on this rank: the user's target, the sharding in its settings,
        and (data sharding, rank 0) the ``log_likelihood`` group gathered from every rank."""
        if self.mode is None:
            return result
        result.target = self.user_target
        result.settings.update({"distributed": self.mode, "ranks": self.comm.world})
        if self.mode == "data":
            groups = gather_likelihood(self.user_target, result.particles, self.comm)
            if groups is not None:
                result._likelihood = groups
        return result


# ---------------------------------------------------------------------------------------------- set-up
def join_process_group(backend: str) -> None:
    """Use the script's default process group, or start one from torchrun's environment."""
    if not dist.is_available():
        raise RuntimeError("distributed: this torch build has no torch.distributed")
    if dist.is_initialized():
        return
    missing = [k for k in TORCHRUN_ENV if k not in os.environ]
    if missing:
        raise RuntimeError(
            f"distributed: no process group is initialised and the torchrun environment is missing "
            f"({', '.join(missing)} not set); launch the script with `torchrun --nproc-per-node=R script.py` "
            "or call torch.distributed.init_process_group first"
        )
    dist.init_process_group(backend=backend, init_method="env://")
    atexit.register(_destroy_default_group)


def _destroy_default_group() -> None:
    with contextlib.suppress(Exception):
        if dist.is_initialized():
            dist.destroy_process_group()


def _default_store():
    try:
        from torch.distributed.distributed_c10d import _get_default_store

        return _get_default_store()
    except Exception:  # private API: without it failures are reported without naming the rank
        return None


def digest(value) -> int:
    """A 63-bit digest of a setting: tensors by their bytes, containers item by item, the rest by
    their repr without memory addresses."""
    h = hashlib.blake2b(digest_size=8)

    def feed(v):
        if isinstance(v, torch.Tensor):
            t = v.detach().cpu().contiguous()
            h.update(f"{t.dtype}{tuple(t.shape)}".encode())
            h.update(t.numpy().tobytes() if t.dtype != torch.bfloat16 else t.float().numpy().tobytes())
        elif isinstance(v, np.ndarray):
            feed(torch.from_numpy(np.ascontiguousarray(v)))
        elif isinstance(v, dict):
            for k in sorted(v, key=str):
                h.update(str(k).encode())
                feed(v[k])
        elif isinstance(v, (list, tuple)):
            for item in v:
                feed(item)
        else:
            h.update(plain_repr(v).encode())

    feed(value)
    return int.from_bytes(h.digest(), "little") & (2**63 - 1)


def _check_same_settings(names: list[str], rows: torch.Tensor) -> None:
    differing = [(name, r) for j, name in enumerate(names) for r in range(1, rows.shape[0]) if rows[r, j] != rows[0, j]]
    if differing:
        listed = ", ".join(f"{name} on rank {r}" for name, r in differing[:6])
        raise ValueError(
            f"distributed: the ranks were given different settings or data ({listed} differ from rank 0); "
            "every rank must run the same script with the same arguments and data"
        )


@contextlib.contextmanager
def sharding(distributed, target, *, particles: int, seed, resume, device, settings: dict):
    """Set up the share of this process in a run (see the module docstring); yields a :class:`Shard`.

    Parameters
    ----------
    distributed : None, bool, str or Sharding
        ``distributed=`` of :func:`stein_torch.svgd`; None or False: one process, nothing is set up.
    settings : dict
        The run's settings, compared between ranks before any work (by digest).
    """
    spec = as_sharding(distributed)
    if spec is None:
        yield Shard(target, seed)
        return
    check_int(particles, "particles")
    data = getattr(target, "data", None)
    if spec.mode == "data" and data is None:
        raise ValueError("distributed='data' needs a target with data= (observations to share); use 'particles'")
    on_cuda = device is not None and torch.device(device).type == "cuda"
    join_process_group("nccl" if on_cuda else "gloo")
    group = dist.new_group(backend="nccl" if on_cuda else "gloo", timeout=datetime.timedelta(seconds=spec.timeout))
    exchange_device = torch.device("cuda", torch.cuda.current_device()) if on_cuda else torch.device("cpu")
    comm = Comm(group, _default_store(), spec.timeout, exchange_device)
    try:
        checked = {**settings, "mode": spec.mode, "target": target.signature(),
                   "data": None if data is None else data.tensors}
        proposal = int(torch.seed() % 2**63) if seed is None and resume is None else -1
        rows = comm.handshake([digest(v) for v in checked.values()] + [proposal], secrets.randbits(62))
        _check_same_settings(list(checked), rows)
        if proposal >= 0:
            seed = int(rows[0, -2])  # rank 0's seed for everyone
        if particles < comm.world and spec.mode == "particles":
            raise ValueError(f"particles == {particles}: fewer particles than the {comm.world} ranks sharing them")
        shard = Shard(target, seed, lead=comm.rank == 0, mode=spec.mode, user_target=target, comm=comm)
        if spec.mode == "particles":
            shard.axis = DistributedAxis(particles, comm, shard=True)
        else:
            if data.n_obs < comm.world:
                raise ValueError(f"distributed='data': {data.n_obs} observations cannot be shared by {comm.world} ranks")
            data.shard, data.counts_prior = observation_split(data.n_obs, comm), comm.rank == 0
            shard.target = ShardedTarget(target, comm)
            shard.axis = DistributedAxis(particles, comm, shard=False)
        yield shard
    except BaseException as err:
        if not isinstance(err, RankFailure):
            comm.report(err)  # the others stop at their next exchange, naming this rank
        raise
    finally:
        if data is not None:
            data.shard, data.counts_prior = None, True
        comm.close()

"""Exchanges between the processes that share one run, and what happens when one of them fails.

Every exchange of a sharded run goes through :class:`Comm`: all-gathers (rows along the particle axis
with uneven counts, small vectors), sums of per-process partial results added in rank order (so every
process gets the same bits whatever the backend's reduction order), and a gather to rank 0. They run on
a process group of the run's own (gloo for CPU tensors, NCCL for CUDA tensors), created from the
script's default group with the run's timeout and closed at the end of the run.

Failures. A process that raises inside the run writes a one-line notice to the rendezvous store and
aborts the run's group, so the others, waiting in an exchange, fail at once; a process that dies closes
its sockets, with the same effect. A process whose exchange fails aborts the group too (the failure
then reaches every process) and asks the store what happened: a notice names the rank that raised, a
heartbeat counter that stopped moving names a rank that died, and otherwise the ranks that never
reached the exchange are named (hung, or slower than the timeout). It raises :class:`RankFailure`
with one line saying so.
"""

from __future__ import annotations

import re
import threading
import time

import torch
import torch.distributed as dist

__all__ = ["Comm", "RankFailure", "block_counts", "HEARTBEAT_SECONDS", "SILENT_SECONDS", "DIAGNOSE_SECONDS"]

HEARTBEAT_SECONDS = 0.5  # each process bumps its counter in the store this often during a run
SILENT_SECONDS = 2.5  # a process whose counter did not move for this long has died (or is frozen)
DIAGNOSE_SECONDS = 6.0  # longest wait for the store to tell which process stopped


def block_counts(n: int, world: int) -> list[int]:
    """Sizes of ``world`` contiguous blocks of n items (particles or observations), the first n % world
    one larger: the ``counts`` of :meth:`Comm.gather_rows` and :meth:`Comm.gather_last_to_lead`."""
    return [n // world + (1 if r < n % world else 0) for r in range(world)]


class RankFailure(RuntimeError):
    """Another process of a sharded run failed or stopped responding; the message names its rank."""


def _one_line(err: BaseException, limit: int = 300) -> str:
    text = " ".join(str(err).split()) or "(no message)"
    return f"{type(err).__name__}: {text[:limit]}"


def _backend_reason(err: BaseException) -> str:
    """The gist of a gloo/NCCL error: its first sentence, without the source location in brackets."""
    text = re.sub(r"^\[[^\]]*\]\s*", "", " ".join(str(err).split()))
    return text.split(". ")[0][:120] or type(err).__name__


class Comm:
    """The exchanges of one sharded run on its own process group.

    Parameters
    ----------
    group : ProcessGroup
        The run's group (all ranks of the default group).
    store : Store or None
        The rendezvous store of the default group (failure notices and heartbeats); None disables the
        naming of failed ranks.
    timeout : float
        Seconds an exchange waits for the slowest process before the run fails.
    device : torch.device, optional
        Where the backend exchanges tensors (CPU for gloo, the current CUDA device for NCCL); tensors
        elsewhere are copied there and back.

    Attributes
    ----------
    rank, world : int
    prefix : str
        Store keys of this run (set by :meth:`handshake`).
    broken : bool
        The group failed or was aborted; no exchange is attempted any more.
    """

    def __init__(self, group, store, timeout: float, device=None):
        self.group = group
        self.device = torch.device("cpu") if device is None else torch.device(device)
        self.store = store
        self.timeout = float(timeout)
        self.rank = dist.get_rank(group)
        self.world = dist.get_world_size(group)
        self.prefix = "stein_torch/setup"
        self.broken = False
        self._stop = threading.Event()
        self._heart: threading.Thread | None = None

    # ------------------------------------------------------------------ start and end
    def handshake(self, fields: list[int], token: int) -> torch.Tensor:
        """All-gather each rank's ``fields`` (int64 digests of its settings) plus rank 0's ``token``;
        names this run's store keys after rank 0's token and starts the heartbeat.

        Returns
        -------
        Tensor of shape (world, len(fields) + 1), int64: every rank's row, token last.
        """
        rows = torch.stack(self.gather(torch.tensor([*fields, token], dtype=torch.int64)))
        self.prefix = f"stein_torch/{int(rows[0, -1]) & 0xFFFFFFFFFFFF:012x}"
        if self.store is not None and self.world > 1:
            self._heart = threading.Thread(target=self._beat, name="stein_torch heartbeat", daemon=True)
            self._heart.start()
        return rows

    def _beat(self) -> None:
        key = self._key("beat", self.rank)
        while not self._stop.is_set():
            try:
                self.store.add(key, 1)
            except Exception:  # the store is gone: the failure shows in the next exchange
                return
            self._stop.wait(HEARTBEAT_SECONDS)

    def close(self) -> None:
        """Stop the heartbeat and release the group (aborting it first after a failure)."""
        self._stop.set()
        if self._heart is not None:
            self._heart.join(timeout=2 * HEARTBEAT_SECONDS)
        if self.group is None:
            return
        if self.broken:
            self._abort()
        try:  # also after an abort: a group left behind crashes the interpreter at exit
            dist.destroy_process_group(self.group)
        except Exception:
            pass
        # Drop the group now: a reference kept by a cycle (sampler, axis, this object) would free it
        # during interpreter shutdown, after the default group, which made gloo abort the process
        # ("terminate called without an active exception") in about 1 run in 10 here.
        self.group, self.broken = None, True

    def report(self, err: BaseException) -> None:
        """This process is leaving the run because of ``err``: tell the others (through the store)
        and abort the group so that their pending exchanges fail at once."""
        if self.broken or self.world == 1:
            self.broken = True
            return
        self.broken = True
        self._note("failed", _one_line(err))
        self._abort()

    # ------------------------------------------------------------------ exchanges
    def gather(self, tensor: torch.Tensor) -> list[torch.Tensor]:
        """Every rank's ``tensor`` (same shape and dtype on all ranks), in rank order."""
        if self.world == 1:
            return [tensor]
        boolean = tensor.dtype == torch.bool
        local = (tensor.to(torch.uint8) if boolean else tensor).to(self.device).contiguous()

        def exchange():
            out = [torch.empty_like(local) for _ in range(self.world)]
            dist.all_gather(out, local, group=self.group)
            return out

        out = [t.to(tensor.device) for t in self._exchange("an all-gather", exchange)]
        return [t.bool() for t in out] if boolean else out

    def gather_rows(self, local: torch.Tensor, counts: list[int]) -> torch.Tensor:
        """Rows of every rank along dim 1: (B, counts[rank], ...) -> (B, sum(counts), ...)."""
        if self.world == 1:
            return local
        width = max(counts)
        if local.shape[1] < width:
            pad = local.new_zeros((local.shape[0], width - local.shape[1], *local.shape[2:]))
            local = torch.cat([local, pad], 1)
        parts = self.gather(local)
        return torch.cat([p[:, :c] for p, c in zip(parts, counts)], 1)

    def ordered_sum(self, partial: torch.Tensor) -> torch.Tensor:
        """Sum over ranks of ``partial``, added in rank order (the same bits on every rank)."""
        parts = self.gather(partial)
        total = parts[0].clone()
        for part in parts[1:]:
            total += part
        return total

    def gather_last_to_lead(self, local: torch.Tensor, counts: list[int]) -> torch.Tensor | None:
        """Rank 0 receives every rank's ``local`` (..., counts[rank]) joined along the last axis;
        the other ranks get None."""
        if self.world == 1:
            return local
        width = max(counts)
        if local.shape[-1] < width:
            local = torch.cat([local, local.new_zeros((*local.shape[:-1], width - local.shape[-1]))], -1)
        home, local = local.device, local.to(self.device).contiguous()

        def exchange():
            out = [torch.empty_like(local) for _ in range(self.world)] if self.rank == 0 else None
            dist.gather(local, out, dst=dist.get_global_rank(self.group, 0), group=self.group)
            return out

        out = self._exchange("the gather of the pointwise log-likelihood", exchange)
        return None if out is None else torch.cat([p[..., :c].to(home) for p, c in zip(out, counts)], -1)

    def _exchange(self, what: str, exchange):
        if self.broken:
            raise RankFailure(f"rank {self.rank}: the run's process group has failed or is closed; no exchange possible")
        try:
            return exchange()
        except Exception as err:  # gloo/NCCL: closed connection, reset, timeout
            raise self._failure(what, err) from err

    # ------------------------------------------------------------------ failures
    def _key(self, kind: str, rank: int) -> str:
        return f"{self.prefix}/{kind}/{rank}"

    def _note(self, kind: str, text: str) -> None:
        if self.store is None:
            return
        try:
            self.store.set(self._key(kind, self.rank), text)
        except Exception:
            pass

    def _abort(self) -> None:
        try:
            if self.group is not None:
                self.group.abort()
        except Exception:
            pass

    def _failure(self, what: str, err: BaseException) -> RankFailure:
        self.broken = True
        self._note("stopped", what)
        self._abort()  # the others' exchanges fail now rather than at their timeout
        cause = self._diagnose()
        return RankFailure(f"{cause}; rank {self.rank} stopped in {what} ({_backend_reason(err)})")

    def _read(self, kind: str, rank: int) -> str | None:
        key = self._key(kind, rank)
        return self.store.get(key).decode(errors="replace") if self.store.check([key]) else None

    def _beats(self, ranks) -> dict[int, int]:
        return {r: int(self.store.add(self._key("beat", r), 0)) for r in ranks}

    def _diagnose(self) -> str:
        """Which rank stopped the run, from the store: a notice, a silent heartbeat, or a missing arrival."""
        if self.store is None:
            return "another rank stopped (no rendezvous store to tell which)"
        others = [r for r in range(self.world) if r != self.rank]
        try:
            start = time.monotonic()
            window, beats = start, self._beats(others)
            while True:
                failed = {r: text for r in others if (text := self._read("failed", r)) is not None}
                if failed:
                    return "; ".join(f"rank {r} raised {text}" for r, text in sorted(failed.items()))
                now = time.monotonic()
                if now - window >= SILENT_SECONDS:
                    latest = self._beats(others)
                    dead = [r for r in others if latest[r] == beats[r]]
                    if dead:
                        return (f"rank {', '.join(map(str, dead))} stopped responding (its process died, was "
                                f"killed or is frozen: no heartbeat for {SILENT_SECONDS:g} s)")
                    window, beats = now, latest
                if now - start >= DIAGNOSE_SECONDS:
                    break
                time.sleep(0.05)
            missing = [r for r in others if self._read("stopped", r) is None]
        except Exception:
            return ("the rendezvous store is unreachable, so the process that hosts it has stopped (rank 0, "
                    "unless torchrun's agent hosts the store)")
        if missing:
            return (f"rank {', '.join(map(str, missing))} did not reach the exchange within the timeout of "
                    f"{self.timeout:g} s (hung, or slower than the timeout: see st.Sharding(timeout=...))")
        return "another rank stopped (the store does not say which)"

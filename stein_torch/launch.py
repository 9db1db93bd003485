"""``stein-torch run MODEL.py --ranks R``: the workers, started through torchrun's launcher on this machine.

The command line starts R copies of itself with torch's elastic launcher (the engine behind
``torchrun --standalone --nproc-per-node=R``: a rendezvous store on 127.0.0.1, one process per rank,
``RANK``/``WORLD_SIZE``/``MASTER_ADDR``/``MASTER_PORT`` in their environment). Each copy sees that it
is a worker (:func:`inside_workers`), runs the sampler with ``distributed="particles"``, and only rank 0
prints and writes files. The same workers can be started by hand, on one machine or several::

    torchrun --standalone --nproc-per-node=2 -m stein_torch run MODEL.py --ranks 2

A failed worker makes the launcher stop the others; the launcher then raises
:class:`WorkersFailed` with one line naming the rank that failed first.
"""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import sys
import uuid

__all__ = ["inside_workers", "worker_rank", "worker_count", "start_workers", "WorkersFailed", "MONITOR_SECONDS"]

MONITOR_SECONDS = 1.0  # how often the launcher looks at its workers (a finished run ends at most this late)


class WorkersFailed(RuntimeError):
    """A worker started by :func:`start_workers` failed; the message names its rank."""


def inside_workers() -> bool:
    """Whether this process is a worker started by torchrun (its environment names a rank)."""
    return "RANK" in os.environ and "WORLD_SIZE" in os.environ and "MASTER_ADDR" in os.environ


def worker_rank() -> int:
    """This worker's rank (0 outside torchrun)."""
    return int(os.environ.get("RANK", 0))


def worker_count() -> int:
    """The number of workers (1 outside torchrun)."""
    return int(os.environ.get("WORLD_SIZE", 1))


@contextlib.contextmanager
def _quiet_launcher():
    """The launcher's own log lines (start-up notices, failure tables) are replaced by one line."""
    logger = logging.getLogger("torch.distributed.elastic")
    saved = logger.level, logger.propagate
    logger.setLevel(logging.CRITICAL)
    logger.propagate = False
    try:
        yield
    finally:
        logger.setLevel(saved[0])
        logger.propagate = saved[1]


def _describe(failure) -> str:
    code = failure.exitcode
    if code is not None and code < 0:
        with contextlib.suppress(ValueError):
            return f"was killed by {signal.Signals(-code).name}"
    return f"exited with code {code} (its message is above)"


def start_workers(ranks: int, argv: list[str], threads: int | None = None) -> int:
    """Run ``python -m stein_torch *argv`` on ``ranks`` local workers and wait for them.

    Parameters
    ----------
    ranks : int
        Processes to start (each with ``threads`` torch threads, default 1).
    argv : list of str
        The command line of each worker, e.g. ``["run", "model.py", "--ranks", "2"]``.

    Returns
    -------
    int
        0 when every worker succeeded.

    Raises
    ------
    WorkersFailed
        A worker failed (its own message is on stderr above); names the rank that failed first.
    """
    from torch.distributed.elastic.multiprocessing.errors import ChildFailedError
    from torch.distributed.launcher.api import LaunchConfig, elastic_launch

    config = LaunchConfig(
        min_nodes=1, max_nodes=1, nproc_per_node=ranks, run_id=str(uuid.uuid4()), rdzv_backend="c10d",
        rdzv_endpoint="127.0.0.1:0", max_restarts=0, monitor_interval=MONITOR_SECONDS,
    )
    saved = {k: os.environ.get(k) for k in ("OMP_NUM_THREADS", "GLOO_SOCKET_IFNAME")}
    os.environ["OMP_NUM_THREADS"] = str(threads or 1)  # one torch thread per rank unless asked otherwise
    os.environ.setdefault("GLOO_SOCKET_IFNAME", "lo")  # one machine: the loopback interface only
    try:
        with _quiet_launcher():
            elastic_launch(config, sys.executable)("-m", "stein_torch", *argv)
    except ChildFailedError as err:
        rank, failure = err.get_first_failure()
        raise WorkersFailed(f"rank {rank} of {ranks} {_describe(failure)}; the other ranks were stopped") from None
    finally:
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value
    return 0

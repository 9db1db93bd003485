"""The run loop every sampler shares: progress bar, Ctrl-C, checkpoints, per-step history, hooks.

A sampler brings ``step()``, ``step_count``, ``stop_reason``, ``finished_reason``, ``name``,
``progress_figures()`` and ``save(path)``; :func:`run_loop` drives it. The first Ctrl-C finishes the
current step and returns (``stop_reason = "interrupted"``), a second aborts; a sampler ends a run
early by setting ``stop_reason`` in its step (e.g. the SVGD stop rule).
"""

from __future__ import annotations

import sys
import warnings
from typing import Callable, Iterable

from .. import io
from ..checks import check_bool, check_int
from .interrupts import InterruptGuard

__all__ = ["run_loop", "append_history", "CHECKPOINT_EVERY"]

CHECKPOINT_EVERY = 100  # steps between checkpoints when a checkpoint file is given


def append_history(history: dict[str, list], row: dict) -> None:
    """Add one step's figures to ``history`` (name -> list of per-step values)."""
    for key, value in row.items():
        history.setdefault(key, []).append(value)


def check_run_options(steps, progress, checkpoint, checkpoint_every) -> tuple[int, bool, str | None, int]:
    """Validate the loop's options once, before any work: (steps, progress, checkpoint, every)."""
    steps = check_int(steps, "steps", minimum=0)
    progress = sys.stderr.isatty() if progress is None else check_bool(progress, "progress")
    if checkpoint is not None:
        checkpoint = io.check_output_path(checkpoint, "checkpoint")
    if checkpoint_every is not None:
        if checkpoint is None:
            raise ValueError("checkpoint_every is set but checkpoint (the file to write) is not")
        check_int(checkpoint_every, "checkpoint_every")
    every = CHECKPOINT_EVERY if checkpoint_every is None else int(checkpoint_every)
    return steps, progress, checkpoint, every


def run_loop(
    sampler,
    steps: int,
    *,
    progress: bool | None = None,
    checkpoint=None,
    checkpoint_every: int | None = None,
    hooks: Iterable[Callable] = (),
) -> None:
    """Take up to ``steps`` steps of ``sampler``.

    Parameters
    ----------
    sampler
        Any sampler of the package (SVGD, Langevin, NUTS).
    steps : int
        Steps to take; fewer when the sampler sets ``stop_reason`` or on Ctrl-C.
    progress : bool, optional
        tqdm bar with the sampler's ``progress_figures()``; default on when stderr is a terminal.
    checkpoint : str or os.PathLike, optional
        Write ``sampler.save(checkpoint)`` atomically every ``checkpoint_every`` steps (default 100),
        on interruption and at the end.
    hooks : iterable of callables
        ``hook(sampler)`` after every step (measurements, custom logging).
    """
    steps, progress, checkpoint, every = check_run_options(steps, progress, checkpoint, checkpoint_every)
    from tqdm.auto import tqdm

    sampler.stop_reason = sampler.finished_reason
    saved_at, consistent = None, True
    agree = getattr(sampler, "stop_together", None)  # processes sharing a run stop after the same step
    with InterruptGuard() as interrupt, tqdm(total=steps, desc=sampler.name, disable=not progress, leave=False) as bar:
        try:
            for _ in range(steps):
                if interrupt.requested if agree is None else agree(interrupt.requested):
                    sampler.stop_reason = "interrupted"
                    break
                sampler.step()
                bar.update(1)
                for hook in hooks:
                    hook(sampler)
                if progress:
                    figures = sampler.progress_figures()
                    if figures:
                        bar.set_postfix(figures, refresh=False)
                if checkpoint is not None and sampler.step_count % every == 0:
                    sampler.save(checkpoint)
                    saved_at = sampler.step_count
                if sampler.stop_reason != sampler.finished_reason:  # the sampler ended the run early
                    break
        except KeyboardInterrupt:  # not through the guard (no handler installed): maybe mid-step
            if interrupt.aborted:
                raise
            sampler.stop_reason, consistent = "interrupted", False
        except FloatingPointError as err:  # a sampler that gives up keeps its state before the failing step
            if checkpoint is not None and getattr(err, "result", None) is not None:
                sampler.save(checkpoint)
            raise
        if checkpoint is not None and saved_at != sampler.step_count:
            if consistent:
                sampler.save(checkpoint)
            else:
                warnings.warn(
                    f"checkpoint: interrupted inside step {sampler.step_count + 1}; the sampler's state may be "
                    f"ahead of its particles, so {checkpoint!r} keeps the last state saved before it",
                    RuntimeWarning, stacklevel=3,
                )

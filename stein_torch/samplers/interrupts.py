"""Ctrl-C during a run: the first press asks the loop to stop after the current step, a second aborts.

While :class:`InterruptGuard` is active in the main thread, SIGINT no longer raises
:class:`KeyboardInterrupt` at an arbitrary point (which could leave the optimizer a step ahead of
the particles); it sets :attr:`InterruptGuard.requested`, and the loop checks the flag between
steps, so the particles, optimizer state and random generator stay consistent and can be
checkpointed. A second SIGINT restores the previous handler and raises KeyboardInterrupt at once.
"""

from __future__ import annotations

import os
import signal
import threading

__all__ = ["InterruptGuard"]

NOTICE = (
    b"\nstein_torch: interrupt received; finishing the current step and returning the particles so far "
    b"(press Ctrl-C again to abort)\n"
)


class InterruptGuard:
    """Context manager that turns the first SIGINT into a request flag.

    Installed only in the main thread and only when SIGINT is not ignored; otherwise it does
    nothing and a KeyboardInterrupt arrives as usual (the loop handles that too).

    Attributes
    ----------
    requested : bool
        A first interrupt arrived.
    aborted : bool
        A second interrupt arrived and a KeyboardInterrupt was raised.
    """

    def __init__(self):
        self.requested = False
        self.aborted = False
        self._previous = None
        self._installed = False

    def _handler(self, signum, frame):
        if self.requested:
            self.aborted = True
            self._restore()
            raise KeyboardInterrupt
        self.requested = True
        try:  # os.write, not print: a handler may run while stderr's buffer is in use (tqdm)
            os.write(2, NOTICE)
        except OSError:
            pass

    def __enter__(self) -> "InterruptGuard":
        if threading.current_thread() is not threading.main_thread():
            return self
        previous = signal.getsignal(signal.SIGINT)
        if previous is signal.SIG_IGN or previous is None:  # ignored (nohup, background job) or foreign
            return self
        self._previous = previous
        signal.signal(signal.SIGINT, self._handler)
        self._installed = True
        return self

    def _restore(self):
        if self._installed:
            signal.signal(signal.SIGINT, self._previous)
            self._installed = False

    def __exit__(self, *exc) -> None:
        self._restore()

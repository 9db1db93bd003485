"""When to stop an SVGD run: kernel Stein discrepancy (KSD) monitoring with a plateau rule.

Every ``every`` steps the sampler hands the rule the KSD of each ensemble, computed from the scores it
already has (no extra score evaluations). The KSD is taken on the sampler's *whitened* coordinates u
(z = shift + L u: the Laplace whitening at the start, then the particles' own mean and covariance
after each re-whitening; identity without whitening), with the IMQ
base kernel c = 1, beta = -1/2, h = 1 ("Measuring Sample Quality with Kernels", arXiv:1703.01717).
There the posterior looks roughly like a standard normal, so one tolerance and one kernel scale fit
every model: the figure does not change when the user rescales a parameter.

A run stops at the first check, at or after ``min_steps``, where every ensemble

- has KSD below ``tol`` (reason ``"ksd_tolerance"``), or
- has not improved its best KSD by more than a fraction ``rtol`` over the last ``window`` steps
  (reason ``"ksd_plateau"``).

Otherwise it runs all its steps (reason ``"steps"``).
"""

from __future__ import annotations

import math

import torch

from ..checks import check_int, check_real

__all__ = ["StopRule", "as_stop_rule"]


def _positive_int(value, name: str, minimum: int = 1) -> int:
    return check_int(value, f"StopRule: {name}", minimum)


def _nonnegative_float(value, name: str) -> float:
    return check_real(value, f"StopRule: {name}", low=0)


class StopRule:
    """Stop an SVGD run when the KSD of every ensemble has stopped improving or is small enough.

    Parameters
    ----------
    every : int, default=10
        Steps between KSD checks (each costs about one SVGD direction, no score evaluations).
    window : int, default=100
        Plateau window in steps (a multiple of ``every`` is used: ``ceil(window / every)`` checks).
    rtol : float, default=0.01
        Relative improvement of the best KSD over the window below which the run has plateaued.
    tol : float or None, default=None
        Absolute KSD (whitened coordinates) under which the run stops; None disables this test.
    min_steps : int, default=300
        No stop before this many steps (the default run has at most 400; with its default settings
        the sampler's moments settle within 200-300 steps on the reference posteriors).

    Attributes
    ----------
    steps : list of int
        Step numbers of the checks.
    history : list of list of float
        KSD per ensemble at each check.
    reason : str or None
        ``"ksd_plateau"`` or ``"ksd_tolerance"`` once the rule has fired, else None.

    Examples
    --------
    >>> rule = StopRule(every=10, window=100, rtol=0.05, min_steps=100)
    >>> for step in range(10, 1001, 10):
    ...     if rule.update(step, torch.tensor([1.0 / step + 0.1])):
    ...         break
    >>> rule.reason, step
    ('ksd_plateau', 200)
    """

    def __init__(
        self,
        every: int = 10,
        window: int = 100,
        rtol: float = 0.01,
        tol: float | None = None,
        min_steps: int = 300,
    ):
        self.every = _positive_int(every, "every")
        self.window = _positive_int(window, "window")
        self.rtol = _nonnegative_float(rtol, "rtol")
        if self.rtol >= 1:
            raise ValueError(f"StopRule: rtol == {rtol!r}, must be < 1")
        self.tol = None if tol is None else _nonnegative_float(tol, "tol")
        self.min_steps = _positive_int(min_steps, "min_steps", minimum=0)
        self.steps: list[int] = []
        self.history: list[list[float]] = []
        self.reason: str | None = None

    def due(self, step: int) -> bool:
        """Whether the KSD should be computed after step ``step``."""
        return step % self.every == 0

    def update(self, step: int, ksd: torch.Tensor) -> str | None:
        """Record the KSD of each ensemble after step ``step``; return the stop reason or None.

        Parameters
        ----------
        step : int
            Steps taken so far.
        ksd : Tensor of shape (ensembles,)
            KSD (V-statistic) per ensemble on whitened coordinates.
        """
        values = [float(v) for v in torch.as_tensor(ksd).reshape(-1)]
        self.steps.append(int(step))
        self.history.append(values)
        if step < self.min_steps:
            return None
        if self.tol is not None and all(v < self.tol for v in values):
            self.reason = "ksd_tolerance"
        elif self._plateau():
            self.reason = "ksd_plateau"
        return self.reason

    def _plateau(self) -> bool:
        checks = math.ceil(self.window / self.every)
        if len(self.history) <= checks:
            return False
        before, recent = self.history[:-checks], self.history[-checks:]
        for e in range(len(before[0])):
            best_before = min(row[e] for row in before)
            best_recent = min(row[e] for row in recent)
            if not math.isfinite(best_recent) or best_recent < (1 - self.rtol) * best_before:
                return False
        return True

    def state_dict(self) -> dict:
        """Settings and history as plain values, e.g. ``{"every": 10, ..., "steps": [10, 20],
        "history": [[0.91], [0.63]], "reason": None}``."""
        return {
            "every": self.every, "window": self.window, "rtol": self.rtol, "tol": self.tol,
            "min_steps": self.min_steps, "steps": list(self.steps),
            "history": [list(row) for row in self.history], "reason": self.reason,
        }

    def load_state_dict(self, state: dict) -> None:
        """Restore from :meth:`state_dict` (settings are validated as in the constructor)."""
        missing = {"every", "window", "rtol", "tol", "min_steps", "steps", "history", "reason"} - set(state)
        if missing:
            raise ValueError(f"StopRule.load_state_dict: state is missing keys {sorted(missing)}")
        if len(state["steps"]) != len(state["history"]):
            raise ValueError(
                f"StopRule.load_state_dict: steps has {len(state['steps'])} entries but history has "
                f"{len(state['history'])}"
            )
        self.__init__(state["every"], state["window"], state["rtol"], state["tol"], state["min_steps"])
        self.steps = [int(s) for s in state["steps"]]
        self.history = [[float(v) for v in row] for row in state["history"]]
        self.reason = state["reason"]

    def __repr__(self) -> str:
        return (f"StopRule(every={self.every}, window={self.window}, rtol={self.rtol}, tol={self.tol}, "
                f"min_steps={self.min_steps})")


def as_stop_rule(stop) -> StopRule | None:
    """``None`` or ``True`` -> the default :class:`StopRule`; ``False`` -> no rule; a StopRule as is
    (a fresh copy of its settings, so one object can configure several runs)."""
    if stop is None or stop is True:
        return StopRule()
    if stop is False:
        return None
    if isinstance(stop, StopRule):
        rule = StopRule(stop.every, stop.window, stop.rtol, stop.tol, stop.min_steps)
        return rule
    raise TypeError(f"stop must be None, True, False or a stein_torch.StopRule, got {type(stop).__qualname__}")

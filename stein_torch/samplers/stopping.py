"""When to stop an SVGD run.

:class:`StopRule` (the default) ends a run when the particle set has *settled*: the moments a user
reads will not move by more than a small tolerance if the run went on, and the set is at least as
close to the target, as the kernel Stein discrepancy sees it, as exact draws would be.
:class:`KSDPlateau` is the earlier rule: stop when the KSD has stopped improving.

The sampler calls ``rule.check(step, watch)`` before every step, with the particles after ``step``
steps (``step`` = 0: the starting particles). ``watch`` computes on demand, from what the step has
anyway (no score evaluations; see :mod:`stein_torch.samplers.monitor`):

- ``watch.velocity()``: how far, per step, the flow is moving each ensemble's coordinate means (in
  particle sds) and log sds right now, from the SVGD direction;
- ``watch.moments()``: per-ensemble means, log sds and sds of the unconstrained coordinates;
- ``watch.band()``: the U-statistic of KSD^2 and its standard deviation over exact draws;
- ``watch.ksd()``: the KSD (V-statistic) per ensemble, on whitened coordinates.
"""

from __future__ import annotations

import math

import torch

from ..checks import check_int, check_real

__all__ = ["StopRule", "KSDPlateau", "as_stop_rule"]


def _positive_int(value, owner: str, name: str, minimum: int = 1) -> int:
    return check_int(value, f"{owner}: {name}", minimum)


def _nonnegative_float(value, owner: str, name: str) -> float:
    return check_real(value, f"{owner}: {name}", low=0)


def _values(tensor) -> list[float]:
    return [float(v) for v in torch.as_tensor(tensor).reshape(-1)]


class StopRule:
    """Stop when the particle set has settled (the default rule; reason ``"settled"``).

    At every step, for every ensemble, two ways to tell the moments have settled:

    - *predicted*: the flow's current moment velocity v (per step, from the SVGD direction) and its
      contraction over the last ``lag`` steps, r = (v_t / v_(t-lag))^(1/lag) < 1, predict the
      remaining change as the sum of the geometric tail, v / (1 - r). Settled when the remaining change of
      every coordinate's mean is at most ``tol`` particle sds and of every log sd at most ``tol``.
      This can fire a few steps after the start when the start is already at the flow's fixed point.
      After a change of coordinates (re-whitening) the record restarts and no prediction is used for
      ``window`` steps: the new flow's first steps relax fast and would hide a slow drift.
    - *observed*: over the last ``window`` steps no coordinate's mean moved more than
      ``window_tol`` particle sds and no log sd more than ``window_tol / 2`` (slow, steady drifts
      that the prediction cannot bound).

    Either one must hold together with the *band*: the KSD^2 U-statistic is at most
    ``band`` x its standard deviation over exact draws (computed at most every ``band_every``
    steps, about the cost of one direction).

    Parameters
    ----------
    tol : float, default=0.03
        Largest predicted remaining change of a mean (particle sds) and of a log sd.
    window : int, default=20
        Steps over which the observed change is measured.
    window_tol : float, default=0.02
        Largest observed change of a mean over the window (particle sds); log sds: half of it.
    band : float, default=1.0
        Largest U-statistic of KSD^2, in standard deviations of exact draws (0: as good as exact
        draws on average; 1: within one standard deviation of them).
    lag : int, default=3
        Steps over which the contraction of the velocity is measured.
    band_every : int, default=5
        Fewest steps between two band computations.
    min_steps : int, default=0
        No stop before this many steps.

    Attributes
    ----------
    reason : str or None
        ``"settled"`` once the rule has fired.
    checks : list of dict
        One entry per band computation: step, how the moments settled, U / noise per ensemble.
    """

    name = "settled"

    def __init__(self, tol: float = 0.03, window: int = 20, window_tol: float = 0.02, band: float = 1.0,
                 lag: int = 3, band_every: int = 5, min_steps: int = 0):
        owner = "StopRule"
        self.tol = _nonnegative_float(tol, owner, "tol")
        self.window = _positive_int(window, owner, "window")
        self.window_tol = _nonnegative_float(window_tol, owner, "window_tol")
        self.band = check_real(band, f"{owner}: band")
        self.lag = _positive_int(lag, owner, "lag")
        self.band_every = _positive_int(band_every, owner, "band_every")
        self.min_steps = _positive_int(min_steps, owner, "min_steps", minimum=0)
        self.velocities: list[list[list[float]]] = []  # last lag + 1 steps: [mean per ensemble, log sd per ensemble]
        self.moments: list[tuple] = []  # last window + 1 steps: (step, means (B, d), log sds (B, d))
        self.last_band_step = -self.band_every
        self.predict_from = 0  # no prediction before this step (set after a change of coordinates)
        self.checks: list[dict] = []
        self.reason: str | None = None

    def restart(self, step: int) -> None:
        """The sampler changed its coordinates after ``step`` steps (re-whitening): the flow is a new
        one, and its first steps relax fast before the slow part shows, so the velocity record starts
        afresh and no prediction is trusted for ``window`` steps."""
        self.velocities = []
        self.predict_from = int(step) + self.window

    # ------------------------------------------------------------------ the rule
    def check(self, step: int, watch) -> str | None:
        """Look at the particles after ``step`` steps; return ``"settled"`` or None."""
        mean_v, sd_v = watch.velocity()
        self.velocities = (self.velocities + [[_values(mean_v), _values(sd_v)]])[-(self.lag + 1):]
        mean, log_sd = watch.moments()
        self.moments = (self.moments + [(int(step), mean.detach().clone(), log_sd.detach().clone())])[-(self.window + 1):]
        if step < self.min_steps or step - self.last_band_step < self.band_every:
            return None
        predicted = step >= self.predict_from and self._predicted_settled()
        how = "predicted" if predicted else ("observed" if self._observed_settled(step) else None)
        if how is None:
            return None
        self.last_band_step = step
        ustat, noise = watch.band()
        ratios = [u / n if n > 0 else math.inf for u, n in zip(_values(ustat), _values(noise))]
        self.checks.append({"step": int(step), "how": how, "ustat_over_noise": ratios})
        if all(r <= self.band for r in ratios):
            self.reason = self.name
        return self.reason

    def remaining(self) -> tuple[float, float]:
        """Predicted remaining change of means (sds) and log sds, worst ensemble; inf when the
        velocity is not contracting or not yet known."""
        if len(self.velocities) <= self.lag:
            return math.inf, math.inf
        out = []
        for kind in (0, 1):
            now, before = self.velocities[-1][kind], self.velocities[0][kind]
            worst = 0.0
            for v, v0 in zip(now, before):
                if not (math.isfinite(v) and math.isfinite(v0)):
                    return math.inf, math.inf
                if v == 0:
                    continue
                r = (v / v0) ** (1 / self.lag) if v0 > 0 else math.inf
                worst = max(worst, v / (1 - r) if r < 1 else math.inf)
            out.append(worst)
        return out[0], out[1]

    def _predicted_settled(self) -> bool:
        mean_left, sd_left = self.remaining()
        return mean_left <= self.tol and sd_left <= self.tol

    def _observed_settled(self, step: int) -> bool:
        if len(self.moments) <= self.window or step - self.moments[0][0] < self.window:
            return False
        _, mean0, log_sd0 = self.moments[0]
        _, mean1, log_sd1 = self.moments[-1]
        moved = ((mean1 - mean0).abs() / log_sd1.exp()).max()
        spread = (log_sd1 - log_sd0).abs().max()
        return bool(moved <= self.window_tol) and bool(spread <= self.window_tol / 2)

    # ------------------------------------------------------------------ state
    def settings(self) -> dict:
        return {"tol": self.tol, "window": self.window, "window_tol": self.window_tol, "band": self.band,
                "lag": self.lag, "band_every": self.band_every, "min_steps": self.min_steps}

    def state_dict(self) -> dict:
        """Settings and the recent figures (plain values; the moments as tensors)."""
        return {**self.settings(), "velocities": [list(map(list, v)) for v in self.velocities],
                "moments": [[s, m.clone(), v.clone()] for s, m, v in self.moments], "last_band_step": self.last_band_step,
                "predict_from": self.predict_from,
                "checks": [dict(c) for c in self.checks], "reason": self.reason}

    def load_state_dict(self, state: dict) -> None:
        """Restore from :meth:`state_dict` (settings are validated as in the constructor)."""
        keys = set(self.settings()) | {"velocities", "moments", "last_band_step", "predict_from", "checks", "reason"}
        missing = keys - set(state)
        if missing:
            raise ValueError(f"StopRule.load_state_dict: state is missing keys {sorted(missing)}")
        self.__init__(**{k: state[k] for k in self.settings()})
        self.velocities = [[list(map(float, row)) for row in v] for v in state["velocities"]]
        self.moments = [(int(s), torch.as_tensor(m), torch.as_tensor(v)) for s, m, v in state["moments"]]
        self.last_band_step = int(state["last_band_step"])
        self.predict_from = int(state["predict_from"])
        self.checks = [dict(c) for c in state["checks"]]
        self.reason = state["reason"]

    def copy(self) -> "StopRule":
        return StopRule(**self.settings())

    def __repr__(self) -> str:
        return "StopRule(" + ", ".join(f"{k}={v}" for k, v in self.settings().items()) + ")"


class KSDPlateau:
    """Stop when the KSD of every ensemble has stopped improving or is small enough.

    Every ``every`` steps the KSD (V-statistic, whitened coordinates, IMQ c = 1, beta = -1/2,
    h = 1: "Measuring Sample Quality with Kernels", arXiv:1703.01717) of each ensemble is recorded. A
    run stops at the first check, at or after ``min_steps``, where every ensemble has KSD below
    ``tol`` (reason ``"ksd_tolerance"``) or has not improved its best KSD by more than a fraction
    ``rtol`` over the last ``window`` steps (reason ``"ksd_plateau"``).

    A plateau means the particles stopped moving towards the target, not that they reached it.

    Parameters
    ----------
    every : int, default=10
        Steps between KSD checks.
    window : int, default=100
        Plateau window in steps (``ceil(window / every)`` checks).
    rtol : float, default=0.01
        Relative improvement of the best KSD over the window below which the run has plateaued.
    tol : float or None, default=None
        Absolute KSD under which the run stops; None disables this test.
    min_steps : int, default=300
        No stop before this many steps.

    Examples
    --------
    >>> rule = KSDPlateau(every=10, window=100, rtol=0.05, min_steps=100)
    >>> for step in range(10, 1001, 10):
    ...     if rule.update(step, torch.tensor([1.0 / step + 0.1])):
    ...         break
    >>> rule.reason, step
    ('ksd_plateau', 200)
    """

    def __init__(self, every: int = 10, window: int = 100, rtol: float = 0.01, tol: float | None = None,
                 min_steps: int = 300):
        owner = "KSDPlateau"
        self.every = _positive_int(every, owner, "every")
        self.window = _positive_int(window, owner, "window")
        self.rtol = _nonnegative_float(rtol, owner, "rtol")
        if self.rtol >= 1:
            raise ValueError(f"{owner}: rtol == {rtol!r}, must be < 1")
        self.tol = None if tol is None else _nonnegative_float(tol, owner, "tol")
        self.min_steps = _positive_int(min_steps, owner, "min_steps", minimum=0)
        self.steps: list[int] = []
        self.history: list[list[float]] = []
        self.reason: str | None = None

    def check(self, step: int, watch) -> str | None:
        """The sampler's call before each step: the KSD at every ``every``-th step."""
        if step == 0 or step % self.every:
            return None
        return self.update(step, watch.ksd())

    def update(self, step: int, ksd: torch.Tensor) -> str | None:
        """Record the KSD of each ensemble (shape (ensembles,)) after ``step`` steps; return the stop
        reason or None."""
        values = _values(ksd)
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
        """Settings and history as plain values."""
        return {
            "every": self.every, "window": self.window, "rtol": self.rtol, "tol": self.tol,
            "min_steps": self.min_steps, "steps": list(self.steps),
            "history": [list(row) for row in self.history], "reason": self.reason,
        }

    def load_state_dict(self, state: dict) -> None:
        """Restore from :meth:`state_dict` (settings are validated as in the constructor)."""
        missing = {"every", "window", "rtol", "tol", "min_steps", "steps", "history", "reason"} - set(state)
        if missing:
            raise ValueError(f"KSDPlateau.load_state_dict: state is missing keys {sorted(missing)}")
        if len(state["steps"]) != len(state["history"]):
            raise ValueError(
                f"KSDPlateau.load_state_dict: steps has {len(state['steps'])} entries but history has "
                f"{len(state['history'])}"
            )
        self.__init__(state["every"], state["window"], state["rtol"], state["tol"], state["min_steps"])
        self.steps = [int(s) for s in state["steps"]]
        self.history = [[float(v) for v in row] for row in state["history"]]
        self.reason = state["reason"]

    def copy(self) -> "KSDPlateau":
        return KSDPlateau(self.every, self.window, self.rtol, self.tol, self.min_steps)

    def __repr__(self) -> str:
        return (f"KSDPlateau(every={self.every}, window={self.window}, rtol={self.rtol}, tol={self.tol}, "
                f"min_steps={self.min_steps})")


def as_stop_rule(stop) -> StopRule | KSDPlateau | None:
    """``None`` or ``True`` -> the default :class:`StopRule`; ``False`` -> no rule; a rule -> a fresh
    copy of its settings (so one object can configure several runs)."""
    if stop is None or stop is True:
        return StopRule()
    if stop is False:
        return None
    if isinstance(stop, (StopRule, KSDPlateau)):
        return stop.copy()
    raise TypeError(
        f"stop must be None, True, False, a stein_torch.StopRule or a KSDPlateau, got {type(stop).__qualname__}"
    )

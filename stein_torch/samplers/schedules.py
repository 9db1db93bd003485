"""Annealing schedules for the driving (score) term of SVGD.

With drive gamma in [0, 1] the update is phi(x_i) = (1/N) sum_j [gamma k_ij s_j + grad_{x_j} k_ij]:
its fixed points follow the tempered target p^gamma. A small gamma lets the repulsion spread the
particles over a wide region; raising gamma to 1 pulls them into the modes, so particles can reach
modes a plain run never sees ("Annealed Stein Variational Gradient Descent", arXiv:2101.09815, from
memory). Pass a schedule as ``st.svgd(..., anneal=...)``; any callable ``step -> gamma`` works.

For multimodal targets also pass ``precondition=None`` and a broad ``init``: the default start
(L-BFGS to one mode, whitening by its curvature, particles drawn around it) puts every particle in
one basin, and whitening by one mode's curvature distorts the others.

Caution: annealing helps SVGD *find* separated modes; the share of particles each mode keeps is
set while the tempered modes still overlap. Check mode proportions (e.g. across seeds or ensembles)
before relying on them.
"""

from __future__ import annotations

import math
from typing import Callable

from ..checks import check_callable, check_int, check_real

__all__ = ["linear", "cyclical", "hyperbolic", "as_drive"]


def _count(value, name: str, owner: str) -> int:
    return check_int(value, f"{owner}: {name}")


def _fraction(value, name: str, owner: str, low_open: bool = False) -> float:
    return check_real(value, f"{owner}: {name}", low=0, high=1, low_open=low_open)


def _power(value, owner: str) -> float:
    return check_real(value, f"{owner}: power", low=0, low_open=True)


class linear:
    """gamma(t) = start + (1 - start) min(1, t / ramp_steps): a straight ramp, then 1.

    Parameters
    ----------
    ramp_steps : int
        Steps to reach gamma = 1.
    start : float, default=0.1
        gamma at step 0, in [0, 1].
    """

    def __init__(self, ramp_steps: int, start: float = 0.1):
        self.ramp_steps = _count(ramp_steps, "ramp_steps", "linear")
        self.start = _fraction(start, "start", "linear")

    def __call__(self, step: int) -> float:
        return self.start + (1 - self.start) * min(1.0, step / self.ramp_steps)

    def __repr__(self):
        return f"linear(ramp_steps={self.ramp_steps}, start={self.start})"


class cyclical:
    """gamma(t) = start + (1 - start) (((t mod L) + 1) / L)^power for t < cycles L, then 1.

    Repeated ramps: each cycle lets the particles spread (gamma near ``start``) and settle again;
    the cyclical schedule of arXiv:2101.09815 (from memory) has start = 0.

    Parameters
    ----------
    cycles : int
        Number of ramps.
    cycle_steps : int
        Steps per ramp, L.
    power : float, default=1.0
        Shape of each ramp (> 1: stays low longer).
    start : float, default=0.0
    """

    def __init__(self, cycles: int, cycle_steps: int, power: float = 1.0, start: float = 0.0):
        self.cycles = _count(cycles, "cycles", "cyclical")
        self.cycle_steps = _count(cycle_steps, "cycle_steps", "cyclical")
        self.power = _power(power, "cyclical")
        self.start = _fraction(start, "start", "cyclical")

    def __call__(self, step: int) -> float:
        if step >= self.cycles * self.cycle_steps:
            return 1.0
        frac = ((step % self.cycle_steps) + 1) / self.cycle_steps
        return self.start + (1 - self.start) * frac**self.power

    def __repr__(self):
        return f"cyclical(cycles={self.cycles}, cycle_steps={self.cycle_steps}, power={self.power}, start={self.start})"


class hyperbolic:
    """gamma(t) = tanh((1.3 t / ramp_steps)^power), close to 1 after ``ramp_steps`` (0.86 at the end
    of the ramp for power 1; arXiv:2101.09815, from memory).

    Parameters
    ----------
    ramp_steps : int
    power : float, default=1.0
    """

    def __init__(self, ramp_steps: int, power: float = 1.0):
        self.ramp_steps = _count(ramp_steps, "ramp_steps", "hyperbolic")
        self.power = _power(power, "hyperbolic")

    def __call__(self, step: int) -> float:
        return math.tanh((1.3 * step / self.ramp_steps) ** self.power)

    def __repr__(self):
        return f"hyperbolic(ramp_steps={self.ramp_steps}, power={self.power})"


def as_drive(anneal) -> Callable[[int], float]:
    """The sampler's ``drive(step)``: 1 without annealing, else the schedule with its values checked."""
    if anneal is None:
        return lambda step: 1.0
    check_callable(anneal, "anneal", "callable step -> drive in [0, 1] (e.g. st.schedules.linear(300)), or None")

    def drive(step: int) -> float:
        value = anneal(step)
        try:
            return check_real(value, f"anneal: the schedule's value at step {step}", low=0, high=1)
        except (TypeError, ValueError) as err:
            raise ValueError(f"{err} (a schedule returns a number in [0, 1])") from None

    drive(0)  # fail at the boundary, not mid-run
    return drive

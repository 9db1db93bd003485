"""The default kernel and step rule of SVGD (reasons: docs/defaults.md)."""

from __future__ import annotations

from ..kernels import IMQ, Kernel, Linear
from .steppers import GradientStep, Stepper

__all__ = ["default_kernel", "default_stepper"]


def default_kernel() -> Kernel:
    """IMQ with the median-heuristic bandwidth plus a saturating linear kernel on standardised
    coordinates (radius 2).

    Chosen on the reference posteriors (docs/defaults.md): the linear part keeps the spread in
    higher dimension (moment matching), the IMQ's long range keeps isolated particles coupled to
    the rest, and the saturation keeps heavy tails from being pushed outwards.
    """
    return IMQ() + Linear(radius=2.0)


def default_stepper() -> Stepper:
    """Plain gradient steps of 0.1 in whitened coordinates, no particle moving more than 0.3 a step.

    Steps proportional to the direction converge to the fixed point; per-coordinate adaptive rules
    (Adam, RMSprop) keep a jitter of the size of their step and, on heavy-tailed posteriors, were
    seen to let tail particles wander (docs/defaults.md).
    """
    return GradientStep(0.1, max_move=0.3)

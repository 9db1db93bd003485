"""Settings a target asks its samplers for when the user leaves them at their defaults."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

__all__ = ["SamplerDefaults"]


@dataclass(frozen=True)
class SamplerDefaults:
    """A target's preferred sampler settings, used only where the user gave none.

    Attributes
    ----------
    init : str, optional
        Starting particles when ``init=None`` (e.g. ``"prior"``).
    precondition : str or None, default="auto"
        Used when the user leaves ``precondition="auto"``.
    kernel : callable, optional
        Zero-argument factory of the SVGD kernel (e.g. ``st.kernels.RBF``).
    stepper : callable, optional
        SVGD step rule: a factory ``params -> torch.optim.Optimizer`` or a ``Stepper``.
    reason : str
        Why these settings (shown in docs and reprs).
    """

    init: str | None = None
    precondition: str | None = "auto"
    kernel: Callable | None = None
    stepper: Callable | None = None
    reason: str = ""

"""The linear kernel on standardised coordinates (the moment-matching part of the default kernel)."""

from __future__ import annotations

import torch

from ..checks import check_optional_real
from .base import Kernel

__all__ = ["Linear", "standardizer"]


class Linear(Kernel):
    """Linear kernel f(x) . f(y) + 1 on coordinates standardised by the particles' mean and sd.

    Added to a radial kernel it makes the fixed points of SVGD match the target's first and second
    moments on Gaussian targets, curing the spread underestimation of SVGD with few particles in
    high dimension ("Stein Variational Gradient Descent as Moment Matching", arXiv:1810.11693, from
    memory). Mean and sd are those of the particle set at each step, held fixed within the step.

    Parameters
    ----------
    radius : float, optional
        None: f(x) = x~ = (x - mean) / sd. A number r: the features saturate,
        f(x) = x~ / sqrt(1 + |x~|^2 / (r^2 d)), so a particle far in a tail is no longer pushed in
        proportion to its distance by the other particles' moment mismatch (common practice to keep
        heavy tails stable; the Stein identity still holds for any smooth features).
    """

    def __init__(self, radius: float | None = None):
        self.radius = check_optional_real(radius, "Linear: radius", low=0, low_open=True)

    def features(self, x, center, scale):
        xt = (x - center) / scale
        if self.radius is None:
            return xt
        return xt / (1 + (xt * xt).sum(-1, keepdim=True) / (self.radius**2 * x.shape[-1])).sqrt()

    def __call__(self, x, y, center=None, scale=None):
        if center is None:
            center, scale = standardizer(x)
        return self.features(x, center, scale) @ self.features(y, center, scale).mT + 1

    def state_dict(self):
        return {"radius": self.radius}

    def load_state_dict(self, state):
        self.radius = state.get("radius")

    def __repr__(self):
        return "Linear()" if self.radius is None else f"Linear(radius={self.radius})"


def standardizer(x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Particle mean and sd (..., 1, d) used by :class:`Linear`; sd floored to stay positive."""
    center = x.mean(-2, keepdim=True)
    if x.shape[-2] < 2:
        return center, torch.ones_like(center)
    centred = x - center
    scale = (centred * centred).sum(-2, keepdim=True).div_(x.shape[-2] - 1).sqrt_()
    floor = scale.amax(-1, keepdim=True).clamp_min_(1.0).mul_(1e-8)
    return center, torch.maximum(scale, floor)



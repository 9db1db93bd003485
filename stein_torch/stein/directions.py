"""Which SVGD direction each kernel type has: a registry, and :func:`svgd_direction` that uses it.

A new kernel type gets its direction by registering a function::

    @register_direction(MyKernel)
    def _my_direction(kernel, x, score, *, drive, log_prob, rows, generator, chunk_elements, scratch):
        ...  # x, score: (B, N, d); returns (B, R, d) for the R rows asked for

Lookup follows the kernel's class hierarchy, so every :class:`~stein_torch.kernels.RadialKernel`
subclass uses the radial engine unless it registers its own.
"""

from __future__ import annotations

from typing import Callable

import torch

from ..kernels import Linear, RadialKernel, Sum, TargetWeighted
from ..kernels.weighted import target_weights
from .engine import CHUNK_ELEMENTS, as_batch, linear_direction, radial_direction
from .scratch import Scratch

__all__ = ["svgd_direction", "register_direction"]

DIRECTIONS: dict[type, Callable] = {}


def register_direction(kernel_type: type) -> Callable:
    """Decorator: ``fn`` computes the SVGD direction of kernels of ``kernel_type`` (and subclasses)."""

    def register(fn: Callable) -> Callable:
        DIRECTIONS[kernel_type] = fn
        return fn

    return register


def direction_of(kernel) -> Callable:
    """The registered direction for ``kernel``'s type (nearest class in its hierarchy)."""
    for cls in type(kernel).__mro__:
        if cls in DIRECTIONS:
            return DIRECTIONS[cls]
    raise TypeError(f"kernel: no SVGD direction for {type(kernel).__qualname__}; register one with register_direction")


def svgd_direction(
    x: torch.Tensor,
    score: torch.Tensor,
    kernel,
    *,
    drive: float = 1.0,
    log_prob: torch.Tensor | None = None,
    rows: slice | None = None,
    generator: torch.Generator | None = None,
    chunk_elements: int = CHUNK_ELEMENTS,
    scratch: Scratch | None = None,
) -> torch.Tensor:
    """The SVGD direction phi for each particle.

    Parameters
    ----------
    x, score : Tensor of shape (..., N, d)
        Particles and their scores grad log p.
    kernel : Kernel
    drive : float, default=1.0
        Weight of the driving (score) term; annealing schedules lower it early on.
    log_prob : Tensor of shape (..., N), optional
        Log densities (needed by target-weighted kernels).
    rows : slice, optional
        Particles whose direction is wanted (default: all); sums still run over all N.
    generator : torch.Generator, optional
        Fresh random pairs for the median heuristic on large N (default: its fixed pairs).
    scratch : Scratch, optional
        Pairwise buffers kept between calls; pass the same one to repeated calls at one size.

    Returns
    -------
    Tensor of shape (..., R, d), R = N without ``rows``.
    """
    if x.shape != score.shape:
        raise ValueError(f"score must have the shape of x {tuple(x.shape)}; got {tuple(score.shape)}")
    xb, lead = as_batch(x, "x")
    sb = score.reshape(xb.shape)
    lpb = None if log_prob is None else log_prob.reshape(xb.shape[:-1])
    out = direction_of(kernel)(
        kernel, xb, sb, drive=drive, log_prob=lpb, rows=rows, generator=generator,
        chunk_elements=chunk_elements, scratch=scratch or Scratch(),
    )
    return out.reshape(*lead, *out.shape[-2:])


@register_direction(Sum)
def _sum_direction(kernel, x, s, **options):
    first, *rest = (direction_of(part)(part, x, s, **options) for part in kernel.parts)
    for phi in rest:
        first += phi
    return first


@register_direction(Linear)
def _linear(kernel, x, s, *, drive, rows, **_):
    return linear_direction(x, s, score_coef=drive, radius=kernel.radius, rows=rows)


@register_direction(RadialKernel)
def _radial(kernel, x, s, *, drive, rows, generator, chunk_elements, scratch, **_):
    return radial_direction(
        x, s, kernel, score_coef=drive, rows=rows, generator=generator, chunk_elements=chunk_elements, scratch=scratch
    )


@register_direction(TargetWeighted)
def _target_weighted(kernel, x, s, *, drive, log_prob, rows, generator, chunk_elements, scratch):
    """k(x, y) / sqrt(p(x) p(y)): the radial engine with weights p^(-1/2) and score_coef drive - 1/2
    (see :mod:`stein_torch.kernels.weighted`)."""
    if log_prob is None:
        raise ValueError("TargetWeighted: log_prob (the particles' log densities, shape (B, N)) is required")
    if log_prob.shape != x.shape[:-1]:
        raise ValueError(f"TargetWeighted: log_prob must have shape {tuple(x.shape[:-1])}; got {tuple(log_prob.shape)}")
    w = target_weights(log_prob.to(x.dtype))
    return radial_direction(
        x, s, kernel.base, score_coef=drive - 0.5, weights=w, rows=rows, generator=generator,
        chunk_elements=chunk_elements, scratch=scratch,
    )

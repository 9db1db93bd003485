"""Kernels for Stein variational gradient descent: the base classes.

Radial kernels are written as a profile ``f(s)`` of the scaled squared distance
``s = |x - y|^2 / h`` with bandwidth ``h``; the update needs ``f`` and ``f'`` (and the kernel Stein
discrepancy ``f''``), all in closed form (handbook: "Gaussian Processes for Machine Learning", ch. 4).

======================  =========================================  ==========================
kernel                  profile f(s)                               note
======================  =========================================  ==========================
``RBF()``               exp(-s)                                    smooth
``IMQ(c, beta)``        (c^2 + s)^beta, beta in (-1, 0)            heavy tails, KSD default
``Matern(nu)``          Matérn 1/2, 3/2, 5/2 in t = sqrt(2 nu s)   rough for small nu
``GammaExponential(g)`` exp(-s^(g/2)), 0 < g <= 2                  g = 2 is the RBF
``Linear()``            x~ . y~ + 1 on standardised coordinates    fixes first two moments
``TargetWeighted(k)``   k(x, y) / sqrt(p(x) p(y))                  see :mod:`.weighted`
======================  =========================================  ==========================

Non-smooth profiles (gamma-exponential with gamma < 2, Matérn 1/2) have f'(s) unbounded at s = 0.
The self-pair has zero displacement and contributes nothing. For other pairs the SVGD term
(2/h) f'(s) (x_j - x_i) has magnitude m(s) = 2 |f'(s)| sqrt(s / h): bounded for gamma >= 1 (the
Laplace/Matérn-1/2 case), unbounded as s -> 0 for gamma < 1. :meth:`RadialKernel.profile` of a
``singular`` kernel therefore returns a *guarded* f': below ``GUARD`` the magnitude is held at
min(m(s), m(GUARD)), the direction x_j - x_i untouched (so no pair is pushed sideways and the sum
over pairs stays antisymmetric), and below a numerical floor (where s from matmul distances has no
correct digits) the term shrinks linearly to 0 like a smooth kernel's. :meth:`exact_profile` gives
the unguarded values.

Kernels add: ``RBF() + Linear()``. The bandwidth is ``"median"`` (median heuristic,
h = med |x_i - x_j|^2 / log(N + 1), "Stein Variational Gradient Descent", arXiv:1608.04471) or a
positive number, in the sampler's (whitened) coordinates.
"""

from __future__ import annotations

import torch

from .bandwidth import check_bandwidth, median_bandwidth, squared_distances

__all__ = ["Kernel", "RadialKernel", "Sum", "GUARD"]

GUARD = 1e-4  # scaled squared distance below which singular kernels cap the pairwise term (r = 0.01 sqrt(h))


class Kernel:
    """Base class. Subclasses implement ``__call__(x, y)`` (the Gram matrix); their SVGD direction
    is registered by type in :mod:`stein_torch.stein.directions` (radial kernels share one)."""

    last_bandwidth: torch.Tensor | None = None  # (batch,) bandwidth of the last direction, when it has one

    def __call__(self, x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        raise NotImplementedError

    def __add__(self, other: "Kernel") -> "Sum":
        if not isinstance(other, Kernel):
            return NotImplemented
        left = self.parts if isinstance(self, Sum) else (self,)
        right = other.parts if isinstance(other, Sum) else (other,)
        return Sum(*left, *right)

    def state_dict(self) -> dict:
        """Settings and adaptive state as plain values (for checkpoints)."""
        return {}

    def load_state_dict(self, state: dict) -> None:
        pass

class RadialKernel(Kernel):
    """A kernel k(x, y) = f(|x - y|^2 / h). Subclasses define :meth:`profile` (and :meth:`curvature`
    for the kernel Stein discrepancy); set ``singular = True`` when f' is unbounded at s = 0."""

    singular = False

    def __init__(self, bandwidth="median"):
        self.bandwidth = check_bandwidth(bandwidth, type(self).__name__)
        self.last_bandwidth = None  # (batch,) tensor of the bandwidth used by the last update

    def exact_profile(self, s: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Return f(s) and f'(s), elementwise, in closed form (f' may be infinite at s = 0)."""
        raise NotImplementedError

    def profile(self, s: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Return f(s) and the f'(s) used by the SVGD update, elementwise.

        Equal to :meth:`exact_profile` for s >= ``GUARD``. For ``singular`` kernels and s < GUARD,
        |f'| is lowered to min(|f'(s)|, |f'(GUARD)| sqrt(GUARD / s)), so that the pairwise term
        2 |f'| sqrt(s / h) never exceeds its value at GUARD; s is floored at
        max(GUARD 1e-8, 100 eps) first, which keeps f' finite (the term then vanishes linearly at
        coincident points), and f is taken as f(0) below that floor, where s is rounding noise.
        f' keeps its sign, so each pair's term keeps its direction.
        """
        if not self.singular:
            return self.exact_profile(s)
        floor = max(GUARD * 1e-8, 100 * torch.finfo(s.dtype).eps)
        # below the floor s is rounding noise of the matmul distances (self-pairs come out ~1e-16, not
        # 0); fractional powers would amplify it (s^(1/4) = 1e-4), so f is taken at s = 0 there
        f = self.exact_profile(torch.where(s < floor, torch.zeros_like(s), s))[0]
        s_eff = s.clamp_min(floor)
        g = self.exact_profile(s_eff)[1]
        g_guard = self.exact_profile(torch.tensor(GUARD, dtype=s.dtype, device=s.device))[1]
        capped = torch.maximum(g, g_guard * (GUARD / s_eff).sqrt())  # both negative: max = smaller |.|
        return f, torch.where(s < GUARD, capped, g)

    def curvature(self, s: torch.Tensor) -> torch.Tensor:
        """Return f''(s), elementwise."""
        raise NotImplementedError

    def profile_(self, s: torch.Tensor, scratch, inv_h: torch.Tensor | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """:meth:`profile` for the SVGD engine, which owns ``s`` and lets it be overwritten.

        ``s`` holds squared distances from matmuls (they may dip a little below 0), scaled by
        ``inv_h`` (broadcastable, e.g. (B, 1, 1)) first when it is given. ``scratch`` (a
        :class:`stein_torch.stein.Scratch`) lends reusable buffers. Kernels with a cheap closed form
        compute in place in few passes; the default scales, clamps at 0 and calls :meth:`profile`.
        """
        if inv_h is not None:
            s = s.mul_(inv_h)
        return self.profile(s.clamp_min_(0))

    def stein_terms_(self, s: torch.Tensor, scratch) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """f(s), f'(s) and sum over the last two axes of f''(s) s, for the kernel Stein discrepancy;
        ``s`` (..., n, m) as in :meth:`profile_` (scaled), ``scratch`` as there."""
        s = s.clamp_min_(0)
        f, g = self.profile(s)
        return f, g, (self.curvature(s) * s).sum((-2, -1))

    def bandwidth_for(
        self, x: torch.Tensor, generator: torch.Generator | None = None, distances: torch.Tensor | None = None
    ) -> torch.Tensor:
        """Bandwidth h per batch for particles x (..., N, d) -> (...); ``distances`` as in
        :func:`median_bandwidth`."""
        if self.bandwidth == "median":
            h = median_bandwidth(x, generator, distances)
        else:
            h = torch.full(x.shape[:-2], self.bandwidth, dtype=x.dtype, device=x.device)
        self.last_bandwidth = h
        return h

    def __call__(self, x: torch.Tensor, y: torch.Tensor, bandwidth=None) -> torch.Tensor:
        """Gram matrix (..., n, m) for x (..., n, d), y (..., m, d)."""
        h = self._resolve(x, bandwidth)
        return self.profile(squared_distances(x, y) / h[..., None, None])[0]

    def gradient(self, x: torch.Tensor, y: torch.Tensor, bandwidth=None) -> torch.Tensor:
        """Gradient of k(x, y) in x: (..., n, m, d), with f' taken as 0 at coincident points."""
        h = self._resolve(x, bandwidth)[..., None, None]
        s = squared_distances(x, y) / h
        fprime = self.profile(s)[1]
        if self.singular:
            fprime = torch.where(s > 0, fprime, torch.zeros_like(fprime))
        return (2 / h[..., None]) * fprime[..., None] * (x[..., :, None, :] - y[..., None, :, :])

    def _resolve(self, x, bandwidth):
        if bandwidth is None:
            bandwidth = self.bandwidth if self.bandwidth != "median" else None
        if bandwidth is None:
            return median_bandwidth(x)
        return torch.as_tensor(bandwidth, dtype=x.dtype, device=x.device).expand(x.shape[:-2])

    def state_dict(self) -> dict:
        return {"bandwidth": self.bandwidth}

    def load_state_dict(self, state: dict) -> None:
        self.bandwidth = check_bandwidth(state["bandwidth"], type(self).__name__)

    def __repr__(self) -> str:
        return f"{type(self).__name__}(bandwidth={self.bandwidth!r})"


class Sum(Kernel):
    """Sum of kernels; its SVGD direction is the sum of the parts' directions."""

    def __init__(self, *parts: Kernel):
        if not parts or not all(isinstance(p, Kernel) for p in parts):
            raise TypeError("Sum: every part must be a stein_torch kernel")
        self.parts = tuple(parts)

    @property
    def last_bandwidth(self):
        """The bandwidth of the first part that has one."""
        return next((p.last_bandwidth for p in self.parts if p.last_bandwidth is not None), None)

    def __call__(self, x, y):
        return sum(part(x, y) for part in self.parts)

    def state_dict(self):
        return {"parts": [p.state_dict() for p in self.parts]}

    def load_state_dict(self, state):
        for part, s in zip(self.parts, state["parts"]):
            part.load_state_dict(s)

    def __repr__(self):
        return " + ".join(map(repr, self.parts))



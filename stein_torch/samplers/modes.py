"""Mode search from several starts, so that one minor mode cannot capture every particle.

From the first start (the origin of the unconstrained space, or the mean of the user's starting
values) the search is the single L-BFGS search the sampler always made; further starts are prior
draws (targets with priors) or N(0, 2^2 I) points, drawn from a generator of their own so that a
posterior with one mode gets exactly the start it had with a single search. Each end point is kept
as a mode when its log density is finite, its whitened gradient is small (a line search stopped
against a NaN region is not a mode) and it does not *run away*: a second short search from it
neither gains more than 0.5 in log density nor moves more than one whitened unit, and the curvature
there is negative definite. A density that grows without bound (the neck of a funnel) has no mode;
searches that run away are counted, not kept. End points within one whitened unit of a better mode
are the same mode.

Each mode's Laplace log mass is ``lp(m) + log det L`` (L L^T the inverse curvature); modes whose
mass would give less than half a particle are dropped. The search stops early after three starts in
a row that found nothing new, or when it has used ``budget`` score evaluations.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import torch

from .precondition import Affine, _FailuresAsNaN, find_mode, laplace_affine

__all__ = ["Mode", "ModeSearch", "search_modes", "allocate"]

STARTS = 8  # L-BFGS starts of the default set-up
EXTRA_SEARCH_ITERATIONS = 200
RUNAWAY_ITERATIONS = 50
RUNAWAY_GAIN = 0.5  # log density a second search may still gain at a mode
SAME_MODE = 1.0  # whitened distance within which two end points are one mode
STATIONARY = 0.1  # largest whitened gradient norm at a mode
PATIENCE = 3  # starts in a row without a new mode before the search stops
START_SCALE = 2.0  # sd of the dispersed starts without priors


@dataclass
class Mode:
    """A local maximum of the log density: position, height, Laplace map and mass."""

    z: torch.Tensor
    lp: float
    affine: Affine
    curvature_ok: bool
    log_mass: float
    hits: int = 1


@dataclass
class ModeSearch:
    """What the search found.

    Attributes
    ----------
    modes : list of Mode
        Distinct modes, highest log density first.
    runaways : int
        Searches whose log density kept growing (no mode).
    starts : int
        Searches made.
    evaluations : int
        Score evaluations the search used.
    """

    modes: list = field(default_factory=list)
    runaways: int = 0
    starts: int = 0
    evaluations: int = 0

    def kept(self, particles: int) -> list:
        """Modes whose Laplace mass is at least 1 / (2 particles) of the largest."""
        if not self.modes:
            return []
        top = max(m.log_mass for m in self.modes)
        return [m for m in self.modes if m.log_mass >= top - math.log(2 * particles)]


class _Counting:
    """A view of a target that counts evaluated points."""

    def __init__(self, target):
        self._target = target
        self.count = 0

    def __getattr__(self, name):
        return getattr(self._target, name)

    def log_prob_and_score(self, z):
        self.count += z.shape[:-1].numel()
        return self._target.log_prob_and_score(z)

    def log_prob(self, z):
        self.count += z.shape[:-1].numel()
        return self._target.log_prob(z)


def _log_prob(target, z: torch.Tensor) -> float:
    lp = target.log_prob(z[None])[0]
    return float(lp) if torch.isfinite(lp) else -math.inf


def _extra_starts(target, count: int, generator: torch.Generator, dtype, device) -> list[torch.Tensor]:
    if count <= 0:
        return []
    if target.initial is not None:
        try:
            draws = target.draw_initial(count, generator)
            z = target.unconstrain(draws, "init").to(dtype=dtype, device=device).reshape(count, target.dim)
            return list(z)
        except (ValueError, TypeError, RuntimeError):
            pass  # priors that cannot be drawn from: dispersed points instead
    return list(START_SCALE * torch.randn(count, target.dim, generator=generator, dtype=dtype).to(device))


def _whitened_norm(affine: Affine, dz: torch.Tensor) -> float:
    return float(torch.linalg.solve_triangular(affine.matrix, dz[:, None], upper=False).norm())


def _examine(safe, start: torch.Tensor, first: bool) -> tuple[Mode | None, bool]:
    """Search from ``start``; return (mode or None, ran away)."""
    if not first and not math.isfinite(_log_prob(safe, start)):
        return None, False
    z, ok = find_mode(safe, start) if first else find_mode(safe, start, max_iter=EXTRA_SEARCH_ITERATIONS)
    if not ok:
        return None, False
    lp = _log_prob(safe, z)
    if not math.isfinite(lp):
        return None, False
    affine, curvature_ok = laplace_affine(safe, z)
    _, score = safe.log_prob_and_score(z[None])
    if not bool(torch.isfinite(score).all()) or float((score[0] @ affine.matrix).norm()) > STATIONARY:
        return None, False  # stopped at a non-stationary point (e.g. against a NaN region)
    again, ok_again = find_mode(safe, z, max_iter=RUNAWAY_ITERATIONS)
    gain = _log_prob(safe, again) - lp if ok_again else 0.0
    moved = _whitened_norm(affine, again - z) if ok_again else 0.0
    if not curvature_ok or gain > RUNAWAY_GAIN or moved > SAME_MODE:
        return None, True
    log_mass = lp + float(torch.log(torch.diagonal(affine.matrix)).sum())
    return Mode(z.detach().clone(), lp, affine, curvature_ok, log_mass), False


def search_modes(target, first_start: torch.Tensor, starts: int, generator: torch.Generator, budget: int) -> ModeSearch:
    """L-BFGS from ``first_start`` (dim,) and up to ``starts - 1`` further starts drawn with ``generator``.

    Errors raised by the log density read as NaN. ``budget``: score evaluations after which no new
    search starts.
    """
    counting = _Counting(target)
    safe = _FailuresAsNaN(counting)
    dtype, device = first_start.dtype, first_start.device
    found = ModeSearch()
    points = [first_start]
    quiet = 0
    for i in range(starts):
        if i == 1:  # drawn only when a second start is due: the first search alone uses no randomness
            points += _extra_starts(target, starts - 1, generator, dtype, device)
        if i >= len(points) or (i > 0 and (counting.count >= budget or quiet >= PATIENCE)):
            break
        found.starts += 1
        mode, ran_away = _examine(safe, points[i], first=i == 0)
        found.runaways += ran_away
        new = mode is not None and _merge(found.modes, mode)
        quiet = 0 if new else quiet + 1
    found.modes.sort(key=lambda m: -m.lp)
    found.evaluations = counting.count
    return found


def _merge(modes: list, mode: Mode) -> bool:
    """Add ``mode`` unless it lies within one whitened unit of a known mode; True when it is new."""
    for known in modes:
        better, other = (known, mode) if known.lp >= mode.lp else (mode, known)
        if _whitened_norm(better.affine, other.z - better.z) < SAME_MODE:
            known.hits += 1  # the first end point found stays: the first start's mode is today's
            return False
    modes.append(mode)
    return True


def allocate(log_masses: list[float], n: int) -> list[int]:
    """Particles per mode in proportion to the masses, by largest remainder (they sum to ``n``)."""
    top = max(log_masses)
    weights = [math.exp(m - top) for m in log_masses]
    total = sum(weights)
    raw = [n * w / total for w in weights]
    counts = [int(math.floor(r)) for r in raw]
    order = sorted(range(len(raw)), key=lambda k: -(raw[k] - counts[k]))
    for k in order[: n - sum(counts)]:
        counts[k] += 1
    return counts

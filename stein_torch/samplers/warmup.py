"""NUTS warm-up: a step-size phase, doubling metric windows, a final step-size phase.

Iterations ``[0, opening)`` tune only the step size; ``[opening, warmup - closing)`` is cut into
metric windows of sizes ``w, 2w, 4w, ...`` (a window is stretched to the end of the span when the
next doubling would not fit; common practice); after each window the metric becomes the shrunk
pooled covariance of that window's draws (:mod:`.metric`), the step size is re-initialised by the
heuristic of "The No-U-Turn Sampler" (arXiv:1111.4246, Algorithm 4) and dual averaging restarts;
``[warmup - closing, warmup)`` tunes the step size for the final metric, and the averaged step size is
kept afterwards. Step sizes are per chain; the metric is shared by all chains (pooled draws).
"""

from __future__ import annotations

import math

import numpy as np
import torch

from ..checks import check_int
from .adaptation import DualAveraging
from .metric import DenseMetric, DiagonalMetric, PooledMoments, shrink_covariance, shrink_variances

__all__ = ["WarmupSchedule", "Warmup", "initial_step_size", "DEFAULT_OPENING", "DEFAULT_FIRST_WINDOW",
           "DEFAULT_CLOSING"]

# measured (docs/defaults.md): an opening of 25, 50 or 100 iterations gave the same post-warm-up step
# sizes and trajectory lengths on the test targets (50 keeps a margin for starts far from the bulk);
# a first window of 25 gives the first metric early, and at warmup >= 500 it ends as good as 10 or 50;
# after 100 closing iterations the averaged step size is within 14% (median over targets; worst 29%)
# of its value after 475, where 75 gave 21% (29%) and 150 gave 10% (23%).
DEFAULT_OPENING = 50
DEFAULT_FIRST_WINDOW = 25
DEFAULT_CLOSING = 100


class WarmupSchedule:
    """Where each warm-up iteration falls.

    Parameters
    ----------
    warmup : int
        Warm-up iterations; 0 (no adaptation) or at least ``opening + first_window + closing``.
    opening, first_window, closing : int
        Step-size-only iterations at the start, first metric window, step-size-only iterations at the end.

    Attributes
    ----------
    window_ends : list of int
        Iteration indices after which the metric is re-estimated.
    minimum : int
        The shortest warm-up this schedule fits in.
    """

    def __init__(self, warmup: int, opening: int = DEFAULT_OPENING, first_window: int = DEFAULT_FIRST_WINDOW,
                 closing: int = DEFAULT_CLOSING):
        check_int(warmup, "nuts: warmup", minimum=0)
        self.opening = check_int(opening, "nuts: opening", minimum=0)
        self.first_window = check_int(first_window, "nuts: first_window", minimum=1)
        self.closing = check_int(closing, "nuts: closing", minimum=1)  # the final metric needs a tuned step
        self.minimum = self.opening + self.first_window + self.closing
        if 0 < warmup < self.minimum:
            raise ValueError(
                f"nuts: warmup == {warmup}; expected 0 (no adaptation) or at least {self.minimum} iterations "
                f"(opening {self.opening} + first metric window {self.first_window} + closing {self.closing})")
        self.warmup = warmup
        self.window_ends: list[int] = []
        if warmup:
            start, size, stop = self.opening, self.first_window, warmup - self.closing
            while start < stop:
                end = start + size
                if end + 2 * size > stop:       # the next, doubled window would not fit: stretch this one
                    end = stop
                self.window_ends.append(end - 1)
                start, size = end, 2 * size

    def in_window(self, iteration: int) -> bool:
        """Whether the draw of ``iteration`` feeds the metric estimate."""
        return bool(self.window_ends) and self.opening <= iteration <= self.window_ends[-1]

    def __repr__(self) -> str:
        return (f"WarmupSchedule(warmup={self.warmup}, opening={self.opening}, first_window={self.first_window}, "
                f"closing={self.closing})")


class Warmup:
    """Adaptation state of one run: per-chain step sizes and a pooled metric estimate.

    Parameters
    ----------
    step_size : ndarray of shape (chains,)
        Starting step sizes (from :func:`initial_step_size`).
    dim : int
    schedule : WarmupSchedule
    metric_kind : {"diag", "dense"}
    acceptance_goal : float
    """

    def __init__(self, step_size: np.ndarray, dim: int, schedule: WarmupSchedule, metric_kind: str,
                 acceptance_goal: float):
        self.schedule, self.metric_kind = schedule, metric_kind
        self.step_size_rule = DualAveraging(step_size, acceptance_goal)
        self.moments = PooledMoments(dim, dense=metric_kind == "dense")
        self.iteration = 0
        self.last_shrinkage = float("nan")

    @property
    def done(self) -> bool:
        return self.iteration >= self.schedule.warmup

    def restart(self, step_size: np.ndarray) -> None:
        """Restart dual averaging around ``step_size`` (chains,) (after a new metric)."""
        self.step_size_rule.restart(step_size)

    def observe(self, position: torch.Tensor, accept_stat: np.ndarray):
        """Take one warm-up transition's draws (C, d) and acceptance statistics (C,).

        Returns
        -------
        step_size : ndarray of shape (C,)
            Step sizes for the next transition (the averaged ones after the last warm-up iteration).
        metric : DiagonalMetric or DenseMetric or None
            A new metric when a window just closed; the caller then re-initialises the step size
            (:func:`initial_step_size`) and calls :meth:`restart`.
        """
        i = self.iteration
        step_size = self.step_size_rule.update(accept_stat)
        metric = None
        if self.schedule.in_window(i):
            self.moments.update(position)
            if i in self.schedule.window_ends:
                metric = self._estimate(position.dtype, position.device)
                self.moments.reset()
        self.iteration += 1
        if self.done:
            step_size = self.step_size_rule.final
        return step_size, metric

    def _estimate(self, dtype: torch.dtype, device):
        count, covariance = self.moments.count, self.moments.covariance()
        if self.metric_kind == "dense":
            estimate, self.last_shrinkage = shrink_covariance(covariance, count)
            return DenseMetric(estimate.to(dtype=dtype, device=device))
        return DiagonalMetric(shrink_variances(covariance, count).to(dtype=dtype, device=device))

    def state_dict(self) -> dict:
        return {"iteration": self.iteration, "step_size_rule": self.step_size_rule.state_dict(),
                "moments": self.moments.state_dict(), "last_shrinkage": self.last_shrinkage}

    def load_state_dict(self, state: dict) -> None:
        self.iteration = int(state["iteration"])
        self.step_size_rule.load_state_dict(state["step_size_rule"])
        self.moments.load_state_dict(state["moments"])
        self.last_shrinkage = float(state["last_shrinkage"])


def initial_step_size(position: torch.Tensor, log_density: torch.Tensor, score: torch.Tensor, metric, evaluate,
                      generator: torch.Generator, start=1.0, max_rounds: int = 60) -> np.ndarray:
    """Per-chain step size where one leapfrog step's acceptance crosses 1/2 (arXiv:1111.4246, Alg. 4).

    Doubles (or halves) each chain's step size until ``exp(H0 - H1)`` crosses 1/2; a bad point counts
    as acceptance 0. Only the chains still searching are evaluated.

    Parameters
    ----------
    position, score : torch.Tensor, shape (C, d)
    log_density : torch.Tensor, shape (C,)
    metric, evaluate, generator
        As for :class:`~stein_torch.samplers.trajectory.NoUTurnTransition`.
    start : float or array of shape (C,)
    max_rounds : int
        Give up after this many doublings or halvings (the last value is returned).

    Returns
    -------
    ndarray of shape (C,)
    """
    n_chains, dtype, device = position.shape[0], position.dtype, position.device
    step = torch.as_tensor(np.asarray(start, dtype=np.float64), dtype=dtype).expand(n_chains).clone().to(device)
    momentum = metric.sample_momentum(n_chains, generator)
    energy0 = metric.kinetic_energy(momentum) - log_density
    log_half = math.log(0.5)

    def log_accept(rows: torch.Tensor) -> torch.Tensor:
        eps = step[rows][:, None]
        p = momentum[rows] + 0.5 * eps * score[rows]
        lp, grad, bad = evaluate(position[rows] + eps * metric.velocity(p))
        p = p + 0.5 * eps * grad
        value = energy0[rows] + lp - metric.kinetic_energy(p)
        return value.masked_fill(bad | value.isnan(), -torch.inf)

    rows = torch.arange(n_chains, device=device)
    first = log_accept(rows)
    direction = torch.where(first > log_half, 1.0, -1.0).to(dtype)   # +1: grow, -1: shrink
    for _ in range(max_rounds):
        if rows.numel() == 0:
            break
        step[rows] = step[rows] * torch.pow(2.0, direction[rows])
        value = log_accept(rows)
        crossed = direction[rows] * value <= direction[rows] * log_half
        rows = rows[~crossed]
    return step.cpu().numpy().astype(np.float64)

"""Step-size adaptation shared by the MCMC samplers: dual averaging, one step size per chain.

"The No-U-Turn Sampler", arXiv:1111.4246, section 3.2: the log step size follows
log eps_m = mu - sqrt(m) / gamma * mean_{k<=m}(target - a_k) / (1 + t0 / m), its iterates are averaged
with weight m^(-kappa), and the average is the step size kept after warm-up; mu = log(10 eps_0).
Constants from there: gamma = 0.05, t0 = 10, kappa = 0.75. Langevin adapts once from its first step
size; NUTS restarts the averaging around a fresh step size after every new metric (:meth:`restart`).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["DualAveraging"]


class DualAveraging:
    """Dual averaging of the log step size toward a target acceptance statistic, per chain.

    Parameters
    ----------
    step_size : ndarray of shape (chains,)
        Initial step sizes eps_0.
    target : float
        Acceptance statistic to reach (e.g. 0.574 for MALA, 0.8 for NUTS).
    gamma, t0, kappa : float
        Constants of arXiv:1111.4246, section 3.2.
    """

    def __init__(self, step_size: np.ndarray, target: float, gamma=0.05, t0=10.0, kappa=0.75):
        self.target, self.gamma, self.t0, self.kappa = target, gamma, t0, kappa
        self.restart(step_size)

    def restart(self, step_size: np.ndarray) -> None:
        """Start afresh around ``step_size`` (chains,): ``mu = log(10 step_size)``, no history."""
        step_size = np.asarray(step_size, dtype=np.float64)
        self.mu = np.log(10 * step_size)
        self.log_step = np.log(step_size)
        self.count = 0
        self.error_sum = np.zeros_like(self.mu)
        self.log_avg = np.zeros_like(self.mu)

    def update(self, accept: np.ndarray) -> np.ndarray:
        """Record one step's acceptance statistics (chains,); return the next step sizes.

        A NaN statistic counts as 0 (a faulty transition); values are clipped to [0, 1].
        """
        accept = np.clip(np.nan_to_num(np.asarray(accept, dtype=np.float64), nan=0.0), 0.0, 1.0)
        self.count += 1
        m = self.count
        self.error_sum += self.target - accept
        self.log_step = self.mu - math.sqrt(m) / self.gamma * self.error_sum / (m + self.t0)
        weight = m ** (-self.kappa)
        self.log_avg = weight * self.log_step + (1 - weight) * self.log_avg
        return np.exp(self.log_step)

    @property
    def final(self) -> np.ndarray:
        """The averaged step sizes, used after warm-up (the current ones before any update)."""
        return np.exp(self.log_avg) if self.count else np.exp(self.log_step)

    def state_dict(self) -> dict:
        return {"mu": self.mu.copy(), "count": self.count, "error_sum": self.error_sum.copy(),
                "log_avg": self.log_avg.copy(), "log_step": self.log_step.copy()}

    def load_state_dict(self, state: dict) -> None:
        self.mu = np.asarray(state["mu"], dtype=np.float64)
        self.count = int(state["count"])
        self.error_sum = np.asarray(state["error_sum"], dtype=np.float64)
        self.log_avg = np.asarray(state["log_avg"], dtype=np.float64)
        self.log_step = np.asarray(state.get("log_step", self.mu - math.log(10)), dtype=np.float64)

"""Step-size adaptation shared by the MCMC samplers: dual averaging, one step size per chain.

"The No-U-Turn Sampler", arXiv:1111.4246, section 3.2: the log step size follows
log eps_m = mu - sqrt(m) / gamma * mean_{k<=m}(target - a_k) / (1 + t0 / m), its iterates are averaged
with weight m^(-kappa), and the average is the step size kept after warm-up; mu = log(10 eps_0).
Constants from there: gamma = 0.05, t0 = 10, kappa = 0.75.
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
        Acceptance statistic to reach (e.g. 0.574 for MALA).
    """

    def __init__(self, step_size: np.ndarray, target: float, gamma=0.05, t0=10.0, kappa=0.75):
        self.mu = np.log(10 * np.asarray(step_size, dtype=np.float64))
        self.target, self.gamma, self.t0, self.kappa = target, gamma, t0, kappa
        self.count = 0
        self.error_sum = np.zeros_like(self.mu)
        self.log_avg = np.zeros_like(self.mu)

    def update(self, accept: np.ndarray) -> np.ndarray:
        """Record one step's acceptance statistics (chains,); return the next step sizes."""
        self.count += 1
        m = self.count
        self.error_sum += self.target - accept
        log_step = self.mu - math.sqrt(m) / self.gamma * self.error_sum / (m + self.t0)
        weight = m ** (-self.kappa)
        self.log_avg = weight * log_step + (1 - weight) * self.log_avg
        return np.exp(log_step)

    @property
    def final(self) -> np.ndarray:
        """The averaged step sizes, used after warm-up."""
        return np.exp(self.log_avg)

    def state_dict(self) -> dict:
        return {"mu": self.mu.copy(), "count": self.count, "error_sum": self.error_sum.copy(), "log_avg": self.log_avg.copy()}

    def load_state_dict(self, state: dict) -> None:
        self.mu = np.asarray(state["mu"], dtype=np.float64)
        self.count = int(state["count"])
        self.error_sum = np.asarray(state["error_sum"], dtype=np.float64)
        self.log_avg = np.asarray(state["log_avg"], dtype=np.float64)

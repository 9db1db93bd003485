"""Target-weighted kernels k_p(x, y) = k(x, y) / sqrt(p(x) p(y)).

With p the (unnormalised) target, the weighting w(x) = p(x)^(-1/2) turns a translation-invariant
kernel into one adapted to the target; in the gradient-flow analysis of SVGD such kernels (like
non-smooth ones) allow exponential convergence near equilibrium, which smooth translation-invariant
kernels cannot give ("On the geometry of Stein variational gradient descent", arXiv:1912.00894).

The SVGD direction with k_p. Since grad_{x_j} w_j = -(1/2) w_j s_j with s_j = grad log p(x_j),

    grad_{x_j} k_p(x_j, x_i) = w_i w_j [ grad_{x_j} k(x_j, x_i) - (1/2) k(x_j, x_i) s_j ],

    phi_i = (w_i / N) sum_j w_j [ (drive - 1/2) k_ij s_j + grad_{x_j} k_ij ],

one weighted pass of the radial engine (registered for this kernel in
:mod:`stein_torch.stein.directions`: ``score_coef = drive - 1/2``, weights ``w``). The weights come
from the log densities the sampler already has, in log space, divided by their maximum over each
ensemble: w_i = exp((min_j lp_j - lp_i) / 2) <= 1. The common factor only rescales the step (by a constant per step), it does not change the direction.

When it helps, and its cost
---------------------------
- Cost: the same O(N^2 d) pass as the base kernel plus O(N) for the weights; no extra score or
  log-density evaluation (the sampler passes both).
- It reweights particles by p^(-1/2): particles in low-density regions move fastest and push
  hardest, particles at the mode barely move. Near equilibrium (log densities within a few units)
  this is the regime the theory speaks to. Far from equilibrium the spread of log densities is
  large, the weights span many orders of magnitude, and the particles near the mode are nearly
  frozen (effective step exp(-Delta lp)); the flow is stiff, so pair it with
  :class:`stein_torch.samplers.steppers.Adaptive` or start near the target (the default Laplace start).
"""

from __future__ import annotations

import torch

from .base import Kernel, RadialKernel

__all__ = ["TargetWeighted", "target_weights"]


def target_weights(log_prob: torch.Tensor) -> torch.Tensor:
    """Weights p^(-1/2) divided by their maximum over the last axis: exp((min lp - lp) / 2).

    Parameters
    ----------
    log_prob : Tensor of shape (..., N)
        Unnormalised log densities (any additive constant cancels).

    Returns
    -------
    Tensor of shape (..., N), values in (0, 1]
    """
    return torch.exp(0.5 * (log_prob.amin(-1, keepdim=True) - log_prob))


class TargetWeighted(Kernel):
    """k(x, y) / sqrt(p(x) p(y)) for a radial base kernel k and the sampler's target p.

    Parameters
    ----------
    base : RadialKernel
        E.g. ``Matern(1.5)``; its bandwidth rule applies to the particles as usual.

    Examples
    --------
    >>> import stein_torch as st
    >>> kernel = st.kernels.TargetWeighted(st.kernels.Matern(nu=1.5))
    """

    def __init__(self, base: RadialKernel):
        if not isinstance(base, RadialKernel):
            raise TypeError(
                f"TargetWeighted: base must be a radial kernel (RBF, IMQ, Matern, GammaExponential), "
                f"got {type(base).__qualname__}"
            )
        self.base = base

    @property
    def last_bandwidth(self):
        return self.base.last_bandwidth

    def __call__(self, x, y, log_prob_x=None, log_prob_y=None, bandwidth=None):
        """Gram matrix (..., n, m) of k(x, y) exp(-(lp(x) + lp(y)) / 2), unrescaled.

        Parameters
        ----------
        x, y : Tensor of shape (..., n, d), (..., m, d)
        log_prob_x, log_prob_y : Tensor of shape (..., n), (..., m)
        """
        if log_prob_x is None or log_prob_y is None:
            raise ValueError("TargetWeighted: log_prob_x and log_prob_y (log densities of x and y) are required")
        k = self.base(x, y, bandwidth=bandwidth)
        return k * torch.exp(-0.5 * (log_prob_x[..., :, None] + log_prob_y[..., None, :]))

    def state_dict(self):
        return {"base": self.base.state_dict()}

    def load_state_dict(self, state):
        self.base.load_state_dict(state["base"])

    def __repr__(self):
        return f"TargetWeighted({self.base!r})"

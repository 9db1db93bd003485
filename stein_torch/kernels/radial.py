"""Radial kernels k(x, y) = f(|x - y|^2 / h) in closed form (handbook: "Gaussian Processes for
Machine Learning", ch. 4): RBF, inverse multiquadric, Matérn 1/2, 3/2, 5/2, gamma-exponential."""

from __future__ import annotations

import torch

from ..checks import check_choice, check_real
from .base import RadialKernel

__all__ = ["RBF", "IMQ", "Matern", "GammaExponential"]


class RBF(RadialKernel):
    """Squared-exponential kernel exp(-|x - y|^2 / h)."""

    def exact_profile(self, s):
        f = torch.exp(-s)
        return f, -f

    def curvature(self, s):
        return torch.exp(-s)


class IMQ(RadialKernel):
    """Inverse multiquadric (c^2 + |x - y|^2 / h)^beta with beta in (-1, 0).

    With c = 1, beta = -1/2 and h = 1 it is the kernel for which the kernel Stein discrepancy detects
    non-convergence ("Measuring Sample Quality with Kernels", arXiv:1703.01717).
    """

    def __init__(self, c: float = 1.0, beta: float = -0.5, bandwidth="median"):
        super().__init__(bandwidth)
        self.c = check_real(c, "IMQ: c", low=0, low_open=True)
        self.beta = check_real(beta, "IMQ: beta", low=-1, high=0, low_open=True, high_open=True)

    def exact_profile(self, s):
        base = s + self.c**2
        if self.beta == -0.5:  # the usual choice: rsqrt is several times faster than pow
            f = base.rsqrt()
            return f, (f * f).mul_(f).mul_(self.beta)
        f = base.pow(self.beta)
        return f, self.beta * f / base

    def curvature(self, s):
        base = self.c**2 + s
        return self.beta * (self.beta - 1) * base.pow(self.beta - 2)

    # beta = -1/2: f = (c^2 + s)^(-1/2), f' = -f^3 / 2, f'' = 3 f^5 / 4, in place and in scratch buffers
    def profile_(self, s, scratch, inv_h=None):
        if self.beta != -0.5:
            return super().profile_(s, scratch, inv_h)
        # c^2 + s inv_h (no clamp needed: c^2 > 0 absorbs rounding below 0); torch.addcmul with
        # broadcast factors measured 3-6x slower than the two in-place passes
        base = (s if inv_h is None else s.mul_(inv_h)).add_(self.c**2)
        f = base.rsqrt_()
        g = torch.pow(f, 3, out=scratch.buffer("fprime", f))
        return f, g.mul_(self.beta)

    def stein_terms_(self, s, scratch):
        if self.beta != -0.5:
            return super().stein_terms_(s, scratch)
        s = s.clamp_min_(0)
        f = torch.add(s, self.c**2, out=scratch.buffer("value", s)).rsqrt_()
        g = torch.mul(f, f, out=scratch.buffer("fprime", s)).mul_(f)  # f^3
        curvature_s = s.mul_(g).mul_(f).mul_(f).sum((-2, -1)).mul_(0.75)  # sum of 3/4 f^5 s
        return f, g.mul_(-0.5), curvature_s

    def state_dict(self):
        return {**super().state_dict(), "c": self.c, "beta": self.beta}

    def __repr__(self):
        return f"IMQ(c={self.c}, beta={self.beta}, bandwidth={self.bandwidth!r})"


class Matern(RadialKernel):
    """Matérn kernel with smoothness nu in {0.5, 1.5, 2.5}, in t = sqrt(2 nu s) = sqrt(2 nu) r / sqrt(h).

    Same as scikit-learn's ``Matern(length_scale=sqrt(h), nu=nu)`` (handbook: "Gaussian Processes for
    Machine Learning", ch. 4, eq. 4.16-4.17):

    - nu = 1/2: exp(-t), the Laplace kernel; f'(s) = -e^{-t} / (2t) is unbounded at s = 0 but the
      pairwise term has bounded magnitude e^{-t} / sqrt(h) (guarded like any ``singular`` kernel);
    - nu = 3/2: (1 + t) e^{-t}, f' = -(3/2) e^{-t}, finite at 0, so the gradient at r = 0 is 0;
    - nu = 5/2: (1 + t + t^2 / 3) e^{-t}, f' = -(5/6)(1 + t) e^{-t}.
    """

    def __init__(self, nu: float = 1.5, bandwidth="median"):
        super().__init__(bandwidth)
        self.nu = check_choice(check_real(nu, "Matern: nu"), "Matern: nu", (0.5, 1.5, 2.5))
        self.singular = self.nu == 0.5

    def exact_profile(self, s):
        t = (2 * self.nu * s).sqrt()
        e = torch.exp(-t)
        if self.nu == 0.5:
            return e, -e / (2 * t)
        if self.nu == 1.5:
            return (1 + t) * e, -1.5 * e
        return (1 + t + t * t / 3) * e, -(5 / 6) * (1 + t) * e

    def curvature(self, s):
        t = (2 * self.nu * s).sqrt()
        e = torch.exp(-t)
        if self.nu == 0.5:
            return e * (1 + t) / (4 * t.pow(3))  # d/ds of -e^{-t}/(2t) with t = sqrt(s)
        if self.nu == 1.5:
            # d/ds of -1.5 e^{-t}, dt/ds = 3 / (2t): infinite at s = 0, where the kernel Stein
            # discrepancy only uses it multiplied by s (limit 0); return 0 there to avoid inf * 0.
            return torch.where(t > 0, 1.5 * e * 3 / (2 * t.clamp_min(torch.finfo(s.dtype).tiny)), torch.zeros_like(t))
        return (25 / 12) * e  # d/ds of -(5/6)(1+t)e^{-t} = (5/6) t e^{-t} dt/ds, dt/ds = 5 / (2t)

    def state_dict(self):
        return {**super().state_dict(), "nu": self.nu}

    def __repr__(self):
        return f"Matern(nu={self.nu}, bandwidth={self.bandwidth!r})"


class GammaExponential(RadialKernel):
    """Gamma-exponential kernel exp(-(r / l)^gamma) = exp(-s^(gamma/2)), l = sqrt(h), 0 < gamma <= 2.

    Handbook: "Gaussian Processes for Machine Learning", ch. 4 (eq. 4.18). gamma = 2 is the RBF,
    gamma = 1 the Laplace kernel (= Matérn 1/2 up to the length scale). For gamma < 2,
    f'(s) = -(gamma/2) s^(gamma/2 - 1) f(s) is unbounded at s = 0. The self-pair contributes nothing;
    for gamma < 1 even the pairwise term is unbounded near 0 and is capped at its value at
    s = ``GUARD`` keeping its direction (see :meth:`RadialKernel.profile`).

    Parameters
    ----------
    gamma : float, default=1.0
        Exponent in (0, 2].
    bandwidth : "median" or float, default="median"
    """

    def __init__(self, gamma: float = 1.0, bandwidth="median"):
        super().__init__(bandwidth)
        self.gamma = check_real(gamma, "GammaExponential: gamma", low=0, high=2, low_open=True)
        self.singular = self.gamma < 2

    def exact_profile(self, s):
        a = self.gamma / 2
        f = torch.exp(-s.pow(a))
        return f, -a * s.pow(a - 1) * f

    def curvature(self, s):
        a = self.gamma / 2
        if a == 1:
            return torch.exp(-s)
        p = s.pow(a)
        f = torch.exp(-p)
        return a * f * s.pow(a - 2) * (a * p - (a - 1))

    def state_dict(self):
        return {**super().state_dict(), "gamma": self.gamma}

    def __repr__(self):
        return f"GammaExponential(gamma={self.gamma}, bandwidth={self.bandwidth!r})"



"""Kernels for Stein variational gradient descent.

==========================  ==========================================  =========================
kernel                      k(x, y), s = |x - y|^2 / h                  note
==========================  ==========================================  =========================
``RBF()``                   exp(-s)                                     smooth
``IMQ(c, beta)``            (c^2 + s)^beta, beta in (-1, 0)             heavy tails, KSD default
``Matern(nu)``              Matérn 1/2, 3/2, 5/2 in t = sqrt(2 nu s)    rough for small nu
``GammaExponential(g)``     exp(-s^(g/2)), 0 < g <= 2                   g = 2 is the RBF
``Linear()``                x~ . y~ + 1 on standardised coordinates     fixes first two moments
``TargetWeighted(k)``       k(x, y) / sqrt(p(x) p(y))                   target-adapted
==========================  ==========================================  =========================

Kernels add: ``IMQ() + Linear(radius=2.0)`` is the sampler's default. Formulas from the handbook
"Gaussian Processes for Machine Learning", ch. 4; the bandwidth rule in :mod:`.bandwidth`.
"""

from .base import Kernel, RadialKernel, Sum
from .linear import Linear
from .radial import IMQ, RBF, GammaExponential, Matern
from .weighted import TargetWeighted

__all__ = ["Kernel", "RadialKernel", "Sum", "RBF", "IMQ", "Matern", "GammaExponential", "Linear", "TargetWeighted"]

"""stein_torch: posterior samples from any torch log density by Stein variational gradient descent.

>>> import stein_torch as st
>>> target = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=2)
>>> run = st.sample(target, particles=100, steps=200, seed=0)
>>> run.draws["x"].shape
torch.Size([1, 100, 2])
"""

from . import io, kernels, schedules, steppers
from .data import ObservedData
from .io import load
from .predict import PredictiveBands, predictive_interval
from .compare import compare
from .langevin import langevin
from .result import Result
from .sample import Sampler, sample
from .stein import ksd, svgd_direction
from .stopping import StopRule
from .target import Param, Target

__version__ = "0.1.0"

__all__ = [
    "ObservedData",
    "Param",
    "PredictiveBands",
    "Result",
    "Sampler",
    "StopRule",
    "Target",
    "compare",
    "io",
    "kernels",
    "ksd",
    "langevin",
    "load",
    "predictive_interval",
    "sample",
    "schedules",
    "steppers",
    "svgd_direction",
    "__version__",
]

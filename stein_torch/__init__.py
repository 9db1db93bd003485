"""stein_torch: posterior samples from any torch log density by Stein variational gradient descent.

>>> import stein_torch as st
>>> target = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=2)
>>> run = st.svgd(target, particles=100, steps=200, seed=0)
>>> run.draws["x"].shape
torch.Size([1, 100, 2])
"""

from . import io, kernels
from ._version import __version__
from .crosscheck import Crosscheck, crosscheck
from .files import load
from .model import Latent, ObservedData, SamplerDefaults, Target
from .race import race
from .result import PredictiveBands, Result, predictive_interval, prior_predictive
from .samplers import NUTS, Langevin, RankFailure, Sampler, Sharding, StopRule, langevin, nuts, schedules, steppers, svgd
from .stein import ksd, svgd_direction

__all__ = [
    "Crosscheck",
    "Latent",
    "Langevin",
    "NUTS",
    "ObservedData",
    "PredictiveBands",
    "RankFailure",
    "Result",
    "Sampler",
    "SamplerDefaults",
    "Sharding",
    "StopRule",
    "Target",
    "crosscheck",
    "io",
    "kernels",
    "ksd",
    "langevin",
    "load",
    "nuts",
    "predictive_interval",
    "prior_predictive",
    "race",
    "schedules",
    "steppers",
    "svgd",
    "svgd_direction",
    "__version__",
]

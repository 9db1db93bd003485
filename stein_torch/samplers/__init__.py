"""Samplers on a Target: SVGD, NUTS, Langevin (MALA/ULA); their shared set-up, fault containment and loop.

Every sampler follows the same path: :mod:`.setup` (settings, whitening, starting points) ->
:mod:`.faults` (contained evaluation) -> its own ``step()`` -> :mod:`.loop` (progress, Ctrl-C,
checkpoints, history) -> :class:`~stein_torch.result.Result`.
"""

from . import schedules, steppers
from .comm import RankFailure
from .distributed import Sharding
from .langevin import Langevin, langevin
from .nuts import NUTS, nuts
from .stopping import StopRule
from .svgd import Sampler, svgd

__all__ = ["svgd", "Sampler", "langevin", "Langevin", "nuts", "NUTS", "StopRule", "Sharding", "RankFailure",
           "schedules", "steppers"]

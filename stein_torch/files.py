"""``st.load``: a saved result or a checkpoint of any sampler, read back as a Result without running code."""

from __future__ import annotations

import os
from typing import Mapping

import numpy as np

from . import io
from .checks import check_type
from .model import Target
from .result import Result
from .result.files import RESULT_FORMAT
from .samplers import NUTS, Langevin, Sampler

__all__ = ["load"]

# the sampler that reads each method's checkpoints (its ``result_from_state``)
CHECKPOINT_READERS = {"svgd": Sampler, "mala": Langevin, "ula": Langevin, "nuts": NUTS}


def load(path, target) -> Result:
    """Read a saved result (``Result.save``) or a checkpoint as a :class:`~stein_torch.Result`.

    Parameters
    ----------
    path : str or os.PathLike
    target : Target
        The model the file was written for (its log density is code and is never stored);
        names, shapes and supports must match.

    Returns
    -------
    Result
        For a checkpoint: the particles (or draws) at the step it was written.
    """
    check_type(target, "target", Target, "stein_torch.Target")
    if isinstance(path, (str, os.PathLike)) and os.fspath(path).endswith(".nc"):
        raise ValueError("path: NetCDF files hold InferenceData; read them with arviz.from_netcdf")
    obj = io.load_plain(path, (RESULT_FORMAT, io.CHECKPOINT_FORMAT), "path")
    target.check_signature(obj.get("target"), "path")
    if obj["format"] == RESULT_FORMAT:
        return result_from_file(obj, target)
    method = obj.get("method")
    if method not in CHECKPOINT_READERS:
        raise ValueError(f"path: a checkpoint of an unknown method {method!r}; known: {sorted(CHECKPOINT_READERS)}")
    return CHECKPOINT_READERS[method].result_from_state(target, obj)


def result_from_file(obj: Mapping, target) -> Result:
    """A :class:`Result` from the dict of a saved result file (signature already checked)."""
    as_numpy = lambda d: {k: np.asarray(v) for k, v in (d or {}).items()}  # noqa: E731
    return Result(
        target, obj["particles"], obj["lp"], as_numpy(obj["history"]), dict(obj["settings"]),
        obj["stop_reason"], as_numpy(obj["sample_stats"]), list(obj.get("warnings", [])),
    )

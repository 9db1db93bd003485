"""A :class:`~stein_torch.result.Result` as :class:`arviz.InferenceData`.

Groups: ``posterior`` (one variable per latent, dims chain, draw, *shape; for SVGD chain = ensemble,
draw = particle), ``sample_stats`` (``lp`` per draw and the sampler's own statistics), attrs with the
library name, version, settings, stop reason and warnings. For targets with data:
``log_likelihood`` (per-observation terms on the full data, dims chain, draw, obs: what
:func:`arviz.loo` reads), ``observed_data`` and ``constant_data``.
"""

from __future__ import annotations

import numpy as np

from .._version import __version__
from ..model.data import likelihood_groups
from .predictive import predictions_group

__all__ = ["to_inference_data"]


def to_inference_data(result, **groups):
    """Convert ``result`` to :class:`arviz.InferenceData` (see :meth:`Result.to_inference_data`)."""
    import arviz as az

    posterior = {k: v.cpu().numpy() for k, v in result.draws.items()}
    dims = {k: [f"{k}_dim_{i}" for i in range(v.dim() - 2)] for k, v in result.draws.items()}
    stats = {"lp": result.lp.cpu().numpy(), **result.sample_stats}
    attrs = {"inference_library": "stein_torch", "inference_library_version": __version__}
    attrs.update({k: attr_value(v) for k, v in result.settings.items()})
    attrs["stop_reason"] = result.stop_reason
    if result.warnings:
        attrs["warnings"] = np.asarray([str(w) for w in result.warnings], dtype=object)  # NetCDF: variable-length strings
    if result.target.data is not None:
        if result._likelihood is None:  # pointwise terms on the full data, computed once
            result._likelihood = likelihood_groups(result.target, result.particles)
        for group, values in result._likelihood["groups"].items():
            groups.setdefault(group, values)
        dims.update({k: v for k, v in result._likelihood["dims"].items() if k not in dims})
    if groups.get("predictions") is not None and "pred_dims" not in groups:
        groups["predictions"], groups["pred_dims"] = predictions_group(result, groups["predictions"])
    return az.from_dict(
        posterior=posterior, sample_stats=stats, dims=dims, attrs=attrs, posterior_attrs=attrs,
        sample_stats_attrs=attrs, **groups,
    )


def attr_value(value):
    """NetCDF attributes must be strings or numbers."""
    if isinstance(value, (bool, np.bool_)):
        return int(value)
    if isinstance(value, (int, float, str, np.integer, np.floating)):
        return value
    if isinstance(value, (list, tuple)) and value and all(isinstance(v, (int, float)) for v in value):
        return np.asarray(value)  # NetCDF keeps 1-D numeric attributes (e.g. the final KSD per ensemble)
    return str(value)

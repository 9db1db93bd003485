"""A :class:`~stein_torch.result.Result` as :class:`arviz.InferenceData`.

Groups: ``posterior`` (one variable per latent, dims chain, draw, *latent dims; for SVGD chain =
ensemble, draw = particle), ``sample_stats`` (``lp`` per draw and the sampler's own statistics), attrs
with the library name, version, settings, stop reason and warnings. For targets with data:
``log_likelihood`` (per-observation terms on the full data, dims chain, draw, obs: what
:func:`arviz.loo` reads), ``observed_data`` and ``constant_data``, and ``posterior_predictive`` (one
simulated data set per draw) when the likelihood returns a torch Distribution.

Dimension names: a latent's ``Latent(dims=...)`` (default ``<name>_dim_<i>``); ``obs`` for the
observation axis of data, log-likelihood and simulated data. ``dims=`` and ``coords=`` are passed to
:func:`arviz.from_dict`; ``dims`` entries replace the defaults of the variables they name.
"""

from __future__ import annotations

import numpy as np

from .._version import __version__
from ..model.data import likelihood_groups
from .dims import check_coords, merge_dims
from .predictive import predictions_group
from .predictive_checks import posterior_predictive_group

__all__ = ["to_inference_data"]


def to_inference_data(result, *, coords=None, dims=None, predictive_seed=None, **groups):
    """Convert ``result`` to :class:`arviz.InferenceData` (see :meth:`Result.to_inference_data`)."""
    import arviz as az

    coords = check_coords(coords)
    posterior = {k: v.cpu().numpy() for k, v in result.draws.items()}
    ours = {k: list(d) for k, d in result.target.dims.items()}
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
        ours.update({k: v for k, v in result._likelihood["dims"].items() if k not in ours})
        if groups.get("posterior_predictive") is None:
            key = predictive_seed if predictive_seed is not None else "run seed"
            if key not in result._simulated:  # one simulation per seed, reused by later calls
                result._simulated[key] = posterior_predictive_group(result, predictive_seed)
            if result._simulated[key] is not None:
                groups["posterior_predictive"], pp_dims = result._simulated[key]
                ours.update({k: v for k, v in pp_dims.items() if k not in ours})
    if groups.get("predictions") is not None and "pred_dims" not in groups:
        groups["predictions"], groups["pred_dims"] = predictions_group(result, groups["predictions"])
    groups = {k: v for k, v in groups.items() if v is not None}
    return az.from_dict(
        posterior=posterior, sample_stats=stats, coords=coords, dims=merge_dims(ours, dims), attrs=attrs,
        posterior_attrs=attrs, sample_stats_attrs=attrs, **groups,
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

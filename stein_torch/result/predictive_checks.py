"""Simulated data sets for predictive checks: the ``posterior_predictive``, ``prior`` and
``prior_predictive`` groups.

When a target's ``log_likelihood(p, data)`` returns a :class:`torch.distributions.Distribution` over
the observed key, the same definition simulates: one data set per draw (particle), ``sample()`` of
the distribution at that draw's parameters on the full data. Sampling is seeded (a forked torch RNG,
so the caller's global generator is untouched): the same seed gives the same data sets.

Examples
--------
>>> idata = run.to_inference_data()                       # posterior_predictive filled
>>> idata.extend(st.prior_predictive(target, draws=500, seed=1))
>>> arviz.plot_ppc(idata); arviz.loo_pit(idata, y="y")
"""

from __future__ import annotations

import functools
import math
from typing import Mapping

import numpy as np
import torch
from torch.distributions import Distribution

from ..checks import check_int
from ..model import Target
from ..model.data import data_dims
from ..model.likelihood import simulated_key
from .dims import check_coords, merge_dims

__all__ = ["simulate", "posterior_predictive_group", "prior_predictive"]

SIMULATE_ELEMENTS = 2**22  # draws x observations simulated at once


def _sample(dist: Distribution, shape: tuple) -> torch.Tensor:
    """One draw of ``dist`` of the given shape, expanding a batch that only broadcasts to the data
    (e.g. ``Normal(mu[..., None], sigma)`` scores every observation but samples one)."""
    batch = torch.Size(shape[: len(shape) - len(dist.event_shape)])
    if dist.batch_shape != batch:
        try:
            dist = dist.expand(batch)
        except (RuntimeError, ValueError, NotImplementedError):
            pass  # the shape check of the caller names the mismatch
    return dist.sample()


def _simulate_chunk(target, values: dict, full: dict, key: str) -> torch.Tensor:
    """Data sets (m, n_obs, ...) for m parameter values; a batched call, else one call per value."""
    m = next(iter(values.values())).shape[0]
    want = (m, *full[key].shape)
    arg = values["x"] if target.flat else values
    try:
        out = target.log_likelihood(arg, full)
        if isinstance(out, Distribution):
            draws = _sample(out, want)
            if tuple(draws.shape) == want:
                return draws
    except Exception:  # a likelihood written for one value may fail on a batch: call it per value
        pass
    rows = []
    for i in range(m):  # not a hot path: once per draw after sampling, when the function is not batched
        one = values["x"][i] if target.flat else {k: v[i] for k, v in values.items()}
        dist = target.log_likelihood(one, full)
        if not isinstance(dist, Distribution):
            raise TypeError(f"log_likelihood must return a torch Distribution to simulate, got {type(dist).__qualname__}")
        rows.append(_sample(dist, want[1:]))
    draws = torch.stack(rows)
    if tuple(draws.shape) != want:
        raise ValueError(
            f"log_likelihood's distribution simulated shape {tuple(draws.shape[1:])} per draw; data[{key!r}] has "
            f"shape {tuple(full[key].shape)}"
        )
    return draws


def simulate(target, values: Mapping[str, torch.Tensor], seed: int, max_elements: int = SIMULATE_ELEMENTS) -> dict:
    """One simulated data set per parameter value.

    Parameters
    ----------
    target : Target
        Built with ``data=``, ``observed=`` and a ``log_likelihood`` that returns a Distribution.
    values : dict of str to Tensor of shape (*batch, *shape)
        Constrained parameter values (e.g. the draws (chains, draws, *shape)).
    seed : int
        Seed of the simulation.

    Returns
    -------
    dict
        ``{key: ndarray (*batch, n_obs, ...)}`` for the observed key, in the observations' dtype when
        they are integers (counts, labels) and the simulated values are whole numbers.
    """
    data = target.data
    key = simulated_key(data)
    first_name = next(iter(values))
    batch = values[first_name].shape[: values[first_name].dim() - len(target.shapes[first_name])]
    n = math.prod(batch)
    flat = {k: v.reshape(n, *v.shape[len(batch):]) for k, v in values.items()}
    dtype = flat[first_name].dtype if flat[first_name].is_floating_point() else torch.get_default_dtype()
    full = data.cast(dtype, flat[first_name].device)
    chunk = max(1, max_elements // max(1, data.n_obs))
    parts = []
    with torch.no_grad(), torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        for start in range(0, n, chunk):
            part = {k: v[start : start + chunk] for k, v in flat.items()}
            parts.append(_simulate_chunk(target, part, full, key).cpu())
    draws = torch.cat(parts).reshape(*batch, *full[key].shape)
    observed = data.tensors[key]
    if not observed.is_floating_point() and bool((draws == draws.round()).all()):
        draws = draws.to(observed.dtype)
    return {key: draws.numpy()}


def _can_simulate(target) -> bool:
    return target.data is not None and bool(target.data.simulates)


def posterior_predictive_group(result, seed: int | None = None) -> tuple[dict, dict] | None:
    """The ``posterior_predictive`` group of ``result`` and its dims, or None when the likelihood
    cannot simulate. ``seed`` defaults to the run's own seed."""
    if not _can_simulate(result.target):
        return None
    if seed is None:
        seed = result.settings.get("seed")
        seed = int(seed) if isinstance(seed, (int, np.integer)) else 0
    group = simulate(result.target, result.draws, check_int(seed, "predictive_seed", minimum=0))
    return group, {k: data_dims(k, v.ndim - 2) for k, v in group.items()}


def prior_predictive(target, draws: int = 500, seed: int = 0, *, coords=None, dims=None):
    """Draws from the prior, and data sets simulated from them, as :class:`arviz.InferenceData`.

    Parameters
    ----------
    target : Target
        A target whose prior can be drawn: built by :meth:`Target.from_priors` (or with ``initial=``).
    draws : int, default=500
        Prior draws (one chain).
    seed : int, default=0
        Same seed, same draws and data sets.
    coords, dims : dict, optional
        Passed to :func:`arviz.from_dict` (as for :meth:`Result.to_inference_data`).

    Returns
    -------
    arviz.InferenceData
        ``prior`` (one variable per latent, dims chain, draw, *latent dims); with data also
        ``observed_data`` and ``constant_data``, and ``prior_predictive`` (one simulated data set per
        draw) when ``log_likelihood`` returns a torch Distribution. Ready for ``idata.extend(...)``.
    """
    import arviz as az

    if not isinstance(target, Target):
        raise TypeError(f"prior_predictive: target must be a stein_torch.Target, got {type(target).__qualname__}")
    draws = check_int(draws, "prior_predictive: draws")
    seed = check_int(seed, "prior_predictive: seed", minimum=0)
    if target.initial is None:
        raise ValueError(
            "prior_predictive: this target has no prior to draw from; build it with Target.from_priors "
            "(or give Target an initial= function that draws from the prior)"
        )
    values = target.draw_initial(draws, torch.Generator().manual_seed(seed))
    values = {k: torch.as_tensor(values[k]).detach().reshape(1, draws, *target.shapes[k]) for k in target.names}
    floating = [v.dtype for v in values.values() if v.is_floating_point()]
    if floating:  # priors given with Python floats draw float32: simulate in the widest dtype among them
        widest = functools.reduce(torch.promote_types, floating)
        values = {k: v.to(widest) if v.is_floating_point() else v for k, v in values.items()}
    groups = {"prior": {k: v.cpu().numpy() for k, v in values.items()}}
    our_dims = {k: list(d) for k, d in target.dims.items()}
    if target.data is not None:
        observed, constant = target.data.groups()
        if observed:
            groups["observed_data"] = observed
        if constant:
            groups["constant_data"] = constant
        for k, v in {**observed, **constant}.items():
            our_dims[k] = data_dims(k, v.ndim)
        if target.data.simulates is None:  # not called yet: one call on the first draw tells
            _probe(target, values)
        if target.data.simulates:
            groups["prior_predictive"] = simulate(target, values, seed + 1)
    return az.from_dict(**groups, coords=check_coords(coords), dims=merge_dims(our_dims, dims),
                        attrs={"inference_library": "stein_torch", "prior_draws": draws, "seed": seed})


def _probe(target, values: dict) -> None:
    """Call the likelihood once (first draw) so the target knows whether it returns a Distribution."""
    first = {k: v[0, :1] for k, v in values.items()}
    dtype = next(iter(first.values())).dtype
    full = target.data.cast(dtype if dtype.is_floating_point else torch.get_default_dtype())
    with torch.no_grad():
        try:
            out = target.log_likelihood(first["x"] if target.flat else first, full)
        except Exception:  # written for one value
            one = {k: v[0] for k, v in first.items()}
            out = target.log_likelihood(one["x"] if target.flat else one, full)
    target.data.simulates = isinstance(out, Distribution)

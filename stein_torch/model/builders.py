"""Targets built from prior distributions: the priors' supports give the latents, their samples a start."""

from __future__ import annotations

from typing import Callable, Mapping

import torch
from torch.distributions import Distribution

from .latent import Latent

__all__ = ["from_priors"]


def from_priors(
    cls,
    priors: Mapping[str, Distribution],
    log_likelihood: Callable | None = None,
    *,
    data: Mapping | None = None,
    batch_size: int | None = None,
    observed=None,
    dims: Mapping[str, tuple] | None = None,
):
    """Build a target from prior distributions and a log likelihood (``Target.from_priors``).

    Parameters
    ----------
    cls : type
        :class:`stein_torch.Target`.
    priors : dict of str to torch.distributions.Distribution
        One prior per latent. Its ``support`` gives the latent's support and
        ``batch_shape + event_shape`` its shape; its samples can start the particles
        (``init="prior"``).
    log_likelihood : callable, optional
        ``log_likelihood(p) -> (...)`` for a dict of constrained values with leading batch dims;
        with ``data``, ``log_likelihood(p, data) -> (..., n_obs)`` per observation, or a torch
        Distribution over ``data[observed]`` (then the target can simulate data: predictive checks).
    data, batch_size, observed
        As in :class:`stein_torch.Target`.
    dims : dict of str to tuple of str, optional
        ArviZ dimension names of a latent's axes, e.g. ``{"effect": ("school",)}`` (see :class:`Latent`).

    Returns
    -------
    Target
    """
    if not isinstance(priors, Mapping) or not priors:
        raise TypeError("Target.from_priors: priors must be a non-empty dict of name -> Distribution")
    for name, prior in priors.items():
        if not isinstance(prior, Distribution):
            raise TypeError(
                f"Target.from_priors: priors[{name!r}] must be a torch Distribution, got {type(prior).__qualname__}"
            )
    if log_likelihood is not None and not callable(log_likelihood):
        raise TypeError("Target.from_priors: log_likelihood must be callable")
    dims = dict(dims or {})
    unknown = sorted(set(dims) - set(priors))
    if unknown:
        raise ValueError(f"Target.from_priors: dims names {unknown}, which are not among the priors {sorted(priors)}")
    latents = {name: Latent(tuple(d.batch_shape + d.event_shape), d.support, dims=dims.get(name))
               for name, d in priors.items()}

    def log_joint(p):
        total = 0.0
        for name, d in priors.items():
            lp = d.log_prob(p[name])
            if d.batch_shape:
                lp = lp.flatten(lp.dim() - len(d.batch_shape)).sum(-1)
            total = total + lp
        return total if log_likelihood is None or data is not None else total + log_likelihood(p)

    def initial(n, generator):
        with torch.random.fork_rng():
            torch.manual_seed(int(torch.randint(2**62, (), generator=generator)))
            return {name: d.sample((n,)) for name, d in priors.items()}

    if data is None:
        return cls(log_joint, latents=latents, initial=initial)
    return cls(
        log_joint, latents=latents, initial=initial, log_likelihood=log_likelihood, data=data,
        batch_size=batch_size, observed=observed,
    )

"""What a user's likelihood returns: per-observation terms, or a distribution over the observations.

``log_likelihood(p, data)`` may return

- a tensor of shape (*batch, n_obs): one log-likelihood term per observation; or
- a :class:`torch.distributions.Distribution` over the observed key (``observed="y"``), whose
  ``log_prob(data["y"])`` gives the terms, and whose ``sample()`` simulates a new data set at each
  parameter value (posterior and prior predictive checks).

A distribution gives one term per observation when its batch shape ends with the observation axis
(``Normal(mean, sigma)`` with ``mean`` of shape (*batch, n_obs)). An :class:`~torch.distributions.Independent`
that folded the observation axis into its event is unfolded: its base distribution's terms, summed
over the remaining event axes of one observation.
"""

from __future__ import annotations

import torch
from torch.distributions import Distribution, Independent

__all__ = ["observation_terms", "simulated_key", "check_terms"]


def check_terms(terms, n: int) -> torch.Tensor:
    """``terms`` if it is a tensor of shape (*batch, n); a ValueError/TypeError saying what came otherwise."""
    if not isinstance(terms, torch.Tensor):
        raise TypeError(
            "log_likelihood must return a torch.Tensor of shape (*batch, n_obs) or a torch Distribution over "
            f"the observations, got {type(terms).__qualname__}"
        )
    if terms.dim() == 0 or terms.shape[-1] != n:
        raise ValueError(
            f"log_likelihood returned shape {tuple(terms.shape)} for {n} observations; it must return one "
            "term per observation, shape (*batch, n_obs)"
        )
    return terms


def simulated_key(data) -> str:
    """The one observed key a distribution-valued likelihood is over (ValueError otherwise)."""
    if len(data.observed) != 1:
        raise ValueError(
            "log_likelihood returned a torch Distribution; say which data key it is a distribution over with "
            f"observed='<key>' (one key of {sorted(data.tensors)}), got observed={data.observed}"
        )
    return data.observed[0]


def observation_terms(out, batch: dict, data) -> torch.Tensor:
    """Per-observation terms (*batch, n) of a likelihood output ``out`` on the data ``batch``.

    Records on ``data`` whether the likelihood returns a distribution (``data.simulates``).
    """
    n = next(iter(batch.values())).shape[0]
    if not isinstance(out, Distribution):
        data.simulates = False
        return check_terms(out, n)
    data.simulates = True
    key = simulated_key(data)
    y = batch[key]
    terms = out.log_prob(y)
    if terms.dim() >= 1 and terms.shape[-1] == n and tuple(out.event_shape) == tuple(y.shape[1:]):
        return terms
    if isinstance(out, Independent):  # the observation axis is folded into the event: unfold it
        base = out.base_dist
        terms = base.log_prob(y)
        extra = y.dim() - 1 - len(base.event_shape)  # axes of one observation the base treats as batch
        if extra > 0:
            terms = terms.sum(dim=tuple(range(-extra, 0)))
        if terms.dim() >= 1 and terms.shape[-1] == n:
            return terms
    raise ValueError(
        f"log_likelihood returned a {type(out).__name__} with batch_shape {tuple(out.batch_shape)} and "
        f"event_shape {tuple(out.event_shape)} over data[{key!r}] of shape {tuple(y.shape)}: one term per "
        f"observation needs batch_shape (*batch, {n}) and event_shape {tuple(y.shape[1:])} (e.g. Normal(mean, sd) "
        "with mean of shape (*batch, n_obs))"
    )

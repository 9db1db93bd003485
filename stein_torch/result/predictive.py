"""Predictions from every particle, posterior predictive bands, and the ``predictions`` group.

For a module target the prediction of a particle is the network's output; for any target built
with ``predictive=fn`` it is ``fn(p, inputs)``. Outputs keep the (chain, draw) layout of the draws,
so ``outputs[c, d]`` belongs to particle ``d`` of ensemble ``c``.
"""

from __future__ import annotations

import math
from typing import Callable, NamedTuple

import numpy as np
import torch

__all__ = ["PredictiveBands", "predictive_interval"]

PREDICT_ELEMENTS = 2**22  # particles x inputs per chunk


def predict(result, inputs, predictive: Callable | None = None, max_elements: int = PREDICT_ELEMENTS) -> torch.Tensor:
    """Outputs of every particle on ``inputs``.

    Parameters
    ----------
    result : Result
    inputs : Tensor or array of shape (n, ...)
    predictive : callable, optional
        ``predictive(p, inputs) -> (*batch, n, ...)`` for a dict ``p`` of constrained values with
        leading batch dims (a flat target gets the tensor ``x``). Default: the target's
        ``predictive`` (module targets: the network).
    max_elements : int
        Particles x inputs evaluated at once.

    Returns
    -------
    Tensor of shape (chains, draws, n, ...)
    """
    fn = predictive if predictive is not None else result.target.predictive
    if fn is None:
        raise ValueError(
            "predict: this target has no predictive function; build it with Target.from_module, pass "
            "predictive=fn to Target, or call run.predict(inputs, predictive=fn)"
        )
    if not callable(fn):
        raise TypeError(f"predict: predictive must be callable, got {type(fn).__qualname__}")
    try:
        inputs = torch.as_tensor(inputs)
    except Exception:
        raise TypeError(f"predict: inputs must be a tensor or array of shape (n, ...), got {type(inputs).__qualname__}") from None
    if inputs.dim() == 0:
        raise ValueError("predict: inputs must have shape (n, ...), got a scalar")
    z = result.particles
    if inputs.is_floating_point():
        inputs = inputs.to(z.dtype)
    flat = z.reshape(-1, z.shape[-1])
    chunk = max(1, max_elements // max(1, inputs.shape[0]))
    parts = []
    with torch.no_grad():
        for start in range(0, flat.shape[0], chunk):
            values, _ = result.target.constrain(flat[start : start + chunk])
            arg = values["x"] if result.target.flat else values
            out = fn(arg, inputs)
            m = flat[start : start + chunk].shape[0]
            if not isinstance(out, torch.Tensor) or out.dim() < 2 or tuple(out.shape[:2]) != (m, inputs.shape[0]):
                raise ValueError(
                    f"predict: predictive returned shape {tuple(getattr(out, 'shape', ()))} for {m} particles "
                    f"and {inputs.shape[0]} inputs; expected ({m}, {inputs.shape[0]}, ...)"
                )
            parts.append(out.detach())
    out = torch.cat(parts)
    return out.reshape(*z.shape[:-1], *out.shape[1:])


class PredictiveBands(NamedTuple):
    """Posterior predictive mean and equal-tailed interval, each of shape (n, ...)."""

    mean: torch.Tensor
    lower: torch.Tensor
    upper: torch.Tensor
    prob: float


def predictive_interval(draws, prob: float = 0.9, sample_dims: int = 2) -> PredictiveBands:
    """Mean and central ``prob`` interval of predictive draws, pooled over the sample dimensions.

    Parameters
    ----------
    draws : Tensor or array of shape (*sample, n, ...)
        E.g. :meth:`Result.predict` outputs (chains, draws, n, ...), or observations drawn from the
        likelihood at every particle (add a leading dimension for several draws per particle and
        set ``sample_dims=3``).
    prob : float, default=0.9
        Probability mass of the interval, in (0, 1): bounds are the (1 - prob)/2 and (1 + prob)/2
        quantiles.
    sample_dims : int, default=2
        Number of leading dimensions pooled as draws.

    Returns
    -------
    PredictiveBands
        ``mean``, ``lower``, ``upper`` of shape (n, ...) and ``prob``.
    """
    if isinstance(prob, bool) or not isinstance(prob, (int, float)) or not 0 < prob < 1:
        raise ValueError(f"predictive_interval: prob must be a number in (0, 1), got {prob!r}")
    draws = torch.as_tensor(draws)
    if not isinstance(sample_dims, int) or not 1 <= sample_dims < draws.dim():
        raise ValueError(
            f"predictive_interval: sample_dims must be an int in [1, {draws.dim() - 1}] for draws of shape "
            f"{tuple(draws.shape)}, got {sample_dims!r}"
        )
    pooled = draws.reshape(math.prod(draws.shape[:sample_dims]), *draws.shape[sample_dims:])
    pooled = pooled.to(torch.float64) if not pooled.is_floating_point() else pooled
    q = torch.tensor([(1 - prob) / 2, (1 + prob) / 2], dtype=pooled.dtype)
    lower, upper = torch.quantile(pooled, q, dim=0)
    return PredictiveBands(pooled.mean(0), lower, upper, float(prob))


def predictions_group(result, predictions) -> tuple[dict, dict]:
    """``predictions`` as an ArviZ group dict and its ``pred_dims``.

    A tensor or array (chains, draws, n, ...) becomes one variable named after the observations
    (``y`` for module targets); a dict keeps its names.
    """
    data = result.target.data
    if isinstance(predictions, (torch.Tensor, np.ndarray)):
        name = data.observed[0] if data is not None and len(data.observed) == 1 else "y"
        predictions = {name: predictions}
    if not isinstance(predictions, dict):
        raise TypeError(
            "to_inference_data: predictions must be a tensor/array (chains, draws, n, ...) or a dict of them, "
            f"got {type(predictions).__qualname__}"
        )
    chains, draws = result.particles.shape[:2]
    group, dims = {}, {}
    for name, value in predictions.items():
        value = value.detach().cpu().numpy() if isinstance(value, torch.Tensor) else np.asarray(value)
        if value.ndim < 3 or value.shape[:2] != (chains, draws):
            raise ValueError(
                f"to_inference_data: predictions[{name!r}] must have shape (chains, draws, n, ...) = "
                f"({chains}, {draws}, n, ...), got {value.shape}"
            )
        group[name] = value
        dims[name] = ["pred_obs"] + [f"{name}_pred_dim_{i}" for i in range(1, value.ndim - 2)]
    return group, dims

"""The sampler's state as plain data, to checkpoint a run and continue it bit for bit.

:func:`capture_state` collects particles, log densities, scores, the whitening found at set-up,
counters, the torch.Generator state, the trace, and the ``state_dict()`` of every part of the sampler
that has ``state_dict``/``load_state_dict`` (kernel, stepper, and parts added later such as a stop
rule), keyed by attribute name. :func:`restore_state` checks that the file belongs to this target and
these settings before changing anything, then restores it without recomputing the set-up.
"""

from __future__ import annotations

import re
from typing import Mapping

import torch

from . import io
from .precondition import Affine

__all__ = ["capture_state", "restore_state", "stateful_parts"]

REQUIRED = (
    "target", "settings", "step", "grad_evals", "fault_streak", "u", "lp", "score", "affine",
    "laplace_ok", "generator", "trace", "components",
)


def stateful_parts(sampler) -> dict:
    """Attributes of ``sampler`` that have both ``state_dict`` and ``load_state_dict`` (name -> object)."""
    return {
        name: obj for name, obj in vars(sampler).items()
        if not isinstance(obj, type)
        and callable(getattr(obj, "state_dict", None))
        and callable(getattr(obj, "load_state_dict", None))
    }


def _plain_repr(obj) -> str:
    return re.sub(r" at 0x[0-9a-fA-F]+", "", repr(obj))


def run_settings(sampler) -> dict:
    """Settings a continued run must share with the saved one."""
    return {
        "particles": sampler.n,
        "ensembles": sampler.ensembles,
        "dtype": str(sampler.dtype).replace("torch.", ""),
        "precondition": str(sampler.precondition),
        "seed": sampler.seed,
        "kernel": _plain_repr(sampler.kernel),
        "stepper": _plain_repr(sampler.stepper),
    }


def capture_state(sampler) -> dict:
    """The state of a :class:`~stein_torch.Sampler`.

    Returns
    -------
    dict
        ``target`` (names, shapes, constraints), ``settings``, ``step``, ``grad_evals``,
        ``fault_streak``, ``stop_reason``; ``u`` (B, N, d) whitened particles, ``lp`` (B, N),
        ``score`` (B, N, d) whitened scores; ``affine`` {``shift`` (d,) or (B, d), ``matrix`` (d, d) or (B, d, d)},
        ``laplace_ok``; ``generator`` (uint8 tensor of the torch.Generator state); ``trace``
        (name -> list of per-step values); ``components`` (attribute name -> ``state_dict()``).
    """
    return {
        "format": io.CHECKPOINT_FORMAT,
        "version": io.FORMAT_VERSION,
        "target": io.target_signature(sampler.target),
        "settings": run_settings(sampler),
        "step": sampler.step_count,
        "grad_evals": sampler.grad_evals,
        "fault_streak": sampler._fault_streak,
        "stop_reason": getattr(sampler, "stop_reason", "steps"),
        "u": sampler.u.detach().clone(),
        "lp": sampler.lp.detach().clone(),
        "score": sampler.score.detach().clone(),
        "affine": sampler.affine.state_dict(),
        "laplace_ok": bool(sampler.laplace_ok),
        "generator": sampler.generator.get_state(),
        "trace": {k: list(v) for k, v in sampler._trace.items()},
        "components": {name: obj.state_dict() for name, obj in stateful_parts(sampler).items()},
    }


def _check_settings(stored, current: dict, argname: str) -> None:
    if not isinstance(stored, Mapping):
        raise ValueError(f"{argname}: 'settings' must be a dict, got {type(stored).__qualname__}")
    diffs = [f"{k}={stored.get(k)!r} in the file, {v!r} now" for k, v in current.items() if stored.get(k) != v]
    if diffs:
        raise ValueError(
            f"{argname}: the checkpoint was written with other settings ({'; '.join(diffs)}); resume with the "
            "same particles, ensembles, dtype, precondition, seed, kernel and stepper"
        )


def _tensor(state, key, shape, argname, sampler) -> torch.Tensor:
    value = state[key]
    if not isinstance(value, torch.Tensor) or tuple(value.shape) != tuple(shape) or not value.is_floating_point():
        got = tuple(value.shape) if isinstance(value, torch.Tensor) else type(value).__qualname__
        raise ValueError(f"{argname}[{key!r}]: expected a float tensor of shape {tuple(shape)}, got {got}")
    if not bool(torch.isfinite(value).all()):
        raise ValueError(f"{argname}[{key!r}]: contains NaN or inf")
    return value.to(dtype=sampler.dtype, device=sampler.device)


def restore_state(sampler, state: Mapping, argname: str = "state") -> None:
    """Put ``state`` (from :func:`capture_state`) into ``sampler``; all checks come before any change."""
    if not isinstance(state, Mapping):
        raise TypeError(f"{argname}: expected a dict from Sampler.state_dict(), got {type(state).__qualname__}")
    missing = [k for k in REQUIRED if k not in state]
    if missing:
        raise ValueError(f"{argname}: not a complete sampler state, missing {missing}")
    io.check_signature(state["target"], sampler.target, argname)
    _check_settings(state["settings"], run_settings(sampler), argname)
    dim = sampler.target.dim
    shape = (sampler.ensembles, sampler.n, dim)
    u = _tensor(state, "u", shape, argname, sampler)
    lp = _tensor(state, "lp", shape[:2], argname, sampler)
    score = _tensor(state, "score", shape, argname, sampler)
    affine = state["affine"]
    if not isinstance(affine, Mapping):
        raise ValueError(f"{argname}['affine']: expected a dict with 'shift' and 'matrix'")
    per_ensemble = isinstance(affine.get("shift"), torch.Tensor) and affine["shift"].dim() == 2
    lead = (sampler.ensembles,) if per_ensemble else ()  # one map per ensemble after re-whitening
    shift = _tensor(affine, "shift", (*lead, dim), f"{argname}['affine']", sampler)
    matrix = _tensor(affine, "matrix", (*lead, dim, dim), f"{argname}['affine']", sampler)
    generator = state["generator"]
    if not isinstance(generator, torch.Tensor) or generator.dtype != torch.uint8:
        raise ValueError(f"{argname}['generator']: expected the uint8 state tensor of a torch.Generator")
    parts, stored = stateful_parts(sampler), state["components"]
    if not isinstance(stored, Mapping) or set(stored) != set(parts):
        found = sorted(stored) if isinstance(stored, Mapping) else type(stored).__qualname__
        raise ValueError(
            f"{argname}: the checkpoint holds state for {found} but this run has {sorted(parts)}; "
            "resume with the same options"
        )
    sampler.affine = Affine(shift, matrix)
    sampler.laplace_ok = bool(state["laplace_ok"])
    sampler.u, sampler.lp, sampler.score = u, lp, score
    sampler.step_count = int(state["step"])
    sampler.grad_evals = int(state["grad_evals"])
    sampler._fault_streak = int(state["fault_streak"])
    sampler.stop_reason = str(state.get("stop_reason", "steps"))
    sampler.generator.set_state(generator)
    sampler._trace = {k: list(v) for k, v in state["trace"].items()}
    sampler.stepper.bind(sampler.u)
    for name, obj in parts.items():
        obj.load_state_dict(stored[name])

"""A sampler's state as plain data, to checkpoint a run and continue it bit for bit.

Every sampler's ``state_dict()`` starts with :func:`common_state` (format, method, target signature,
settings, counters, the torch.Generator state, the history, and the ``state_dict()`` of every part of
the sampler that has ``state_dict``/``load_state_dict``: kernel, step rule, stop rule, minibatch
stream, parts a user attaches) and adds its own tensors. :func:`check_common` validates a state
against a sampler before anything changes; :func:`restore_common` and :func:`restore_parts` then put
the shared parts back.
"""

from __future__ import annotations

import re
from typing import Mapping, Protocol, runtime_checkable

import numpy as np
import torch

from .. import io
from .precondition import Affine

__all__ = ["common_state", "check_common", "restore_common", "restore_parts", "stateful_parts", "state_tensor",
           "read_affine", "CHAIN_KEYS", "chain_state", "read_chain_state"]


@runtime_checkable
class Stateful(Protocol):
    def state_dict(self) -> dict: ...

    def load_state_dict(self, state: dict) -> None: ...


COMMON = ("method", "target", "settings", "step", "grad_evals", "generator", "history", "components")


def stateful_parts(sampler) -> dict:
    """Attributes of ``sampler`` with ``state_dict`` and ``load_state_dict`` (name -> object)."""
    return {name: obj for name, obj in vars(sampler).items() if not isinstance(obj, type) and isinstance(obj, Stateful)}


def plain_repr(obj) -> str:
    """repr without memory addresses (settings compared between runs)."""
    return re.sub(r" at 0x[0-9a-fA-F]+", "", repr(obj))


def common_state(sampler, settings: dict) -> dict:
    """The part of a state every sampler has; ``settings`` are those a resumed run must share."""
    return {
        "format": io.CHECKPOINT_FORMAT,
        "version": io.FORMAT_VERSION,
        "method": sampler.name,
        "target": sampler.target.signature(),
        "settings": settings,
        "step": sampler.step_count,
        "grad_evals": sampler.grad_evals,
        "stop_reason": sampler.stop_reason,
        "generator": sampler.generator.get_state(),
        "history": {k: list(v) for k, v in sampler.history.items()},
        "components": {name: obj.state_dict() for name, obj in stateful_parts(sampler).items()},
    }


def check_common(sampler, state: Mapping, settings: dict, required: tuple, argname: str) -> dict:
    """Check a state against ``sampler`` (nothing is changed); returns the stateful parts to restore."""
    if not isinstance(state, Mapping):
        raise TypeError(f"{argname}: expected a dict from state_dict(), got {type(state).__qualname__}")
    missing = [k for k in COMMON + tuple(required) if k not in state]
    if missing:
        raise ValueError(f"{argname}: not a complete sampler state, missing {missing}")
    if state["method"] != sampler.name:
        raise ValueError(f"{argname}: the checkpoint is of a {state['method']!r} run, not {sampler.name!r}")
    sampler.target.check_signature(state["target"], argname)
    stored = state["settings"]
    if not isinstance(stored, Mapping):
        raise ValueError(f"{argname}: 'settings' must be a dict, got {type(stored).__qualname__}")
    diffs = [f"{k}={stored.get(k)!r} in the file, {v!r} now" for k, v in settings.items() if stored.get(k) != v]
    if diffs:
        raise ValueError(
            f"{argname}: the checkpoint was written with other settings ({'; '.join(diffs)}); resume with the "
            f"same {', '.join(settings)}"
        )
    generator = state["generator"]
    if not isinstance(generator, torch.Tensor) or generator.dtype != torch.uint8:
        raise ValueError(f"{argname}['generator']: expected the uint8 state tensor of a torch.Generator")
    parts, stored_parts = stateful_parts(sampler), state["components"]
    if not isinstance(stored_parts, Mapping) or set(stored_parts) != set(parts):
        found = sorted(stored_parts) if isinstance(stored_parts, Mapping) else type(stored_parts).__qualname__
        raise ValueError(
            f"{argname}: the checkpoint holds state for {found} but this run has {sorted(parts)}; "
            "resume with the same options"
        )
    return parts


def restore_common(sampler, state: Mapping) -> None:
    """Counters, generator and history from a state checked by :func:`check_common` (the parts
    follow with :func:`restore_parts`, once the sampler's own tensors are in place)."""
    sampler.step_count = int(state["step"])
    sampler.grad_evals = int(state["grad_evals"])
    sampler.stop_reason = str(state.get("stop_reason", sampler.finished_reason))
    sampler.generator.set_state(state["generator"])
    sampler.history = {k: list(v) for k, v in state["history"].items()}


def restore_parts(state: Mapping, parts: dict) -> None:
    """``load_state_dict`` of every stateful part returned by :func:`check_common`."""
    for name, obj in parts.items():
        obj.load_state_dict(state["components"][name])


def state_tensor(state: Mapping, key: str, shape: tuple, argname: str, dtype, device, finite: bool = True) -> torch.Tensor:
    """``state[key]`` as a float tensor of ``shape`` in ``dtype`` on ``device`` (ValueError otherwise)."""
    value = state.get(key)
    if not isinstance(value, torch.Tensor) or tuple(value.shape) != tuple(shape) or not value.is_floating_point():
        got = tuple(value.shape) if isinstance(value, torch.Tensor) else type(value).__qualname__
        raise ValueError(f"{argname}[{key!r}]: expected a float tensor of shape {tuple(shape)}, got {got}")
    if finite and not bool(torch.isfinite(value).all()):
        raise ValueError(f"{argname}[{key!r}]: contains NaN or inf")
    return value.to(dtype=dtype, device=device)


def read_affine(affine, lead: int, dim: int, where: str, dtype, device) -> Affine:
    """The whitening stored in a state: one map, shift (d,) and matrix (d, d), or one per ensemble or
    chain, (lead, d) and (lead, d, d)."""
    if not isinstance(affine, Mapping):
        raise ValueError(f"{where}: expected a dict with 'shift' and 'matrix'")
    per_set = isinstance(affine.get("shift"), torch.Tensor) and affine["shift"].dim() == 2
    shape = (lead,) if per_set else ()
    return Affine(
        state_tensor(affine, "shift", (*shape, dim), where, dtype, device),
        state_tensor(affine, "matrix", (*shape, dim, dim), where, dtype, device),
    )


CHAIN_KEYS = ("u", "lp", "score", "affine", "laplace_ok", "eps", "elapsed", "kept", "kept_lp")


def chain_state(sampler) -> dict:
    """What every MCMC sampler (Langevin, NUTS) adds to :func:`common_state`: the chains ``u`` (C, d)
    (whitened), ``lp`` (C,), ``score`` (C, d), the whitening, per-chain step sizes ``eps`` (C,), the
    seconds so far and the draws kept so far ``kept`` (C, draws, d), ``kept_lp`` (C, draws)."""
    return {"u": sampler.u.clone(), "lp": sampler.lp.clone(), "score": sampler.score.clone(),
            "affine": sampler.affine.state_dict(), "laplace_ok": bool(sampler.laplace_ok),
            "eps": torch.as_tensor(sampler.eps), "elapsed": sampler.elapsed, "kept": sampler.kept.clone(),
            "kept_lp": sampler.kept_lp.clone()}


def read_chain_state(sampler, state: Mapping, argname: str) -> dict:
    """The :data:`CHAIN_KEYS` of ``state`` checked against ``sampler`` (shapes, finite values), as
    attribute name -> value; nothing is assigned, so a bad state changes nothing."""
    c, d = sampler.chains, sampler.target.dim

    def tensor(key, shape):
        return state_tensor(state, key, shape, argname, sampler.dtype, sampler.device)

    return {"u": tensor("u", (c, d)), "lp": tensor("lp", (c,)), "score": tensor("score", (c, d)),
            "affine": read_affine(state["affine"], c, d, f"{argname}['affine']", sampler.dtype, sampler.device),
            "laplace_ok": bool(state["laplace_ok"]), "eps": tensor("eps", (c,)).cpu().numpy().astype(np.float64),
            "elapsed": float(state["elapsed"]), "kept": tensor("kept", (c, sampler.draws, d)),
            "kept_lp": tensor("kept_lp", (c, sampler.draws))}

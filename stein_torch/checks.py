"""Argument checks, run once at the public boundary.

Every check names the argument, says what was expected and repeats what came, e.g.
``steps == -1, must be >= 0`` or ``kernel must be a stein_torch kernel, got str ('rbf')``.
These are the only validators of the package; modules call them instead of writing their own.
"""

from __future__ import annotations

import math
import numbers
from typing import Callable, Iterable

import torch

__all__ = [
    "check_bool", "check_callable", "check_choice", "check_device", "check_dtype", "check_int",
    "check_optional_real", "check_real", "check_shape", "check_type",
]


def _got(value) -> str:
    return f"{type(value).__qualname__} ({value!r})"


def check_int(value, name: str, minimum: int = 1, maximum: int | None = None) -> int:
    """An int (not bool) in [minimum, maximum]; TypeError/ValueError naming ``name`` otherwise."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an int, got {_got(value)}")
    if value < minimum:
        raise ValueError(f"{name} == {value}, must be >= {minimum}")
    if maximum is not None and value > maximum:
        raise ValueError(f"{name} == {value}, must be <= {maximum}")
    return int(value)


def check_real(
    value,
    name: str,
    *,
    low: float = -math.inf,
    high: float = math.inf,
    low_open: bool = False,
    high_open: bool = False,
) -> float:
    """A finite real number (not bool) in the interval between ``low`` and ``high``.

    Parameters
    ----------
    low, high : float
        Bounds; infinite bounds only require a finite value.
    low_open, high_open : bool
        Exclude the bound itself (``low_open=True, low=0``: strictly positive).
    """
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number, got {_got(value)}")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} == {value!r}, must be a finite number")
    too_low = value <= low if low_open else value < low
    too_high = value >= high if high_open else value > high
    if too_low or too_high:
        left = "(" if low_open else "["
        right = ")" if high_open else "]"
        raise ValueError(f"{name} == {value!r}, must lie in {left}{low:g}, {high:g}{right}")
    return value


def check_optional_real(value, name: str, **bounds) -> float | None:
    """None, or a number checked by :func:`check_real`."""
    return None if value is None else check_real(value, name, **bounds)


def check_choice(value, name: str, choices: Iterable):
    """One of ``choices`` (compared with ==, None allowed when listed)."""
    choices = tuple(choices)
    if not any(value is c or (isinstance(value, type(c)) and value == c) for c in choices):
        raise ValueError(f"{name} must be one of {', '.join(map(repr, choices))}; got {value!r}")
    return value


def check_bool(value, name: str) -> bool:
    """True or False (numpy bools accepted)."""
    if not isinstance(value, bool) and type(value).__name__ != "bool_":
        raise TypeError(f"{name} must be True or False, got {_got(value)}")
    return bool(value)


def check_callable(value, name: str, what: str = "callable") -> Callable:
    """A callable; ``what`` describes it in the message (e.g. ``"callable (step -> drive)"``)."""
    if not callable(value):
        raise TypeError(f"{name} must be {what}, got {type(value).__qualname__}")
    return value


def check_type(value, name: str, expected: type | tuple, what: str):
    """An instance of ``expected``; ``what`` names it for the message (e.g. ``"stein_torch.Target"``)."""
    if not isinstance(value, expected):
        raise TypeError(f"{name} must be a {what}, got {type(value).__qualname__}")
    return value


def check_shape(tensor: torch.Tensor, name: str, shape: tuple) -> torch.Tensor:
    """A tensor of exactly ``shape`` (None entries match any size)."""
    if not isinstance(tensor, torch.Tensor):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(tensor).__qualname__}")
    ok = tensor.dim() == len(shape) and all(s is None or s == n for s, n in zip(shape, tensor.shape))
    if not ok:
        expected = "(" + ", ".join("..." if s is None else str(s) for s in shape) + ")"
        raise ValueError(f"{name} must have shape {expected}; got {tuple(tensor.shape)}")
    return tensor


def check_dtype(dtype, name: str = "dtype") -> torch.dtype:
    """torch.float64 or torch.float32."""
    if dtype not in (torch.float32, torch.float64):
        raise TypeError(f"{name} must be torch.float64 or torch.float32, got {dtype!r}")
    return dtype


def check_device(device, name: str = "device") -> torch.device:
    """A usable torch device: CPU, or a CUDA/MPS device that is actually present."""
    if device is None:
        return torch.device("cpu")
    if isinstance(device, bool) or not isinstance(device, (str, int, torch.device)):
        raise TypeError(f"{name} must be a str, int or torch.device, got {_got(device)}")
    try:
        dev = torch.device(device)
    except (RuntimeError, TypeError, ValueError) as err:
        raise ValueError(f"{name}: {device!r} is not a torch device ({str(err).splitlines()[0]})") from None
    if dev.type == "cpu":
        return dev
    if dev.type == "cuda":
        count = torch.cuda.device_count() if torch.cuda.is_available() else 0
        if count == 0:
            raise ValueError(f"{name}: {device!r} requested but CUDA is not available here; use device='cpu'")
        if dev.index is not None and dev.index >= count:
            raise ValueError(f"{name}: {device!r} requested but only {count} CUDA device(s) exist")
        return dev
    if dev.type == "mps" and torch.backends.mps.is_available():
        return dev
    raise ValueError(f"{name}: {device!r} is not supported; use 'cpu' or an available 'cuda' device")

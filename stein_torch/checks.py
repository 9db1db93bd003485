"""Argument checks shared by the public entry points (run once, at the boundary)."""

from __future__ import annotations

import numbers

import torch

__all__ = ["check_device", "check_int"]


def check_device(device) -> torch.device:
    """A usable torch device: CPU, or a CUDA/MPS device that is actually present."""
    if device is None:
        return torch.device("cpu")
    if isinstance(device, bool) or not isinstance(device, (str, int, torch.device)):
        raise TypeError(f"device must be a str, int or torch.device, got {type(device).__qualname__} ({device!r})")
    try:
        dev = torch.device(device)
    except (RuntimeError, TypeError, ValueError) as err:
        raise ValueError(f"device: {device!r} is not a torch device ({str(err).splitlines()[0]})") from None
    if dev.type == "cpu":
        return dev
    if dev.type == "cuda":
        count = torch.cuda.device_count() if torch.cuda.is_available() else 0
        if count == 0:
            raise ValueError(f"device: {device!r} requested but CUDA is not available here; use device='cpu'")
        if dev.index is not None and dev.index >= count:
            raise ValueError(f"device: {device!r} requested but only {count} CUDA device(s) exist")
        return dev
    if dev.type == "mps" and torch.backends.mps.is_available():
        return dev
    raise ValueError(f"device: {device!r} is not supported; use 'cpu' or an available 'cuda' device")


def check_int(value, name: str, minimum: int = 1) -> int:
    """An int (not bool) >= ``minimum``; TypeError/ValueError naming ``name`` otherwise."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an int, got {type(value).__qualname__} ({value!r})")
    if value < minimum:
        raise ValueError(f"{name} == {value}, must be >= {minimum}")
    return int(value)


"""Dimension names and coordinates handed to :func:`arviz.from_dict`: ours by default, the user's
``dims`` replacing them per variable, the user's ``coords`` passed through."""

from __future__ import annotations

from typing import Mapping

__all__ = ["merge_dims", "check_coords"]


def merge_dims(ours: dict, given) -> dict:
    """Our default dims, replaced per variable by the user's ``dims`` (name -> list of str)."""
    if given is None:
        return ours
    if not isinstance(given, Mapping) or not all(
        isinstance(k, str) and isinstance(v, (list, tuple)) and all(isinstance(d, str) for d in v) for k, v in given.items()
    ):
        raise TypeError(f"dims must be a dict of variable name -> list of dim names, got {given!r}")
    return {**ours, **{k: list(v) for k, v in given.items()}}


def check_coords(coords) -> dict | None:
    """``coords`` as a dict (dim name -> labels), or None."""
    if coords is not None and not isinstance(coords, Mapping):
        raise TypeError(f"coords must be a dict of dim name -> labels, got {type(coords).__qualname__}")
    return None if coords is None else dict(coords)

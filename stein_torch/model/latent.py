"""A sampled unknown (:class:`Latent`) and where it sits in the flat unconstrained vector (:class:`Block`).

Samplers move particles in one flat unconstrained space; each latent occupies a slice of it and is
mapped to its support by :func:`torch.distributions.biject_to` (log-Jacobian added).

Examples
--------
>>> from torch.distributions import constraints
>>> Latent()                                       # a real scalar
>>> Latent((8,))                                   # eight real values
>>> Latent(support=constraints.positive)           # a positive scalar
>>> Latent((3,), support=constraints.simplex)      # 3 probabilities (2 free coordinates)
>>> Latent((8,), dims=("school",))                 # eight reals along the ArviZ dimension "school"
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import torch
from torch.distributions import biject_to, constraints, transforms

__all__ = ["Latent"]


@dataclass(frozen=True)
class Latent:
    """Specification of one sampled unknown of a model.

    Parameters
    ----------
    shape : tuple of int, default=()
        Shape of one value (``()`` for a scalar, an int for a vector).
    support : torch.distributions.constraints.Constraint, default=constraints.real
        Where the values live (as in ``Distribution.support``); sampling happens on the
        unconstrained side of ``biject_to(support)``.
    dims : tuple of str, optional
        Names of the value's axes in ArviZ groups (one per axis of ``shape``), e.g.
        ``("school",)``; default ``("<name>_dim_0", ...)``. Give their labels with
        ``to_inference_data(coords={"school": [...]})``.
    """

    shape: tuple = ()
    support: constraints.Constraint = field(default=constraints.real)
    dims: tuple | None = None

    def __post_init__(self):
        shape = (self.shape,) if isinstance(self.shape, int) and not isinstance(self.shape, bool) else self.shape
        if not isinstance(shape, (tuple, list, torch.Size)) or not all(
            isinstance(n, int) and not isinstance(n, bool) and n >= 1 for n in shape
        ):
            raise ValueError(f"Latent: shape must be a tuple of positive ints, got {self.shape!r}")
        object.__setattr__(self, "shape", tuple(shape))
        if self.dims is not None:
            dims = (self.dims,) if isinstance(self.dims, str) else self.dims
            if not isinstance(dims, (tuple, list)) or not all(isinstance(d, str) and d for d in dims):
                raise TypeError(f"Latent: dims must be a tuple of non-empty str (one per axis), got {self.dims!r}")
            if len(dims) != len(self.shape):
                raise ValueError(
                    f"Latent: dims must name each of the {len(self.shape)} axes of shape {self.shape}, got {tuple(dims)}"
                )
            if len(set(dims)) != len(dims):
                raise ValueError(f"Latent: dims must be distinct, got {tuple(dims)}")
            object.__setattr__(self, "dims", tuple(dims))
        support = self.support
        if not isinstance(support, constraints.Constraint):
            raise TypeError(
                "Latent: support must be a torch.distributions.constraints.Constraint, "
                f"got {type(support).__qualname__}"
            )
        lower = getattr(support, "lower_bound", None)
        upper = getattr(support, "upper_bound", None)
        for bound in (lower, upper):
            if bound is not None and bool(torch.isnan(torch.as_tensor(bound)).any()):
                raise ValueError(f"Latent: support {support!r} has a NaN bound")
        if lower is not None and upper is not None and not bool((torch.as_tensor(lower) < torch.as_tensor(upper)).all()):
            raise ValueError(f"Latent: support {support!r} is empty (lower_bound must be < upper_bound)")
        try:
            biject_to(support)
        except NotImplementedError:
            raise ValueError(
                f"Latent: no bijection to the support {support!r}; use one that torch.distributions.biject_to supports"
            ) from None


class Block:
    """Where one latent sits in the flat unconstrained vector, and its map to the support.

    Attributes
    ----------
    name : str
    shape : torch.Size
        Constrained shape.
    free_shape : torch.Size
        Unconstrained shape (a simplex of 3 has 2 free coordinates).
    start, size : int
        Slice ``start : start + size`` of the flat vector.
    identity : bool
        The real line: no transform and no log-Jacobian.
    dims : tuple of str
        ArviZ dimension names of the value's axes (``spec.dims`` or ``<name>_dim_<i>``).
    """

    def __init__(self, name: str, spec: Latent, start: int):
        self.name = name
        self.shape = torch.Size(spec.shape)
        self.dims = spec.dims if spec.dims is not None else tuple(f"{name}_dim_{i}" for i in range(len(spec.shape)))
        self.support = spec.support
        self.transform = biject_to(spec.support)
        inner = self.transform
        while isinstance(inner, transforms.IndependentTransform):
            inner = inner.base_transform
        self.identity = inner == transforms.identity_transform
        self.free_shape = torch.Size(self.transform.inverse_shape(self.shape))
        self.start = start
        self.size = math.prod(self.free_shape)


def layout(latents: Mapping[str, Latent]) -> list[Block]:
    """Blocks for the latents in their given order; names must be identifiers (they become
    ArviZ variable names)."""
    if not isinstance(latents, Mapping) or not latents:
        raise TypeError(f"Target: latents must be a non-empty dict of name -> st.Latent, got {latents!r}")
    blocks, start = [], 0
    for name, spec in latents.items():
        if not isinstance(name, str) or not name.isidentifier():
            raise ValueError(f"Target: latent names must be identifiers, got {name!r}")
        if not isinstance(spec, Latent):
            raise TypeError(f"Target: latents[{name!r}] must be a st.Latent, got {type(spec).__qualname__}")
        blocks.append(Block(name, spec, start))
        start += blocks[-1].size
    return blocks

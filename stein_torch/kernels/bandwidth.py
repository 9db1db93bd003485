"""Bandwidth of radial kernels: the median heuristic and fixed values.

h = med_{i<j} |x_i - x_j|^2 / log(N + 1) ("Stein Variational Gradient Descent: A General Purpose
Bayesian Inference Algorithm", arXiv:1608.04471), exact over all pairs for small N and over a fixed
design of random pairs above (an exact median over N^2 pairs costs more than a whole SVGD step).
"""

from __future__ import annotations

import functools
import math

import torch

from ..checks import check_real

__all__ = ["median_bandwidth", "squared_distances", "MEDIAN_PAIRS"]

MEDIAN_PAIRS = 1 << 12  # pairs used by the median heuristic (relative error ~1-4%); all pairs when fewer exist
PAIR_DESIGN_SEED = 0  # seed of the fixed set of pairs used when no generator is given
MEDIAN_BLOCK = 1 << 16  # entries of the (pairs, d) differences formed at once by the median heuristic


def check_bandwidth(bandwidth, owner: str):
    """"median" or a positive finite number (as float)."""
    if isinstance(bandwidth, str):
        if bandwidth != "median":
            raise ValueError(f"{owner}: bandwidth must be 'median' or a positive number, got {bandwidth!r}")
        return bandwidth
    try:
        return check_real(bandwidth, f"{owner}: bandwidth", low=0, low_open=True)
    except (TypeError, ValueError) as err:
        raise type(err)(f"{err} ('median' or a positive number)") from None


def squared_distances(x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """Pairwise squared Euclidean distances, (..., n, d), (..., m, d) -> (..., n, m), clamped at 0."""
    d2 = (x * x).sum(-1)[..., :, None] + (y * y).sum(-1)[..., None, :] - 2 * x @ y.transpose(-1, -2)
    return d2.clamp_min_(0)


def median_bandwidth(
    x: torch.Tensor, generator: torch.Generator | None = None, distances: torch.Tensor | None = None
) -> torch.Tensor:
    """Median heuristic h = med_{i<j} |x_i - x_j|^2 / log(N + 1) per batch (arXiv:1608.04471).

    Exact over all pairs for small N; over ``MEDIAN_PAIRS`` random pairs otherwise.

    Parameters
    ----------
    x : Tensor of shape (..., N, d)
    generator : torch.Generator, optional
        Draws fresh random pairs. None (the sampler's choice): a fixed random set of pairs for each
        N, the same at every call, so the bandwidth does not jitter from step to step and costs no
        random draws (particle labels carry no meaning, so a fixed set is as good as a fresh one).
    distances : Tensor of shape (..., N, N), optional
        The squared distances |x_i - x_j|^2, when the caller has them already: the pairs are read
        from it instead of being computed (same pairs, same random draws).

    Returns
    -------
    Tensor of shape (...)
    """
    n = x.shape[-2]
    if n < 2:
        return torch.ones(x.shape[:-2], dtype=x.dtype, device=x.device)
    exact = n * (n - 1) // 2 <= MEDIAN_PAIRS  # all pairs
    if distances is not None and (exact or generator is None):
        flat = _flat_pairs(n)
        flat = flat if flat.device == x.device else flat.to(x.device)
        return _median_rule(distances.flatten(-2).index_select(-1, flat), n)
    if exact:  # from one Gram matrix (matmul, ~5x faster than differences)
        centred = x - x.mean(-2, keepdim=True)  # distances do not move; centring keeps |a|^2+|b|^2-2ab accurate
        pairs = _flat_pairs(n).to(x.device)
        return _median_rule(squared_distances(centred, centred).flatten(-2).index_select(-1, pairs), n)
    i, j = _random_pairs(n, generator) if generator is not None else _pair_design(n)
    i, j = i.to(x.device), j.to(x.device)
    if distances is not None:
        return _median_rule(distances.flatten(-2).index_select(-1, i * n + j), n)
    # In blocks of pairs with index_select (not x[..., i, :]): same values, but small temporaries
    # that the allocator reuses instead of fresh pages for (pairs, d) arrays (10-20x faster here).
    d2 = torch.empty((*x.shape[:-2], i.numel()), dtype=x.dtype, device=x.device)
    block = max(1, MEDIAN_BLOCK // max(1, x.shape[:-2].numel() * x.shape[-1]))
    for a in range(0, i.numel(), block):
        ia, ja = i[a : a + block], j[a : a + block]
        diff = x.index_select(-2, ia).sub_(x.index_select(-2, ja))
        d2[..., a : a + block] = diff.mul_(diff).sum(-1)
    return _median_rule(d2, n)


def _random_pairs(n: int, generator: torch.Generator | None) -> tuple[torch.Tensor, torch.Tensor]:
    """``MEDIAN_PAIRS`` uniform random pairs (i, j), i != j, of N particles."""
    i = torch.randint(n, (MEDIAN_PAIRS,), generator=generator)
    j = (i + torch.randint(1, n, (MEDIAN_PAIRS,), generator=generator)) % n
    return i, j


@functools.lru_cache(maxsize=16)
def _pair_design(n: int) -> tuple[torch.Tensor, torch.Tensor]:
    """The fixed pairs used for N particles when no generator is given."""
    return _random_pairs(n, torch.Generator().manual_seed(PAIR_DESIGN_SEED))


@functools.lru_cache(maxsize=16)
def _flat_pairs(n: int) -> torch.Tensor:
    """Indices into a flattened N x N matrix of the pairs the median uses without a generator: all
    pairs i < j for small N, the fixed design above."""
    if n * (n - 1) // 2 <= MEDIAN_PAIRS:
        i, j = torch.triu_indices(n, n, offset=1)
    else:
        i, j = _pair_design(n)
    return i * n + j


def _median_rule(d2: torch.Tensor, n: int) -> torch.Tensor:
    """h = median(d2) / log(n + 1) over the last axis (the lower median), 1 where that is 0."""
    med = d2.median(-1).values
    h = med.div_(math.log(n + 1))
    return torch.where(h > 0, h, 1.0)



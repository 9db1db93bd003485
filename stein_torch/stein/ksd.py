"""Kernel Stein discrepancy of a particle set, in the matmul form of the SVGD direction.

KSD^2 = (1/N^2) sum_ij u(x_i, x_j), u(x, y) = s(x).s(y) k + s(x).grad_y k + s(y).grad_x k
+ trace(grad_x grad_y k) ("A Kernelized Stein Discrepancy for Goodness-of-fit Tests",
arXiv:1602.03253). The default base kernel, IMQ with c = 1, beta = -1/2 on unscaled coordinates,
detects non-convergence ("Measuring Sample Quality with Kernels", arXiv:1703.01717).
"""

from __future__ import annotations

import torch

from ..kernels import IMQ, RadialKernel
from .engine import CHUNK_ELEMENTS, as_batch, chunk_rows, distance_factors, row_range
from .scratch import Scratch

__all__ = ["ksd", "ksd_sums", "ksd_from_sums"]


def default_ksd_kernel() -> RadialKernel:
    """IMQ with c = 1, beta = -1/2 and unit bandwidth (arXiv:1703.01717)."""
    return IMQ(1.0, -0.5, bandwidth=1.0)


def ksd_sums(
    x: torch.Tensor,
    scores: torch.Tensor,
    kernel: RadialKernel,
    *,
    rows: slice | None = None,
    chunk_elements: int = CHUNK_ELEMENTS,
    scratch: Scratch | None = None,
) -> tuple[torch.Tensor, torch.Tensor]:
    """Sums of the Stein kernel u over the pairs of a range of rows, and over its diagonal.

    Summed over a partition of the rows (e.g. the particles of several processes) the partial sums
    give the full sums; a single partial sum is not meaningful on its own (the cross term uses the
    symmetry of the kernel over all pairs).

    Parameters
    ----------
    x, scores : Tensor of shape (B, N, d)
    kernel : RadialKernel
        With a bounded gradient at 0 (not ``singular``).
    rows : slice, optional
        Rows i of the sums (default: all).

    Returns
    -------
    pairs : Tensor of shape (B,)
        Partial sum over i in rows and all j of u(x_i, x_j).
    diagonal : Tensor of shape (B,)
        Partial sum over i in rows of u(x_i, x_i).
    """
    batch, n, d = x.shape
    r0, r1 = row_range(rows, n)
    h = kernel.bandwidth_for(x)
    left, right = distance_factors(x, h)
    scratch = Scratch() if scratch is None else scratch
    # Sum over pairs without N x N products of scores: with K = f(s), G = f'(s), F = f''(s),
    #   sum_ij u_ij = sum_i s_i.(K S)_i + (4/h) sum_i [s_i.(G X)_i - (s_i.x_i)(G 1)_i]
    #                 - (4/h) sum_ij F_ij s_ij - (2d/h) sum_ij G_ij,
    # the cross term using the symmetry of G over all pairs (so it holds summed over row blocks).
    ones = torch.ones_like(x[..., :1])
    rhs_t = torch.cat([scores, x, ones], -1).transpose(1, 2).contiguous()  # (B, 2d + 1, N)
    a = (scores * x).sum(-1)  # s_i . x_i
    total = torch.zeros(batch, dtype=x.dtype, device=x.device)
    block = chunk_rows(batch, n, chunk_elements // 3)
    for i in range(r0, r1, block):
        j = min(r1, i + block)
        s = scratch.distances(left[:, i:j], right)
        k, g, curvature_s = kernel.stein_terms_(s, scratch)
        ks = torch.bmm(rhs_t[:, :d], k.transpose(1, 2))  # (B, d, c) = (K S)^T of the block
        gr = torch.bmm(rhs_t[:, d:], g.transpose(1, 2))  # (B, d + 1, c) = (G [X, 1])^T
        si = rhs_t[:, :d, i:j]
        driving = (si * ks).sum((1, 2))
        cross = (si * gr[:, :d]).sum((1, 2)) - (a[:, i:j] * gr[:, d]).sum(-1)
        pairwise = curvature_s + (d / 2) * gr[:, d].sum(-1)
        total += driving + (4 / h) * (cross - pairwise)
    zero = torch.zeros((), dtype=x.dtype, device=x.device)
    f0, g0 = kernel.profile(zero)
    diagonal = f0 * (scores[:, r0:r1] * scores[:, r0:r1]).sum((-1, -2)) - (2 * d / h) * g0 * (r1 - r0)
    return total, diagonal


def ksd_from_sums(pairs: torch.Tensor, diagonal: torch.Tensor, n: int, ustat: bool = False) -> torch.Tensor:
    """KSD (V-statistic, square root) or the U-statistic of KSD^2 from the full sums of :func:`ksd_sums`."""
    if ustat:
        return (pairs - diagonal) / (n * (n - 1))
    return (pairs / n**2).clamp_min(0).sqrt()


def ksd(
    x: torch.Tensor,
    scores: torch.Tensor,
    kernel: RadialKernel | None = None,
    ustat: bool = False,
    *,
    chunk_elements: int = CHUNK_ELEMENTS,
    scratch: Scratch | None = None,
) -> torch.Tensor:
    """Kernel Stein discrepancy of a particle set.

    Parameters
    ----------
    x, scores : Tensor of shape (..., N, d)
    kernel : RadialKernel, optional
        Base kernel with a fixed numeric bandwidth or "median"; default ``IMQ(1, -0.5, bandwidth=1)``.
    ustat : bool, default=False
        False: the V-statistic estimate of KSD (square root, >= 0). True: the U-statistic estimate of
        KSD^2 (pairs i != j; unbiased, may be negative).
    scratch : Scratch, optional
        Pairwise buffers kept between calls.

    Returns
    -------
    Tensor of shape (...)
    """
    kernel = default_ksd_kernel() if kernel is None else kernel
    if not isinstance(kernel, RadialKernel) or kernel.singular:
        raise ValueError(f"ksd: kernel must be a radial kernel with a bounded gradient at 0, got {kernel!r}")
    if x.shape != scores.shape:
        raise ValueError(f"ksd: scores must have the shape of x {tuple(x.shape)}; got {tuple(scores.shape)}")
    xb, lead = as_batch(x, "ksd: x")
    sb = scores.reshape(xb.shape)
    n = xb.shape[1]
    if ustat and n < 2:
        raise ValueError(f"ksd: the U-statistic needs at least 2 particles, got {n}")
    pairs, diagonal = ksd_sums(xb, sb, kernel, chunk_elements=chunk_elements, scratch=scratch)
    return ksd_from_sums(pairs, diagonal, n, ustat).reshape(lead)

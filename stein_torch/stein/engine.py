"""The SVGD direction in matmul form over batches of ensembles, for a range of rows.

For particles x_1..x_N with scores s_j = grad log p(x_j) the SVGD direction is
("Stein Variational Gradient Descent: A General Purpose Bayesian Inference Algorithm", arXiv:1608.04471)

    phi(x_i) = (1/N) sum_j [ k(x_j, x_i) s_j + grad_{x_j} k(x_j, x_i) ].

For a radial kernel k = f(|x - y|^2 / h) this is (1/N) [K S + (2/h)(G X - diag(G 1) X)] with
K = f(s), G = f'(s): thin products of K and G with [S, X, 1] per block of rows (one product for the
RBF, where G = -K). Rows are processed in chunks so memory stays O(N x chunk); no Python loop runs
over particles. A :class:`~stein_torch.stein.scratch.Scratch` keeps the pairwise blocks between calls.

``rows`` restricts the output to particles ``rows.start .. rows.stop - 1`` while every sum still runs
over all N particles: a process that owns some of the particles computes only their directions
(the bandwidth, centring and standardiser come from all particles, so they agree everywhere).
"""

from __future__ import annotations

import torch

from ..kernels import RBF, RadialKernel
from ..kernels.linear import standardizer
from .scratch import Scratch

__all__ = ["radial_direction", "linear_direction", "CHUNK_ELEMENTS"]

CHUNK_ELEMENTS = 1 << 22  # pairwise entries held at once (32 MiB per matrix in float64)


def as_batch(x: torch.Tensor, name: str) -> tuple[torch.Tensor, torch.Size]:
    """(..., N, d) -> (B, N, d) and the leading shape."""
    if x.dim() < 2:
        raise ValueError(f"{name} must have shape (..., N, d); got {tuple(x.shape)}")
    lead = x.shape[:-2]
    return x.reshape(-1, *x.shape[-2:]), lead


def row_range(rows: slice | None, n: int) -> tuple[int, int]:
    """(start, stop) of a row slice over N particles (all rows when None)."""
    if rows is None:
        return 0, n
    start, stop, step = rows.indices(n)
    if step != 1 or stop <= start:
        raise ValueError(f"rows must be a non-empty contiguous slice of range({n}), got {rows!r}")
    return start, stop


def distance_factors(x: torch.Tensor, h: torch.Tensor | None = None):
    """Factors L (B, N, d+2) and R (B, N, d+2) with L_a R^T = |x_a - x|^2 / h (h = 1 when None), so
    one bmm gives the scaled squared distances of a block of rows with no elementwise pass.
    x is centred first: distances do not move, and |a|^2 + |b|^2 - 2ab keeps its digits."""
    x = x - x.mean(-2, keepdim=True)
    sq = (x * x).sum(-1, keepdim=True)
    ones = torch.ones_like(sq)
    left = torch.cat([-2 * x, sq, ones], -1)
    if h is not None:
        left = left / h[:, None, None]
    right = torch.cat([x, ones, sq], -1)
    return left, right


def chunk_rows(batch: int, n: int, chunk_elements: int) -> int:
    """Rows per block so that a (batch, rows, n) block holds about ``chunk_elements`` entries."""
    return max(1, min(n, chunk_elements // max(1, batch * n)))


def radial_direction(
    x: torch.Tensor,
    score: torch.Tensor,
    kernel: RadialKernel,
    h: torch.Tensor | None = None,
    *,
    score_coef: float = 1.0,
    weights: torch.Tensor | None = None,
    rows: slice | None = None,
    generator: torch.Generator | None = None,
    chunk_elements: int = CHUNK_ELEMENTS,
    scratch: Scratch | None = None,
) -> torch.Tensor:
    """SVGD direction of a radial kernel, optionally with per-particle weights.

    With weights w the kernel is w(x) k(x, y) w(y) and the direction
    (w_i / N) sum_j w_j [score_coef k_ij s_j + grad_{x_j} k_ij]; a target-weighted kernel passes
    w = p^(-1/2) and score_coef = drive - 1/2 (the weight's own gradient).

    Parameters
    ----------
    x, score : Tensor of shape (B, N, d)
    h : Tensor of shape (B,), optional
        Bandwidths; by default the kernel's (``kernel.bandwidth_for``). When all N x N distances
        fit in one chunk, the median heuristic reads its pairs from them instead of computing its own.
    weights : Tensor of shape (B, N), optional
    rows : slice, optional
        Rows i whose direction is wanted (default: all).
    generator : torch.Generator, optional
        Randomness of the median heuristic on large N.
    scratch : Scratch, optional
        Buffers kept between calls (default: fresh ones).

    Returns
    -------
    Tensor of shape (B, R, d), R the number of rows.
    """
    batch, n, d = x.shape
    r0, r1 = row_range(rows, n)
    scratch = Scratch() if scratch is None else scratch
    block = chunk_rows(batch, n, chunk_elements)
    first_block = inv_h = None
    if h is None and block >= n and (r0, r1) == (0, n) and kernel.bandwidth == "median":
        left, right = distance_factors(x)  # one block: the median from its own distances
        first_block = scratch.distances(left, right)  # |x_i - x_j|^2, scaled by 1/h in the profile
        h = kernel.bandwidth_for(x, generator, distances=first_block)
        inv_h = (1 / h)[:, None, None]
    else:
        if h is None:
            h = kernel.bandwidth_for(x, generator)
        left, right = distance_factors(x, h)
    # Products are taken as rhs^T K^T (B, 2d + 1, c): the same numbers as K rhs, but with the small
    # side first BLAS runs about twice as fast in float64 (measured, see DEVELOPERS.md). The rows of
    # rhs^T = [score_coef S, X, 1]^T carry the weights and the 1/N of the average.
    ones = torch.full((batch, 1, n), 1.0 / n, dtype=x.dtype, device=x.device)
    rhs_t = torch.cat([(score_coef / n) * score.mT, x.mT / n, ones], 1)  # (B, 2d + 1, N)
    if weights is not None:
        rhs_t = rhs_t * weights[:, None, :]
    x_t = x.mT
    fast_rbf = type(kernel) is RBF  # G = -K: a single matmul
    two_over_h = (2 / h)[:, None, None]
    out = torch.empty((batch, r1 - r0, d), dtype=x.dtype, device=x.device)
    out_t = out.mT  # (B, d, R) view: results are written straight into out
    for a in range(r0, r1, block):
        b = min(r1, a + block)
        oa, ob = a - r0, b - r0
        s = first_block if first_block is not None else scratch.distances(left[:, a:b], right)  # (B, c, N)
        if fast_rbf:  # phi = K S + (2/h) (G X - diag(G 1) X) with G = -K
            k = s.mul_(-inv_h if inv_h is not None else -1).exp_()  # rounding below 0: exp(+1e-16), harmless
            kr = torch.bmm(rhs_t, k.transpose(1, 2))  # (B, 2d + 1, c)
            ks, kx, ksum = kr[:, :d], kr[:, d : 2 * d], kr[:, 2 * d :]
            torch.addcmul(ks, two_over_h, torch.addcmul(kx, ksum, x_t[..., a:b], value=-1), value=-1, out=out_t[..., oa:ob])
            continue
        k, g = kernel.profile_(s, scratch, inv_h)
        if kernel.singular:  # profile() keeps f' finite near 0; the self-pair (zero displacement) is exactly 0
            idx = torch.arange(a, b, device=x.device)
            g[:, idx - a, idx] = 0
        ks = torch.bmm(rhs_t[:, :d], k.transpose(1, 2))
        gr = torch.bmm(rhs_t[:, d:], g.transpose(1, 2))
        gx, gsum = gr[:, :d], gr[:, d:]
        torch.addcmul(ks, two_over_h, torch.addcmul(gx, gsum, x_t[..., a:b], value=-1), out=out_t[..., oa:ob])
    if weights is not None:
        out = out * weights[:, r0:r1, None]
    return out


def linear_direction(
    x: torch.Tensor,
    score: torch.Tensor,
    *,
    score_coef: float = 1.0,
    radius: float | None = None,
    rows: slice | None = None,
) -> torch.Tensor:
    """SVGD direction of :class:`~stein_torch.kernels.Linear`, in O(N d^2).

    With features f(x) = x~ (x~ = (x - m) / sd) the kernel is f(x).f(y) + 1 and
    phi_i = f_i (1/N) sum_j f_j s_j^T + mean_j s_j + (1/N) sum_j J_j^T f_i, J = df/dx.
    With ``radius`` r the features saturate, f = x~ / rho with rho = sqrt(1 + |x~|^2 / (r^2 d)).

    Parameters
    ----------
    x, score : Tensor of shape (B, N, d)
    rows : slice, optional
        Rows whose direction is wanted (default: all).

    Returns
    -------
    Tensor of shape (B, R, d)
    """
    center, scale = standardizer(x)
    xt = (x - center) / scale
    n, d = x.shape[-2:]
    r0, r1 = row_range(rows, n)
    s = score if score_coef == 1 else score_coef * score
    if radius is None:
        mine = xt[:, r0:r1]
        return mine @ (xt.mT @ s / n) + s.mean(-2, keepdim=True) + mine / scale
    # f = x~ / rho, rho = sqrt(1 + c |x~|^2), c = 1 / (r^2 d); the Jacobian sum is
    # (1/N) sum_j J_j^T f_i = [mean_j(1/rho_j) f_i - f_i (1/N) sum_j c f_j f_j^T / rho_j] / sd,
    # which folds into the same d x d matrix as the driving term.
    c = 1.0 / (radius**2 * d)
    inv_rho = (xt * xt).sum(-1, keepdim=True).mul_(c).add_(1).rsqrt_()  # (B, N, 1)
    f = xt * inv_rho
    m = (f.mT @ (s - f * (c * inv_rho / scale))).div_(n)  # (B, d, d)
    mine = f[:, r0:r1]
    return torch.baddbmm(s.mean(-2, keepdim=True) + mine * (inv_rho.mean(-2, keepdim=True) / scale), mine, m)

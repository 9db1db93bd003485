"""The SVGD direction and the kernel Stein discrepancy, in matmul form over batches of ensembles.

For particles x_1..x_N with scores s_j = grad log p(x_j) the SVGD direction is
("Stein Variational Gradient Descent", arXiv:1608.04471)

    phi(x_i) = (1/N) sum_j [ k(x_j, x_i) s_j + grad_{x_j} k(x_j, x_i) ].

For a radial kernel k = f(|x - y|^2 / h) this is (1/N) [K S + (2/h)(G X - diag(G 1) X)] with
K = f(s), G = f'(s): thin products of K and G with [S, X, 1] per block of rows (one product for the
RBF, where G = -K). Rows are processed in chunks so memory stays O(N x chunk); no Python loop runs
over particles. A :class:`Scratch` keeps the N x N blocks between calls.
"""

from __future__ import annotations

import torch

from .kernels import IMQ, RBF, Kernel, Linear, RadialKernel, Sum, standardizer

__all__ = ["svgd_direction", "ksd", "Scratch", "CHUNK_ELEMENTS"]

CHUNK_ELEMENTS = 1 << 22  # pairwise entries held at once (32 MiB per matrix in float64)
SCRATCH_BYTES = 8 << 20  # largest pairwise buffer a Scratch keeps between calls


class Scratch:
    """Pairwise buffers reused from one call to the next (a sampler keeps one for its run).

    Blocks of N x N numbers are the engine's largest temporaries. Allocated afresh at every step
    they come as new pages from the operating system, whose first touch costs as much as the
    arithmetic at moderate N (measured: KSD at N = 256 took 2.2 ms with fresh pages, 0.9 ms with
    reused ones). Buffers up to ``SCRATCH_BYTES`` are kept; larger ones are allocated per call.
    Not for concurrent use from several threads.
    """

    def __init__(self):
        self._buffers: dict[str, torch.Tensor] = {}

    def buffer(self, name: str, like: torch.Tensor, shape: tuple | None = None) -> torch.Tensor:
        """An uninitialised contiguous tensor with the dtype and device of ``like`` and its shape
        (or ``shape``)."""
        shape = like.shape if shape is None else torch.Size(shape)
        buf = self._buffers.get(name)
        if buf is not None and buf.shape == shape and buf.dtype == like.dtype and buf.device == like.device:
            return buf
        buf = torch.empty(shape, dtype=like.dtype, device=like.device)
        if buf.numel() * buf.element_size() <= SCRATCH_BYTES:
            self._buffers[name] = buf
        return buf

    def distances(self, left: torch.Tensor, right: torch.Tensor) -> torch.Tensor:
        """Scaled squared distances of a row block, left @ right^T, (B, c, N); rounding can leave
        entries a little below 0 (kernels clamp where it matters, see ``RadialKernel.profile_``)."""
        out = self.buffer("distances", left, (left.shape[0], left.shape[1], right.shape[1]))
        return torch.bmm(left, right.transpose(1, 2), out=out)


def _as_batch(x: torch.Tensor, name: str) -> tuple[torch.Tensor, torch.Size]:
    if x.dim() < 2:
        raise ValueError(f"{name} must have shape (..., N, d); got {tuple(x.shape)}")
    lead = x.shape[:-2]
    return x.reshape(-1, *x.shape[-2:]), lead


def _distance_factors(x: torch.Tensor, h: torch.Tensor | None = None):
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


def _chunk_rows(batch: int, n: int, chunk_elements: int) -> int:
    return max(1, min(n, chunk_elements // max(1, batch * n)))


def radial_direction(
    x: torch.Tensor,
    score: torch.Tensor,
    kernel: RadialKernel,
    h: torch.Tensor | None = None,
    *,
    score_coef: float = 1.0,
    weights: torch.Tensor | None = None,
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
    generator : torch.Generator, optional
        Randomness of the median heuristic on large N.
    scratch : Scratch, optional
        Buffers kept between calls (default: fresh ones).

    Returns
    -------
    Tensor of shape (B, N, d)
    """
    batch, n, d = x.shape
    scratch = Scratch() if scratch is None else scratch
    rows = _chunk_rows(batch, n, chunk_elements)
    first_block = inv_h = None
    if h is None and rows == n and kernel.bandwidth == "median":  # one block: the median from its distances
        left, right = _distance_factors(x)
        first_block = scratch.distances(left, right)  # |x_i - x_j|^2, scaled by 1/h in the profile
        h = kernel.bandwidth_for(x, generator, distances=first_block)
        inv_h = (1 / h)[:, None, None]
    else:
        if h is None:
            h = kernel.bandwidth_for(x, generator)
        left, right = _distance_factors(x, h)
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
    out = torch.empty_like(x)
    out_t = out.mT  # (B, d, N) view: results are written straight into out
    for a in range(0, n, rows):
        b = min(n, a + rows)
        if first_block is not None:
            s = first_block
        else:
            s = scratch.distances(left[:, a:b], right)  # (B, c, N) scaled distances
        if fast_rbf:  # phi = K S + (2/h) (G X - diag(G 1) X) with G = -K
            k = s.mul_(-inv_h if inv_h is not None else -1).exp_()  # rounding below 0: exp(+1e-16), harmless
            kr = torch.bmm(rhs_t, k.transpose(1, 2))  # (B, 2d + 1, c)
            ks, kx, ksum = kr[:, :d], kr[:, d : 2 * d], kr[:, 2 * d :]
            torch.addcmul(ks, two_over_h, torch.addcmul(kx, ksum, x_t[..., a:b], value=-1), value=-1, out=out_t[..., a:b])
            continue
        k, g = kernel.profile_(s, scratch, inv_h)
        if kernel.singular:  # profile() keeps f' finite near 0; the self-pair (zero displacement) is exactly 0
            idx = torch.arange(a, b, device=x.device)
            g[:, idx - a, idx] = 0
        ks = torch.bmm(rhs_t[:, :d], k.transpose(1, 2))
        gr = torch.bmm(rhs_t[:, d:], g.transpose(1, 2))
        gx, gsum = gr[:, :d], gr[:, d:]
        torch.addcmul(ks, two_over_h, torch.addcmul(gx, gsum, x_t[..., a:b], value=-1), out=out_t[..., a:b])
    if weights is not None:
        out = out * weights[..., None]
    return out


def linear_direction(
    x: torch.Tensor, score: torch.Tensor, *, score_coef: float = 1.0, radius: float | None = None
) -> torch.Tensor:
    """SVGD direction of :class:`~stein_torch.kernels.Linear`, in O(N d^2).

    With features f(x) = x~ (x~ = (x - m) / sd) the kernel is f(x).f(y) + 1 and
    phi_i = f_i (1/N) sum_j f_j s_j^T + mean_j s_j + (1/N) sum_j J_j^T f_i, J = df/dx.
    With ``radius`` r the features saturate, f = x~ / rho with rho = sqrt(1 + |x~|^2 / (r^2 d)).
    """
    center, scale = standardizer(x)
    xt = (x - center) / scale
    n, d = x.shape[-2:]
    s = score if score_coef == 1 else score_coef * score
    if radius is None:
        return xt @ (xt.mT @ s / n) + s.mean(-2, keepdim=True) + xt / scale
    # f = x~ / rho, rho = sqrt(1 + c |x~|^2), c = 1 / (r^2 d); the Jacobian sum is
    # (1/N) sum_j J_j^T f_i = [mean_j(1/rho_j) f_i - f_i (1/N) sum_j c f_j f_j^T / rho_j] / sd,
    # which folds into the same d x d matrix as the driving term.
    c = 1.0 / (radius**2 * d)
    inv_rho = (xt * xt).sum(-1, keepdim=True).mul_(c).add_(1).rsqrt_()  # (B, N, 1)
    f = xt * inv_rho
    m = (f.mT @ (s - f * (c * inv_rho / scale))).div_(n)  # (B, d, d)
    return torch.baddbmm(s.mean(-2, keepdim=True) + f * (inv_rho.mean(-2, keepdim=True) / scale), f, m)


def svgd_direction(
    x: torch.Tensor,
    score: torch.Tensor,
    kernel: Kernel,
    *,
    drive: float = 1.0,
    log_prob: torch.Tensor | None = None,
    generator: torch.Generator | None = None,
    chunk_elements: int = CHUNK_ELEMENTS,
    scratch: Scratch | None = None,
) -> torch.Tensor:
    """The SVGD direction phi for each particle.

    Parameters
    ----------
    x, score : Tensor of shape (..., N, d)
        Particles and their scores grad log p.
    kernel : Kernel
    drive : float, default=1.0
        Weight of the driving (score) term; annealing schedules lower it early on.
    log_prob : Tensor of shape (..., N), optional
        Log densities (needed by target-weighted kernels).
    generator : torch.Generator, optional
        Fresh random pairs for the median heuristic on large N (default: its fixed pairs).
    scratch : Scratch, optional
        Pairwise buffers kept between calls; pass the same one to repeated calls at one size.

    Returns
    -------
    Tensor of shape (..., N, d)
    """
    if x.shape != score.shape:
        raise ValueError(f"score must have the shape of x {tuple(x.shape)}; got {tuple(score.shape)}")
    xb, lead = _as_batch(x, "x")
    sb = score.reshape(xb.shape)
    lpb = None if log_prob is None else log_prob.reshape(xb.shape[:-1])
    out = _direction(xb, sb, kernel, drive, lpb, generator, chunk_elements, scratch or Scratch())
    return out.reshape(*lead, *x.shape[-2:])


def _direction(x, s, kernel, drive, lp, generator, chunk_elements, scratch):
    if isinstance(kernel, Sum):
        first, *rest = (_direction(x, s, part, drive, lp, generator, chunk_elements, scratch) for part in kernel.parts)
        for phi in rest:
            first += phi
        return first
    if isinstance(kernel, Linear):
        return linear_direction(x, s, score_coef=drive, radius=kernel.radius)
    if hasattr(kernel, "stein_direction"):  # kernels that bring their own (e.g. target-weighted)
        return kernel.stein_direction(
            x, s, drive=drive, log_prob=lp, generator=generator, chunk_elements=chunk_elements, scratch=scratch
        )
    if isinstance(kernel, RadialKernel):
        return radial_direction(
            x, s, kernel, score_coef=drive, generator=generator, chunk_elements=chunk_elements, scratch=scratch
        )
    raise TypeError(f"kernel: no SVGD direction for {type(kernel).__qualname__}")


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

    KSD^2 = (1/N^2) sum_ij u(x_i, x_j), u(x, y) = s(x).s(y) k + s(x).grad_y k + s(y).grad_x k
    + trace(grad_x grad_y k) ("A Kernelized Stein Discrepancy for Goodness-of-fit Tests",
    arXiv:1602.03253). The default base kernel, IMQ with c = 1, beta = -1/2 on unscaled coordinates,
    detects non-convergence ("Measuring Sample Quality with Kernels", arXiv:1703.01717).

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
    kernel = IMQ(1.0, -0.5, bandwidth=1.0) if kernel is None else kernel
    if not isinstance(kernel, RadialKernel) or kernel.singular:
        raise ValueError(f"ksd: kernel must be a radial kernel with a bounded gradient at 0, got {kernel!r}")
    if x.shape != scores.shape:
        raise ValueError(f"ksd: scores must have the shape of x {tuple(x.shape)}; got {tuple(scores.shape)}")
    xb, lead = _as_batch(x, "ksd: x")
    sb = scores.reshape(xb.shape)
    batch, n, d = xb.shape
    if ustat and n < 2:
        raise ValueError(f"ksd: the U-statistic needs at least 2 particles, got {n}")
    h = kernel.bandwidth_for(xb)
    left, right = _distance_factors(xb, h)
    scratch = Scratch() if scratch is None else scratch
    # Sum over pairs without N x N products of scores: with K = f(s), G = f'(s), F = f''(s),
    #   sum_ij u_ij = sum_i s_i.(K S)_i + (4/h) sum_i [s_i.(G X)_i - (s_i.x_i)(G 1)_i]
    #                 - (4/h) sum_ij F_ij s_ij - (2d/h) sum_ij G_ij,
    # the cross term using the symmetry of G over all pairs (so it holds summed over row blocks).
    ones = torch.ones_like(xb[..., :1])
    rhs_t = torch.cat([sb, xb, ones], -1).transpose(1, 2).contiguous()  # (B, 2d + 1, N)
    a = (sb * xb).sum(-1)  # s_i . x_i
    total = torch.zeros(batch, dtype=xb.dtype, device=xb.device)
    rows = _chunk_rows(batch, n, chunk_elements // 3)
    for i in range(0, n, rows):
        j = min(n, i + rows)
        s = scratch.distances(left[:, i:j], right)
        k, g, curvature_s = kernel.stein_terms_(s, scratch)
        ks = torch.bmm(rhs_t[:, :d], k.transpose(1, 2))  # (B, d, c) = (K S)^T of the block
        gr = torch.bmm(rhs_t[:, d:], g.transpose(1, 2))  # (B, d + 1, c) = (G [X, 1])^T
        si = rhs_t[:, :d, i:j]
        driving = (si * ks).sum((1, 2))
        cross = (si * gr[:, :d]).sum((1, 2)) - (a[:, i:j] * gr[:, d]).sum(-1)
        pairwise = curvature_s + (d / 2) * gr[:, d].sum(-1)
        total += driving + (4 / h) * (cross - pairwise)
    if ustat:
        zero = torch.zeros((), dtype=xb.dtype, device=xb.device)
        f0, g0 = kernel.profile(zero)
        diag = f0 * (sb * sb).sum((-1, -2)) - (2 * d / h) * g0 * n
        out = (total - diag) / (n * (n - 1))
    else:
        out = (total / n**2).clamp_min(0).sqrt()
    return out.reshape(lead)

"""The SVGD direction and the kernel Stein discrepancy, in matmul form over batches of ensembles.

For particles x_1..x_N with scores s_j = grad log p(x_j) the SVGD direction is
("Stein Variational Gradient Descent", arXiv:1608.04471)

    phi(x_i) = (1/N) sum_j [ k(x_j, x_i) s_j + grad_{x_j} k(x_j, x_i) ].

For a radial kernel k = f(|x - y|^2 / h) this is (1/N) [K S + (2/h)(G X - diag(G 1) X)] with
K = f(s), G = f'(s): one matmul against [S, X, 1] per block of rows. Rows are processed in chunks so
memory stays O(N x chunk); no Python loop runs over particles.
"""

from __future__ import annotations

import torch

from .kernels import IMQ, RBF, Kernel, Linear, RadialKernel, Sum, standardizer

__all__ = ["svgd_direction", "ksd", "CHUNK_ELEMENTS"]

CHUNK_ELEMENTS = 1 << 22  # pairwise entries held at once (32 MiB per matrix in float64)


def _as_batch(x: torch.Tensor, name: str) -> tuple[torch.Tensor, torch.Size]:
    if x.dim() < 2:
        raise ValueError(f"{name} must have shape (..., N, d); got {tuple(x.shape)}")
    lead = x.shape[:-2]
    return x.reshape(-1, *x.shape[-2:]), lead


def _neg_scaled_distances(x: torch.Tensor, h: torch.Tensor):
    """Factors L (B, N, d+2) and R (B, N, d+2) with L_a R^T = -|x_a - x|^2 / h, so one bmm gives
    the scaled squared distances of a block of rows with no elementwise pass."""
    sq = (x * x).sum(-1, keepdim=True)
    ones = torch.ones_like(sq)
    left = torch.cat([2 * x, -sq, -ones], -1) / h[:, None, None]
    right = torch.cat([x, ones, sq], -1)
    return left, right


def _chunk_rows(batch: int, n: int, chunk_elements: int) -> int:
    return max(1, min(n, chunk_elements // max(1, batch * n)))


def radial_direction(
    x: torch.Tensor,
    score: torch.Tensor,
    kernel: RadialKernel,
    h: torch.Tensor,
    *,
    score_coef: float = 1.0,
    weights: torch.Tensor | None = None,
    chunk_elements: int = CHUNK_ELEMENTS,
) -> torch.Tensor:
    """SVGD direction of a radial kernel, optionally with per-particle weights.

    With weights w the kernel is w(x) k(x, y) w(y) and the direction
    (w_i / N) sum_j w_j [score_coef k_ij s_j + grad_{x_j} k_ij]; a target-weighted kernel passes
    w = p^(-1/2) and score_coef = drive - 1/2 (the weight's own gradient).

    Parameters
    ----------
    x, score : Tensor of shape (B, N, d)
    h : Tensor of shape (B,)
        Bandwidths.
    weights : Tensor of shape (B, N), optional

    Returns
    -------
    Tensor of shape (B, N, d)
    """
    batch, n, d = x.shape
    left, right = _neg_scaled_distances(x, h)
    ones = torch.ones_like(x[..., :1])
    rhs = torch.cat([score_coef * score, x, ones], -1)  # (B, N, 2d + 1)
    if weights is not None:
        rhs = rhs * weights[..., None]
    fast_rbf = type(kernel) is RBF  # G = -K: a single matmul
    two_over_h = (2 / h)[:, None, None]
    out = torch.empty_like(x)
    rows = _chunk_rows(batch, n, chunk_elements)
    for a in range(0, n, rows):
        b = min(n, a + rows)
        neg_s = torch.bmm(left[:, a:b], right.transpose(1, 2))  # (B, c, N)
        if fast_rbf:
            k = neg_s.clamp_max_(0).exp_()
            kr = torch.bmm(k, rhs)
            ks, kx, ksum = kr[..., :d], kr[..., d : 2 * d], kr[..., 2 * d :]
            out[:, a:b] = ks - two_over_h * (kx - ksum * x[:, a:b])
            continue
        s = neg_s.neg_().clamp_min_(0)
        k, g = kernel.profile(s)
        if kernel.singular:  # profile() keeps f' finite near 0; the self-pair (zero displacement) is exactly 0
            idx = torch.arange(a, b, device=x.device)
            g[:, idx - a, idx] = 0
        ks = torch.bmm(k, rhs[..., :d])
        gr = torch.bmm(g, rhs[..., d:])
        gx, gsum = gr[..., :d], gr[..., d:]
        out[:, a:b] = ks + two_over_h * (gx - gsum * x[:, a:b])
    if weights is not None:
        out = out * weights[..., None]
    return out / n


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
    s = score_coef * score
    if radius is None:
        return xt @ (xt.mT @ s / n) + s.mean(-2, keepdim=True) + xt / scale
    rho = (1 + (xt * xt).sum(-1, keepdim=True) / (radius**2 * d)).sqrt()  # (B, N, 1)
    f = xt / rho
    curl = xt.mT @ (xt / (radius**2 * d * rho**3)) / n  # (1/N) sum_j x~_j x~_j^T / (r^2 d rho_j^3)
    grad_term = ((1 / rho).mean(-2, keepdim=True) * f - f @ curl) / scale
    return f @ (f.mT @ s / n) + s.mean(-2, keepdim=True) + grad_term


def svgd_direction(
    x: torch.Tensor,
    score: torch.Tensor,
    kernel: Kernel,
    *,
    drive: float = 1.0,
    log_prob: torch.Tensor | None = None,
    generator: torch.Generator | None = None,
    chunk_elements: int = CHUNK_ELEMENTS,
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
        Randomness for the median heuristic on large N.

    Returns
    -------
    Tensor of shape (..., N, d)
    """
    if x.shape != score.shape:
        raise ValueError(f"score must have the shape of x {tuple(x.shape)}; got {tuple(score.shape)}")
    xb, lead = _as_batch(x, "x")
    sb = score.reshape(xb.shape)
    lpb = None if log_prob is None else log_prob.reshape(xb.shape[:-1])
    out = _direction(xb, sb, kernel, drive, lpb, generator, chunk_elements)
    return out.reshape(*lead, *x.shape[-2:])


def _direction(x, s, kernel, drive, lp, generator, chunk_elements):
    if isinstance(kernel, Sum):
        return sum(_direction(x, s, part, drive, lp, generator, chunk_elements) for part in kernel.parts)
    if isinstance(kernel, Linear):
        return linear_direction(x, s, score_coef=drive, radius=kernel.radius)
    if hasattr(kernel, "stein_direction"):  # kernels that bring their own (e.g. target-weighted)
        return kernel.stein_direction(x, s, drive=drive, log_prob=lp, generator=generator, chunk_elements=chunk_elements)
    if isinstance(kernel, RadialKernel):
        h = kernel.bandwidth_for(x, generator)
        return radial_direction(x, s, kernel, h, score_coef=drive, chunk_elements=chunk_elements)
    raise TypeError(f"kernel: no SVGD direction for {type(kernel).__qualname__}")


def ksd(
    x: torch.Tensor,
    scores: torch.Tensor,
    kernel: RadialKernel | None = None,
    ustat: bool = False,
    *,
    chunk_elements: int = CHUNK_ELEMENTS,
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
    hh = h[:, None, None]
    left, right = _neg_scaled_distances(xb, h)
    a = (sb * xb).sum(-1)  # s_i . x_i
    total = torch.zeros(batch, dtype=xb.dtype, device=xb.device)
    rows = _chunk_rows(batch, n, chunk_elements // 4)
    for i in range(0, n, rows):
        j = min(n, i + rows)
        s = torch.bmm(left[:, i:j], right.transpose(1, 2)).neg_().clamp_min_(0)
        k, g = kernel.profile(s)
        f2 = kernel.curvature(s)
        ss = torch.bmm(sb[:, i:j], sb.transpose(1, 2))
        cross = torch.bmm(sb[:, i:j], xb.transpose(1, 2)) + torch.bmm(xb[:, i:j], sb.transpose(1, 2))
        cross -= a[:, i:j, None] + a[:, None, :]
        u = k * ss + (2 / hh) * g * cross - (4 / hh**2) * f2 * (s * hh) - (2 * d / hh) * g
        total += u.sum((-1, -2))
    if ustat:
        zero = torch.zeros((), dtype=xb.dtype, device=xb.device)
        f0, g0 = kernel.profile(zero)
        diag = f0 * (sb * sb).sum((-1, -2)) - (2 * d / h) * g0 * n
        out = (total - diag) / (n * (n - 1))
    else:
        out = (total / n**2).clamp_min(0).sqrt()
    return out.reshape(lead)

"""The SVGD direction by its definition, one particle at a time with autograd: the tests' oracle.

phi(x_i) = (1/N) sum_j [ drive k(x_j, x_i) s_j + grad_{x_j} k(x_j, x_i) ]
("Stein Variational Gradient Descent: A General Purpose Bayesian Inference Algorithm",
arXiv:1608.04471). Slow and plain on purpose: nothing of the matmul engine is reused.
"""

from __future__ import annotations

import torch

__all__ = ["reference_direction", "radial_gram"]


def radial_gram(kernel, h: float):
    """k(a_j, b_i) = f(|a_j - b_i|^2 / h) by explicit differences (exact zero on the diagonal)."""
    return lambda a, b: kernel.exact_profile(((a[:, None, :] - b[None, :, :]) ** 2).sum(-1) / h)[0]


def reference_direction(x: torch.Tensor, score: torch.Tensor, gram, drive: float = 1.0) -> torch.Tensor:
    """phi for particles x and scores (N, d); ``gram(a, b)`` (len a, len b) the kernel at fixed settings."""
    n = x.shape[0]
    phi = torch.zeros_like(x)
    for i in range(n):
        xj = x.detach().clone().requires_grad_(True)
        k = gram(xj, x[i : i + 1].detach())[:, 0]  # k(x_j, x_i) for every j
        (grad,) = torch.autograd.grad(k.sum(), xj)  # row j: grad_{x_j} k(x_j, x_i)
        grad = torch.nan_to_num(grad, nan=0.0)  # singular kernels: f'(0) * 0 at the self-pair is 0
        phi[i] = (drive * k.detach()[:, None] * score + grad).sum(0) / n
    return phi

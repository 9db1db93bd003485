"""Kernel Stein discrepancy `st.ksd` against an independent double-loop implementation.

Sources: the Stein kernel u(x, y) = s(x).s(y) k + s(x).grad_y k + s(y).grad_x k + tr(grad_x grad_y k)
("A Kernelized Stein Discrepancy for Goodness-of-fit Tests", arXiv:1602.03253, definition of u_q),
and the sample-quality properties of the IMQ KSD ("Measuring Sample Quality with Kernels",
arXiv:1703.01717): exact samples score lower as N grows, and sets that are too narrow or shifted score
higher than exact samples.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

import stein_torch as st
from stein_torch.kernels import IMQ, RBF, GammaExponential, Matern

torch.set_default_dtype(torch.float64)


# --------------------------------------------------------------------------- independent reference
def _imq(c, beta, h):
    return lambda x, y: (c**2 + ((x - y) ** 2).sum() / h) ** beta


def _rbf(h):
    return lambda x, y: torch.exp(-((x - y) ** 2).sum() / h)


def stein_kernel_autograd(k, x, y, sx, sy):
    """u(x, y) of arXiv:1602.03253 with every kernel derivative taken by autograd (no closed forms)."""
    x = x.clone().requires_grad_(True)
    y = y.clone().requires_grad_(True)
    value = k(x, y)
    gx, gy = torch.autograd.grad(value, (x, y), create_graph=True)
    trace = sum(torch.autograd.grad(gx[a], y, retain_graph=True)[0][a] for a in range(x.shape[0]))
    return (sx @ sy) * value + sx @ gy + sy @ gx + trace


def ksd_double_loop(k, x, s, ustat=False):
    """KSD by a Python double loop over all pairs: sqrt of the V-statistic, or the U-statistic of KSD^2."""
    n = x.shape[0]
    total = 0.0
    for i in range(n):
        for j in range(n):
            if ustat and i == j:
                continue
            total += float(stein_kernel_autograd(k, x[i], x[j], s[i], s[j]).detach())
    if ustat:
        return total / (n * (n - 1))
    return math.sqrt(max(total, 0.0) / n**2)


def gaussian_set(n, d, seed, scale=1.0, shift=0.0):
    """Points scale * N(0, I) + shift and their N(0, I) scores -x (closed form)."""
    g = torch.Generator().manual_seed(seed)
    x = scale * torch.randn(n, d, generator=g) + shift
    return x, -x


# --------------------------------------------------------------------------- agreement
@pytest.mark.parametrize("ustat", [False, True])
def test_default_imq_matches_double_loop(ustat):
    # Reference: u(x, y) of arXiv:1602.03253 by autograd, IMQ c = 1, beta = -1/2, h = 1 (arXiv:1703.01717).
    g = torch.Generator().manual_seed(1)
    x = torch.randn(7, 3, generator=g) * 1.5 + 0.3
    s = torch.randn(7, 3, generator=g)  # arbitrary scores: the formula must hold for any vector field
    expected = ksd_double_loop(_imq(1.0, -0.5, 1.0), x, s, ustat=ustat)
    got = float(st.ksd(x, s, ustat=ustat))
    assert got == pytest.approx(expected, rel=1e-10, abs=1e-12)


@pytest.mark.parametrize(
    "kernel, reference",
    [
        (IMQ(2.0, -0.3, bandwidth=0.7), _imq(2.0, -0.3, 0.7)),
        (RBF(bandwidth=2.5), _rbf(2.5)),
    ],
)
def test_other_kernels_match_double_loop(kernel, reference):
    # Reference: u(x, y) of arXiv:1602.03253 by autograd for the kernel's own formula.
    g = torch.Generator().manual_seed(2)
    x, s = torch.randn(6, 2, generator=g), torch.randn(6, 2, generator=g)
    for ustat in (False, True):
        expected = ksd_double_loop(reference, x, s, ustat=ustat)
        assert float(st.ksd(x, s, kernel, ustat=ustat)) == pytest.approx(expected, rel=1e-10, abs=1e-12)


def test_median_bandwidth_matches_double_loop():
    # Median heuristic h = median_{i<j} |x_i - x_j|^2 / log(N + 1) (arXiv:1608.04471), computed here by numpy.
    g = torch.Generator().manual_seed(3)
    # N = 7 gives 21 pairs, an odd count, so the median is a single pair (no averaging convention).
    x, s = torch.randn(7, 2, generator=g), torch.randn(7, 2, generator=g)
    xn = x.numpy()
    i, j = np.triu_indices(7, k=1)
    h = float(np.median(((xn[i] - xn[j]) ** 2).sum(-1)) / math.log(8))
    expected = ksd_double_loop(_imq(1.0, -0.5, h), x, s)
    assert float(st.ksd(x, s, IMQ(1.0, -0.5, bandwidth="median"))) == pytest.approx(expected, rel=1e-10)


def test_batched_leading_dims_match_one_by_one():
    # Reference: the double loop on each set separately (arXiv:1602.03253).
    g = torch.Generator().manual_seed(4)
    x = torch.randn(2, 3, 5, 2, generator=g)
    s = torch.randn(2, 3, 5, 2, generator=g)
    for ustat in (False, True):
        got = st.ksd(x, s, ustat=ustat)
        assert got.shape == (2, 3)
        for a in range(2):
            for b in range(3):
                expected = ksd_double_loop(_imq(1.0, -0.5, 1.0), x[a, b], s[a, b], ustat=ustat)
                assert float(got[a, b]) == pytest.approx(expected, rel=1e-10, abs=1e-12)


def test_chunking_does_not_change_the_value():
    # Reference: the unchunked computation (the chunk size only splits the pairwise sum; common practice).
    x, s = gaussian_set(300, 4, seed=5, scale=1.3)
    whole = st.ksd(x, s)
    for chunk in (300 * 7, 300 * 64 * 4, 4):
        assert float(st.ksd(x, s, chunk_elements=chunk)) == pytest.approx(float(whole), rel=1e-12)
        assert float(st.ksd(x, s, ustat=True, chunk_elements=chunk)) == pytest.approx(
            float(st.ksd(x, s, ustat=True)), rel=1e-10
        )


def test_v_and_u_statistics_are_consistent():
    # V^2 N^2 = U N (N - 1) + sum_i u(x_i, x_i), u(x, x) = |s|^2 f(0) - (2 d / h) f'(0) for a radial
    # kernel (from the definition of u in arXiv:1602.03253; IMQ f(0) = 1, f'(0) = -1/2).
    x, s = gaussian_set(40, 3, seed=6)
    n, d = x.shape
    v = float(st.ksd(x, s))
    u = float(st.ksd(x, s, ustat=True))
    diag = float((s * s).sum()) + n * d
    assert v**2 * n**2 == pytest.approx(u * n * (n - 1) + diag, rel=1e-10)


def test_float32_agrees_with_float64():
    # Reference: the float64 value (same formula, common practice: float32 to ~1e-5 relative).
    x, s = gaussian_set(200, 5, seed=7)
    assert float(st.ksd(x.float(), s.float())) == pytest.approx(float(st.ksd(x, s)), rel=1e-4)


# --------------------------------------------------------------------------- sample-quality properties
def test_exact_samples_score_lower_as_n_grows():
    # arXiv:1703.01717: for i.i.d. draws from p the KSD tends to 0 at rate N^-1/2; the V-statistic
    # of KSD^2 has expectation E u(x, x) / N = (E|x|^2 + d) / N = 2 d / N for p = N(0, I) and the IMQ
    # kernel with f(0) = 1, f'(0) = -1/2 (the U-statistic has expectation 0).
    d = 3
    means = {}
    for n in (50, 200, 800):
        values = [float(st.ksd(*gaussian_set(n, d, seed=100 + r))) ** 2 for r in range(6)]
        means[n] = np.mean(values)
    assert means[50] > means[200] > means[800]
    for n, mean in means.items():
        assert mean == pytest.approx(2 * d / n, rel=0.35)


def test_u_statistic_of_exact_samples_is_centred():
    # arXiv:1602.03253: the U-statistic is unbiased for KSD^2, which is 0 for exact samples; its
    # replicate mean must lie within 4 standard errors of 0 while a shifted set's is far above.
    exact = np.array([float(st.ksd(*gaussian_set(100, 2, seed=200 + r), ustat=True)) for r in range(30)])
    assert abs(exact.mean()) < 4 * exact.std(ddof=1) / math.sqrt(len(exact))
    x, _ = gaussian_set(100, 2, seed=300, shift=1.0)
    shifted = float(st.ksd(x, -x, ustat=True))
    assert shifted > exact.mean() + 10 * exact.std(ddof=1)


@pytest.mark.parametrize("scale, shift", [(0.3, 0.0), (0.6, 0.0), (1.0, 0.7), (2.0, 0.0)])
def test_wrong_sets_score_higher_than_exact_samples(scale, shift):
    # arXiv:1703.01717: sets concentrated too narrowly, too widely or off-centre have higher KSD
    # than exact samples of the same size. Scores are those of the target N(0, I): s(x) = -x.
    n, d = 300, 2
    exact = [float(st.ksd(*gaussian_set(n, d, seed=400 + r))) for r in range(5)]
    wrong = [float(st.ksd(x, -x)) for x, _ in (gaussian_set(n, d, 500 + r, scale, shift) for r in range(5))]
    assert min(wrong) > max(exact)


def test_ksd_of_a_collapsed_set_is_the_score_norm():
    # All particles at one point y: u = |s(y)|^2 + d (IMQ f(0) = 1, f'(0) = -1/2, h = 1), so
    # KSD = sqrt(|s(y)|^2 + d) (definition of u in arXiv:1602.03253).
    x = torch.full((10, 3), 0.5)
    assert float(st.ksd(x, -x)) == pytest.approx(math.sqrt(3 * 0.25 + 3), rel=1e-12)


# --------------------------------------------------------------------------- bad input
def test_bad_input_is_named():
    x, s = gaussian_set(5, 2, seed=0)
    with pytest.raises(ValueError, match="scores"):
        st.ksd(x, s[:, :1])
    with pytest.raises(ValueError, match="x must have shape"):
        st.ksd(x[0], s[0])
    with pytest.raises(ValueError, match="at least 2"):
        st.ksd(x[:1], s[:1], ustat=True)
    with pytest.raises(ValueError, match="kernel"):
        st.ksd(x, s, Matern(0.5, bandwidth=1.0))
    with pytest.raises(ValueError, match="kernel"):
        st.ksd(x, s, GammaExponential(1.0, bandwidth=1.0))

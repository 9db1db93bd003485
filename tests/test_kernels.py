"""Kernel values, gradients and the SVGD direction against outside references.

Sources: scikit-learn's ``sklearn.gaussian_process.kernels`` (RBF, Matern, RationalQuadratic) for
kernel values; torch autograd for gradients; the SVGD update written as an explicit double sum
("Stein Variational Gradient Descent", arXiv:1608.04471, eq. for phi) for the matmul engine.
"""

import math

import numpy as np
import pytest
import torch
from sklearn.gaussian_process import kernels as skk

import stein_torch as st
from stein_torch.kernels.bandwidth import median_bandwidth
from stein_torch.stein import Scratch, ksd, svgd_direction
from stein_torch.stein.reference import radial_gram, reference_direction

torch.set_default_dtype(torch.float64)


@pytest.fixture
def points():
    g = torch.Generator().manual_seed(1)
    return torch.randn(7, 3, generator=g), torch.randn(5, 3, generator=g)


def test_rbf_matches_sklearn(points):
    # sklearn RBF: exp(-r^2 / (2 l^2)), so h = 2 l^2 (sklearn.gaussian_process.kernels.RBF).
    x, y = points
    length = 0.8
    ours = st.kernels.RBF(bandwidth=2 * length**2)(x, y)
    ref = skk.RBF(length_scale=length)(x.numpy(), y.numpy())
    np.testing.assert_allclose(ours.numpy(), ref, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("nu", [0.5, 1.5, 2.5])
def test_matern_matches_sklearn(points, nu):
    # sklearn Matern(length_scale=l, nu) equals ours with h = l^2 (sklearn.gaussian_process.kernels.Matern).
    x, y = points
    length = 1.3
    ours = st.kernels.Matern(nu=nu, bandwidth=length**2)(x, y)
    ref = skk.Matern(length_scale=length, nu=nu)(x.numpy(), y.numpy())
    np.testing.assert_allclose(ours.numpy(), ref, rtol=1e-10, atol=1e-12)


def test_imq_matches_rational_quadratic(points):
    # sklearn RationalQuadratic: (1 + r^2 / (2 alpha l^2))^-alpha = IMQ with c = 1, beta = -alpha,
    # h = 2 alpha l^2 (sklearn.gaussian_process.kernels.RationalQuadratic).
    x, y = points
    alpha, length = 0.5, 0.7
    ours = st.kernels.IMQ(c=1.0, beta=-alpha, bandwidth=2 * alpha * length**2)(x, y)
    ref = skk.RationalQuadratic(length_scale=length, alpha=alpha)(x.numpy(), y.numpy())
    np.testing.assert_allclose(ours.numpy(), ref, rtol=1e-12)


def test_gamma_exponential_handbook_formula(points):
    # "Gaussian Processes for Machine Learning", ch. 4: k = exp(-(r / l)^gamma); with h = l^2.
    x, y = points
    gamma, length = 1.2, 0.9
    ours = st.kernels.GammaExponential(gamma=gamma, bandwidth=length**2)(x, y)
    r = torch.cdist(x, y)
    np.testing.assert_allclose(ours.numpy(), torch.exp(-((r / length) ** gamma)).numpy(), rtol=1e-12)
    # gamma = 2 is the RBF with the same h.
    np.testing.assert_allclose(
        st.kernels.GammaExponential(2.0, bandwidth=0.5)(x, y).numpy(), st.kernels.RBF(bandwidth=0.5)(x, y).numpy()
    )


KERNELS = [
    st.kernels.RBF(bandwidth=1.7),
    st.kernels.IMQ(bandwidth=1.7),
    st.kernels.Matern(1.5, bandwidth=1.7),
    st.kernels.Matern(2.5, bandwidth=1.7),
    st.kernels.GammaExponential(1.5, bandwidth=1.7),
]


@pytest.mark.parametrize("kernel", KERNELS, ids=repr)
def test_gradient_matches_autograd(points, kernel):
    # Closed-form gradient of k(x, y) in x against torch autograd.
    x, y = points
    xr = x.clone().requires_grad_(True)
    auto = torch.stack(
        [torch.autograd.grad(kernel(xr, y)[:, j].sum(), xr)[0] for j in range(y.shape[0])], 1
    )
    np.testing.assert_allclose(kernel.gradient(x, y).numpy(), auto.numpy(), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("kernel", KERNELS, ids=repr)
def test_profile_curvature_matches_autograd(kernel):
    # f'' in closed form against autograd of f' (used by the kernel Stein discrepancy).
    s = torch.linspace(0.05, 4.0, 9, requires_grad=True)
    _, fprime = kernel.profile(s)
    (auto,) = torch.autograd.grad(fprime.sum(), s)
    np.testing.assert_allclose(kernel.curvature(s.detach()).numpy(), auto.numpy(), rtol=1e-9)
    f, _ = kernel.profile(s)
    (auto1,) = torch.autograd.grad(f.sum(), s)
    np.testing.assert_allclose(kernel.profile(s.detach())[1].numpy(), auto1.numpy(), rtol=1e-9)


@pytest.mark.parametrize("kernel", [st.kernels.RBF(), st.kernels.IMQ(), st.kernels.Matern(2.5), st.kernels.Matern(0.5),
                                    st.kernels.GammaExponential(1.3)], ids=repr)
def test_direction_matches_double_sum(kernel):
    # The chunked matmul engine against the defining double sum (arXiv:1608.04471), written plainly
    # with autograd in stein_torch.stein.reference (no code shared with the engine).
    g = torch.Generator().manual_seed(2)
    x, s = torch.randn(8, 3, generator=g), torch.randn(8, 3, generator=g)
    h = float(median_bandwidth(x))
    ref = reference_direction(x, s, radial_gram(kernel, h))
    fixed = type(kernel)(**{**_settings(kernel), "bandwidth": h})
    for chunk in (1 << 22, 20):  # one block and several row blocks
        ours = svgd_direction(x[None], s[None], fixed, chunk_elements=chunk)[0]
        np.testing.assert_allclose(ours.numpy(), ref.numpy(), rtol=1e-10, atol=1e-12)
        # the median-heuristic kernel itself: with one block its bandwidth comes from the block's
        # own distances (scaled inside the kernel), with several from a separate pass
        ours = svgd_direction(x[None], s[None], kernel, chunk_elements=chunk)[0]
        np.testing.assert_allclose(ours.numpy(), ref.numpy(), rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("kernel", [st.kernels.IMQ(), st.kernels.RBF() + st.kernels.Linear(radius=2.0),
                                    st.kernels.Matern(0.5)], ids=repr)
def test_reused_scratch_buffers_give_the_fresh_results(kernel):
    # A Scratch lends the same N x N buffers to every call (a sampler keeps one for its run): calls at
    # other sizes in between, chunked calls and KSD calls must not leak into the results (reference:
    # the same call with fresh buffers).
    g = torch.Generator().manual_seed(6)
    scratch = Scratch()
    for n, chunk in ((40, 1 << 22), (300, 1 << 22), (40, 1 << 22), (120, 2000), (300, 1 << 22)):
        x, s = torch.randn(2, n, 3, generator=g), torch.randn(2, n, 3, generator=g)
        fresh = svgd_direction(x, s, kernel, chunk_elements=chunk)
        reused = svgd_direction(x, s, kernel, chunk_elements=chunk, scratch=scratch)
        torch.testing.assert_close(reused, fresh, rtol=0, atol=0)
        torch.testing.assert_close(ksd(x, s, scratch=scratch), ksd(x, s), rtol=0, atol=0)


def test_median_over_the_fixed_pair_design_does_not_jitter():
    # Above MEDIAN_PAIRS pairs and without a generator the median heuristic reads a fixed design of
    # pairs: the same particles give the same bandwidth at every call, read from a distance matrix or
    # computed from differences; a generator draws fresh pairs (common practice: the median heuristic
    # of arXiv:1608.04471 on a subsample).
    g = torch.Generator().manual_seed(7)
    x = torch.randn(1, 300, 4, generator=g)
    centred = x - x.mean(-2, keepdim=True)
    d2 = ((centred[:, :, None, :] - centred[:, None, :, :]) ** 2).sum(-1)
    first = median_bandwidth(x)
    assert torch.equal(median_bandwidth(x), first)
    torch.testing.assert_close(median_bandwidth(x, distances=d2), first, rtol=1e-12, atol=0)
    fresh = {float(median_bandwidth(x, torch.Generator().manual_seed(k))[0]) for k in range(5)}
    assert len(fresh) > 1


def _settings(kernel):
    return {k: v for k, v in kernel.state_dict().items() if k != "bandwidth"}


@pytest.mark.parametrize("radius", [None, 2.0, 0.5])
def test_linear_direction_matches_double_sum(radius):
    # Linear kernel on standardised coordinates k = f(x).f(y) + 1 (f = x~, or the saturating
    # features x~ / sqrt(1 + |x~|^2 / (r^2 d))), double sum by autograd with the standardisation held
    # fixed (moment-matching kernel, arXiv:1810.11693, from memory).
    g = torch.Generator().manual_seed(3)
    x, s = torch.randn(9, 4, generator=g, dtype=torch.float64), torch.randn(9, 4, generator=g, dtype=torch.float64)
    center, scale = x.mean(0), x.std(0)
    lin = st.kernels.Linear(radius=radius)
    out = torch.zeros_like(x)
    for i in range(9):
        for j in range(9):
            xj = x[j].clone().requires_grad_(True)
            k = lin.features(xj, center, scale) @ lin.features(x[i], center, scale) + 1
            (gk,) = torch.autograd.grad(k, xj)
            out[i] += k.detach() * s[j] + gk
    np.testing.assert_allclose(svgd_direction(x, s, lin).numpy(), (out / 9).numpy(), rtol=1e-10, atol=1e-12)


def test_sum_kernel_is_sum_of_directions():
    g = torch.Generator().manual_seed(4)
    x, s = torch.randn(2, 15, 3, generator=g), torch.randn(2, 15, 3, generator=g)
    k1, k2 = st.kernels.RBF(), st.kernels.Linear()
    both = svgd_direction(x, s, k1 + k2)
    np.testing.assert_allclose(both.numpy(), (svgd_direction(x, s, k1) + svgd_direction(x, s, k2)).numpy(), rtol=1e-12)


def test_batched_ensembles_are_independent():
    # A batch of ensembles gives each ensemble's own direction (bandwidth per ensemble).
    g = torch.Generator().manual_seed(5)
    x, s = torch.randn(3, 20, 2, generator=g), torch.randn(3, 20, 2, generator=g)
    x[1] *= 10
    kernel = st.kernels.RBF() + st.kernels.Linear()
    batched = svgd_direction(x, s, kernel)
    for e in range(3):
        np.testing.assert_allclose(batched[e].numpy(), svgd_direction(x[e], s[e], kernel).numpy(), rtol=1e-12)


def test_median_heuristic_exact_and_subsampled():
    # h = med |x_i - x_j|^2 / log(N + 1) (arXiv:1608.04471); exact for small N, on a random subset of
    # pairs for large N (within 5% of the exact median for 3000 Gaussian points: common practice).
    g = torch.Generator().manual_seed(6)
    x = torch.randn(40, 3, generator=g)
    d2 = torch.cdist(x, x).pow(2)
    iu = torch.triu_indices(40, 40, 1)
    exact = d2[iu[0], iu[1]].median() / math.log(41)
    assert torch.allclose(median_bandwidth(x), exact)
    big = torch.randn(3000, 3, generator=g)
    d2 = torch.cdist(big, big).pow(2)
    iu = torch.triu_indices(3000, 3000, 1)
    exact = d2[iu[0], iu[1]].median() / math.log(3001)
    approx = median_bandwidth(big, torch.Generator().manual_seed(0))
    assert abs(float(approx / exact) - 1) < 0.05


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda: st.kernels.RBF(bandwidth=-1.0), "bandwidth"),
        (lambda: st.kernels.RBF(bandwidth="mean"), "bandwidth"),
        (lambda: st.kernels.Matern(nu=1.0), "nu"),
        (lambda: st.kernels.GammaExponential(gamma=2.5), "gamma"),
        (lambda: st.kernels.GammaExponential(gamma=0.0), "gamma"),
        (lambda: st.kernels.IMQ(beta=0.5), "beta"),
        (lambda: st.kernels.IMQ(c=0.0), "c"),
    ],
)
def test_invalid_kernel_settings(make, match):
    with pytest.raises((ValueError, TypeError), match=match):
        make()


@pytest.mark.parametrize("kernel", [st.kernels.IMQ() + st.kernels.Linear(radius=2.0), st.kernels.RBF(),
                                    st.kernels.TargetWeighted(st.kernels.Matern(1.5))], ids=repr)
@pytest.mark.parametrize("chunk", [1 << 22, 500])
def test_rows_give_the_same_rows_of_the_full_direction(kernel, chunk):
    # A process owning rows 13..39 of 60 particles computes exactly those rows of the direction
    # (sums over all 60); the full direction is the reference.
    g = torch.Generator().manual_seed(8)
    x, s, lp = torch.randn(2, 60, 3, generator=g), torch.randn(2, 60, 3, generator=g), torch.randn(2, 60, generator=g)
    full = svgd_direction(x, s, kernel, log_prob=lp, chunk_elements=chunk)
    part = svgd_direction(x, s, kernel, log_prob=lp, rows=slice(13, 40), chunk_elements=chunk)
    torch.testing.assert_close(part, full[:, 13:40], rtol=1e-12, atol=1e-13)
    with pytest.raises(ValueError, match="rows"):
        svgd_direction(x, s, kernel, log_prob=lp, rows=slice(40, 13))


def test_ksd_row_sums_add_up_to_the_whole():
    # Partial KSD sums over a partition of the rows add up to the sums over all rows.
    from stein_torch.stein.ksd import default_ksd_kernel, ksd_from_sums, ksd_sums

    g = torch.Generator().manual_seed(9)
    x, s = torch.randn(2, 50, 3, generator=g), torch.randn(2, 50, 3, generator=g)
    parts = [ksd_sums(x, s, default_ksd_kernel(), rows=r) for r in (slice(0, 17), slice(17, 50))]
    pairs, diagonal = (sum(p[i] for p in parts) for i in (0, 1))
    torch.testing.assert_close(ksd_from_sums(pairs, diagonal, 50), ksd(x, s), rtol=1e-12, atol=0)
    torch.testing.assert_close(ksd_from_sums(pairs, diagonal, 50, ustat=True), ksd(x, s, ustat=True), rtol=1e-10, atol=1e-14)

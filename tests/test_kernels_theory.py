"""Non-smooth and target-weighted kernels: values, gradients, SVGD directions, coincident particles.

Outside sources: scikit-learn's Matern and RBF kernels; the handbook formula of the gamma-exponential
kernel exp(-(r / l)^gamma) ("Gaussian Processes for Machine Learning", ch. 4, eq. 4.18); torch
autograd on those formulas; the SVGD direction as written in "Stein Variational Gradient Descent",
arXiv:1608.04471, summed pair by pair.
"""

import math

import numpy as np
import pytest
import torch
from sklearn.gaussian_process.kernels import RBF as SkRBF
from sklearn.gaussian_process.kernels import Matern as SkMatern

import stein_torch as st
from stein_torch.kernels.base import GUARD
from stein_torch.stein.engine import radial_direction

DT = torch.float64
SINGULAR = [st.kernels.GammaExponential(0.5), st.kernels.GammaExponential(1.0), st.kernels.Matern(0.5)]


def separated_points(n, d, seed, min_gap=0.3):
    """Random points with every pair at least min_gap apart (so s > GUARD for h ~ 1)."""
    g = torch.Generator().manual_seed(seed)
    pts = []
    while len(pts) < n:
        p = torch.randn(d, generator=g, dtype=DT) * 1.5
        if all(float((p - q).norm()) > min_gap for q in pts):
            pts.append(p)
    return torch.stack(pts)


def handbook_gamma_exp(x, y, gamma, length):
    """exp(-(|x - y| / l)^gamma), GPML eq. 4.18 (torch, differentiable away from x = y)."""
    r = (x - y).pow(2).sum(-1).sqrt()
    return torch.exp(-(r / length).pow(gamma))


# ----------------------------------------------------------------------------- values
@pytest.mark.parametrize("nu", [0.5, 1.5, 2.5])
@pytest.mark.parametrize("h", [0.3, 2.0])
def test_matern_values_match_sklearn(nu, h):
    x = separated_points(7, 3, seed=1)
    y = torch.cat([x[:2], separated_points(4, 3, seed=2)])  # includes r = 0 pairs
    ours = st.kernels.Matern(nu, bandwidth=h)(x, y).numpy()
    ref = SkMatern(length_scale=math.sqrt(h), nu=nu)(x.numpy(), y.numpy())  # sklearn, same length scale
    np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("gamma", [0.3, 0.5, 1.0, 1.5, 2.0])
def test_gamma_exponential_values_match_handbook(gamma):
    h = 0.7
    x = separated_points(6, 2, seed=3)
    y = torch.cat([x[:1], separated_points(5, 2, seed=4)])
    ours = st.kernels.GammaExponential(gamma, bandwidth=h)(x, y)
    ref = handbook_gamma_exp(x[:, None, :], y[None, :, :], gamma, math.sqrt(h))  # GPML eq. 4.18
    torch.testing.assert_close(ours, ref, rtol=1e-10, atol=1e-12)


def test_gamma_exponential_special_cases_match_sklearn():
    x, h = separated_points(6, 2, seed=5), 1.3
    # gamma = 2 is sklearn's RBF with l^2 = h / 2; gamma = 1 is sklearn's Matern nu = 1/2 with l = sqrt(h)
    rbf = SkRBF(length_scale=math.sqrt(h / 2))(x.numpy())
    lap = SkMatern(length_scale=math.sqrt(h), nu=0.5)(x.numpy())
    np.testing.assert_allclose(st.kernels.GammaExponential(2.0, bandwidth=h)(x, x).numpy(), rbf, rtol=1e-10)
    np.testing.assert_allclose(st.kernels.GammaExponential(1.0, bandwidth=h)(x, x).numpy(), lap, rtol=1e-10)


# ----------------------------------------------------------------------------- derivatives
KERNELS = [st.kernels.GammaExponential(g) for g in (0.5, 1.0, 1.5, 2.0)] + [st.kernels.Matern(nu) for nu in (0.5, 1.5, 2.5)]


@pytest.mark.parametrize("kernel", KERNELS, ids=repr)
def test_profile_derivatives_match_autograd(kernel):
    # s >= GUARD: the guarded f' equals the exact one; both checked against autograd of f
    s = torch.tensor([GUARD, 1e-3, 0.05, 0.4, 1.0, 3.0], dtype=DT, requires_grad=True)
    f, fprime = kernel.profile(s)
    (auto,) = torch.autograd.grad(kernel.exact_profile(s)[0].sum(), s)  # torch autograd
    torch.testing.assert_close(fprime, auto, rtol=1e-9, atol=0)
    torch.testing.assert_close(fprime, kernel.exact_profile(s)[1], rtol=0, atol=0)
    if not kernel.singular and not (isinstance(kernel, st.kernels.Matern) and kernel.nu == 1.5):
        (second,) = torch.autograd.grad(kernel.exact_profile(s)[1].sum(), s)
        torch.testing.assert_close(kernel.curvature(s), second, rtol=1e-9, atol=0)


@pytest.mark.parametrize("kernel", KERNELS, ids=repr)
def test_kernel_gradient_matches_autograd_away_from_zero(kernel):
    h = 0.9
    kernel.bandwidth = h
    x = separated_points(5, 3, seed=6)
    y = separated_points(4, 3, seed=7) + 0.1
    ours = kernel.gradient(x, y)  # (5, 4, 3): d k(x_i, y_j) / d x_i
    xr = x.clone().requires_grad_(True)
    gamma = getattr(kernel, "gamma", None)
    for j in range(y.shape[0]):
        if gamma is not None:
            kj = handbook_gamma_exp(xr, y[j], gamma, math.sqrt(h))  # GPML eq. 4.18
        else:
            t = math.sqrt(2 * kernel.nu) * (xr - y[j]).pow(2).sum(-1).sqrt() / math.sqrt(h)
            kj = torch.exp(-t) * {0.5: 1, 1.5: 1 + t, 2.5: 1 + t + t * t / 3}[kernel.nu]  # GPML eq. 4.17
        (auto,) = torch.autograd.grad(kj.sum(), xr)
        torch.testing.assert_close(ours[:, j], auto, rtol=1e-9, atol=1e-12)
    kernel.bandwidth = "median"


def reference_direction(x, score, kernel_fn, drive=1.0, self_gradient=False):
    """phi_i = (1/N) sum_j [drive k(x_j, x_i) s_j + grad_{x_j} k(x_j, x_i)], pair by pair with autograd.
    A radial kernel's self-pair gradient is zero (zero displacement); ``self_gradient`` differentiates
    the self-pair too (for kernel_fn that are differentiable at a = b)."""
    n = x.shape[0]
    phi = torch.zeros_like(x)
    for i in range(n):
        for j in range(n):
            xj = x[j].clone().requires_grad_(True)
            k = kernel_fn(xj, x[i])
            phi[i] += drive * k.detach() * score[j]
            if j != i or self_gradient:
                (g,) = torch.autograd.grad(k, xj)
                phi[i] += g
    return phi / n


@pytest.mark.parametrize("kernel", KERNELS, ids=repr)
def test_svgd_direction_matches_pairwise_autograd(kernel):
    h = 1.1
    x = separated_points(9, 2, seed=8)
    score = -x @ torch.tensor([[1.0, 0.3], [0.3, 2.0]], dtype=DT)
    gamma = getattr(kernel, "gamma", None)
    if gamma is not None:
        fn = lambda a, b: handbook_gamma_exp(a, b, gamma, math.sqrt(h))  # noqa: E731
    else:
        def fn(a, b):
            t = math.sqrt(2 * kernel.nu) * (a - b).pow(2).sum(-1).sqrt() / math.sqrt(h)
            return torch.exp(-t) * {0.5: 1, 1.5: 1 + t, 2.5: 1 + t + t * t / 3}[kernel.nu]
    ref = reference_direction(x, score, fn, drive=0.7)
    ours = radial_direction(x[None], score[None], kernel, torch.tensor([h], dtype=DT), score_coef=0.7)[0]
    torch.testing.assert_close(ours, ref, rtol=1e-9, atol=1e-12)


def test_matern_three_halves_ksd_finite_at_coincident_points():
    # Matérn 3/2 has f''(0) infinite; the kernel Stein discrepancy uses f'' * s (limit 0). Reference:
    # the Stein kernel u(x, y) by autograd for x != y, and its closed-form diagonal
    # u(x, x) = |s(x)|^2 - (2 d / h) f'(0) with f'(0) = -3/2 (arXiv:1602.03253).
    h, d = 1.0, 2
    x = separated_points(6, d, seed=9)
    score = -x
    kernel = st.kernels.Matern(1.5, bandwidth=h)
    ours = st.ksd(x, score, kernel=kernel)
    total = 0.0
    for i in range(6):
        for j in range(6):
            if i == j:
                total += float(score[i] @ score[i]) + 2 * d / h * 1.5
                continue
            a = x[i].clone().requires_grad_(True)
            b = x[j].clone().requires_grad_(True)
            t = math.sqrt(3) * (a - b).pow(2).sum().sqrt() / math.sqrt(h)
            k = (1 + t) * torch.exp(-t)
            (ga,) = torch.autograd.grad(k, a, create_graph=True)
            gb = torch.autograd.grad(k, b, create_graph=True)[0]
            trace = sum(torch.autograd.grad(ga[c], b, retain_graph=True)[0][c] for c in range(d))
            total += float((k * (score[i] @ score[j]) + score[i] @ gb + score[j] @ ga + trace).detach())
    assert torch.isfinite(ours)
    assert float(ours) == pytest.approx(math.sqrt(total / 36), rel=1e-9)


# ----------------------------------------------------------------------------- coincident particles
@pytest.mark.parametrize("kernel", SINGULAR + [st.kernels.Matern(1.5)], ids=repr)
@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
def test_direction_finite_with_coincident_and_near_coincident_particles(kernel, dtype):
    g = torch.Generator().manual_seed(10)
    base = torch.randn(6, 3, generator=g, dtype=torch.float64)
    offsets = torch.tensor([0.0, 1e-15, 1e-12, 1e-9, 1e-6, 1e-3], dtype=torch.float64)[:, None]
    direction = torch.randn(6, 3, generator=g, dtype=torch.float64)
    x = torch.cat([base, base + offsets * direction, base[:2]]).to(dtype)  # exact and near duplicates
    score = -x
    phi = st.svgd_direction(x[None], score[None], kernel)
    assert torch.isfinite(phi).all()
    # bounded: |phi_i| <= mean_j (k |s_j| + max pair term); the guarded pair term is <= m(GUARD)
    h = kernel.last_bandwidth
    cap = float(2 * kernel.profile(torch.tensor(GUARD, dtype=torch.float64))[1].abs() * math.sqrt(GUARD) / h.sqrt())
    bound = float(score.norm(dim=-1).mean()) + max(cap, float(2 / h.sqrt()))  # common practice: crude bound
    assert float(phi.norm(dim=-1).max()) <= bound


@pytest.mark.parametrize("kernel", SINGULAR, ids=repr)
@pytest.mark.parametrize("gap", [1e-10, 1e-7, 1e-5, 1e-3, 5e-2])
def test_close_pair_repulsion_is_capped_and_keeps_its_direction(kernel, gap):
    # Two particles, zero scores: phi_1 = (1/2) grad_{x_2} k(x_2, x_1) must point from x_2 to x_1,
    # phi_2 = -phi_1 (antisymmetric: no net drift), magnitude <= its value at s = GUARD; equal to
    # min(exact, cap) above the numerical floor s = 1e-12 (gap 1e-6 at h = 1), smaller below it.
    h = 1.0
    kernel.bandwidth = h
    unit = torch.tensor([0.6, -0.8], dtype=DT)
    x = torch.stack([torch.tensor([0.3, 0.1], dtype=DT) + gap * unit, torch.tensor([0.3, 0.1], dtype=DT)])
    phi = st.svgd_direction(x[None], torch.zeros_like(x)[None], kernel)[0]
    kernel.bandwidth = "median"
    assert torch.isfinite(phi).all()
    torch.testing.assert_close(phi[0], -phi[1], rtol=1e-6, atol=1e-12)
    m_guard = float(2 * kernel.profile(torch.tensor(GUARD, dtype=DT))[1].abs() * math.sqrt(GUARD / h))
    magnitude = 2 * float(phi[0].norm())  # phi = pair term / N, N = 2
    assert magnitude <= m_guard * (1 + 1e-6)
    if magnitude > 0:
        cos = float(phi[0] @ unit / phi[0].norm())
        assert cos == pytest.approx(1.0, abs=1e-4)  # along x_1 - x_2
    if gap >= 1e-5:
        exact = float(2 * kernel.exact_profile(torch.tensor(gap**2 / h, dtype=DT))[1].abs() * gap / h)
        assert magnitude == pytest.approx(min(exact, m_guard), rel=1e-3)  # the cap changes nothing else
        if gap**2 / h >= GUARD:
            assert magnitude == pytest.approx(exact, rel=1e-6)


def test_guard_leaves_bounded_kernels_exact():
    # gamma = 1 (Laplace): pair term e^{-t} / sqrt(h) is bounded; the guard changes it by < 1.1%
    k = st.kernels.GammaExponential(1.0)
    s = torch.tensor([1e-9, 1e-6, 1e-5], dtype=DT)
    guarded = 2 * k.profile(s)[1].abs() * s.sqrt()
    exact = 2 * k.exact_profile(s)[1].abs() * s.sqrt()
    assert torch.all((guarded - exact).abs() <= 0.011 * exact)


# ----------------------------------------------------------------------------- target-weighted
def banana_log_prob(x):
    return -0.5 * x[..., 0] ** 2 / 2.0 - 0.5 * (x[..., 1] - 0.5 * x[..., 0] ** 2 + 1.0) ** 2 / 0.5


@pytest.mark.parametrize("base", [st.kernels.RBF(1.3), st.kernels.Matern(2.5, 1.3), st.kernels.GammaExponential(1.5, 1.3),
                                  st.kernels.Matern(1.5)], ids=repr)
@pytest.mark.parametrize("drive", [1.0, 0.4])
def test_target_weighted_direction_matches_pairwise_autograd(base, drive):
    x = separated_points(8, 2, seed=11)
    xr = x.clone().requires_grad_(True)
    lp = banana_log_prob(xr)
    (score,) = torch.autograd.grad(lp.sum(), xr)
    lp = lp.detach()
    kernel = st.kernels.TargetWeighted(base)
    ours = st.svgd_direction(x[None], score[None], kernel, drive=drive, log_prob=lp[None])[0]
    h = float(base.last_bandwidth)
    offset = float((-0.5 * lp).max())  # the rescaling by the maximum weight, a constant

    def k_p(a, b):  # k(a, b) / sqrt(p(a) p(b)) * const, through autograd of the log density
        r2 = (a - b).pow(2).sum()
        kab = base.exact_profile(r2 / h)[0] if r2 > 0 else torch.ones((), dtype=DT)
        return kab * torch.exp(-0.5 * banana_log_prob(a) - 0.5 * banana_log_prob(b) - 2 * offset)

    ref = reference_direction(x, score, k_p, drive=drive, self_gradient=True)
    torch.testing.assert_close(ours, ref, rtol=1e-8, atol=1e-12)


def test_target_weighted_needs_log_prob_and_radial_base():
    with pytest.raises(TypeError, match="base"):
        st.kernels.TargetWeighted(st.kernels.Linear())
    x = torch.randn(1, 5, 2, dtype=DT)
    with pytest.raises(ValueError, match="log_prob"):
        st.svgd_direction(x, -x, st.kernels.TargetWeighted(st.kernels.RBF()))


def test_target_weighted_moves_particles_to_the_target():
    # 1-D standard normal (closed form: mean 0, sd 1) from a near-equilibrium start
    t = st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=1)
    g = torch.Generator().manual_seed(12)
    init = 1.3 * torch.randn(100, 1, generator=g, dtype=DT) + 0.2
    run = st.svgd(t, 100, 400, kernel=st.kernels.TargetWeighted(st.kernels.Matern(1.5)) + st.kernels.Linear(),
                    init=init, precondition=None, seed=0, progress=False)
    x = run.particles[0, :, 0]
    assert abs(float(x.mean())) < 0.05
    assert abs(float(x.std()) - 1) < 0.05


def test_kernel_argument_errors():
    with pytest.raises(ValueError, match="gamma"):
        st.kernels.GammaExponential(2.5)
    with pytest.raises(ValueError, match="nu"):
        st.kernels.Matern(1.0)

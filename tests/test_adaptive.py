"""The adaptive Runge-Kutta stepper, checked as an ODE integrator on linear ODEs du/dt = A u, whose
solution is u(t) = expm(t A) u(0) (closed form; scipy.linalg.expm), and inside the sampler."""

import math

import numpy as np
import pytest
import scipy.linalg
import torch

import stein_torch as st
from stein_torch.samplers.steppers import TABLEAUX, rk_attempt

A = np.array([[-0.3, 2.0, 0.0], [-2.0, -0.3, 0.5], [0.0, -0.5, -1.0]])  # damped rotation
A_T = torch.tensor(A)
U0 = torch.tensor([[[1.0, 0.5, -0.7], [0.2, -1.0, 0.4]]], dtype=torch.float64)  # (B, N, d) = (1, 2, 3)


def velocity(u):
    return u @ A_T.T


def exact(t, u0=U0):
    return torch.tensor(u0.numpy() @ scipy.linalg.expm(t * A).T)  # closed form via scipy


def integrate(stepper, t_end, u0=U0, vel=velocity):
    stepper.bind(u0)
    u, steps, rejections = u0, 0, 0
    while stepper.time < t_end:
        u = stepper.step(u, vel(u), vel)
        steps += 1
        rejections += stepper.last_info["rejections"]
    return u, steps, rejections


@pytest.mark.parametrize("method", ["bs32", "dp54"])
def test_one_step_orders(method):
    # Local error of the propagated solution ~ h^(p+1), of the embedded one ~ h^(q+1)
    # (handbook: "Solving Ordinary Differential Equations I", ch. II.4, from memory: BS 3(2), DP 5(4)).
    p, q = TABLEAUX[method]["order"]
    errs_high, errs_low = [], []
    for h in (0.1, 0.05, 0.025):
        u_new, error, k_last = rk_attempt(U0, velocity(U0), h, velocity, method)
        ref = exact(h)
        errs_high.append(float((u_new - ref).abs().max()))
        errs_low.append(float((u_new - error - ref).abs().max()))
        torch.testing.assert_close(k_last, velocity(u_new))  # FSAL: last stage is the new velocity
    for errs, order in ((errs_high, p), (errs_low, q)):
        slopes = np.log2(np.array(errs[:-1]) / np.array(errs[1:]))
        assert np.all(np.abs(slopes - (order + 1)) < 0.35), (method, slopes)


@pytest.mark.parametrize("method", ["bs32", "dp54"])
def test_global_error_follows_tolerance(method):
    errors = []
    for tol in (1e-4, 1e-6, 1e-8):
        stepper = st.steppers.Adaptive(rtol=tol, atol=tol, method=method)
        u, steps, _ = integrate(stepper, 3.0)  # compared at the time reached (the last step overshoots)
        err = float((u - exact(stepper.time)).abs().max())
        # tolerance proportionality: global error a modest multiple of tol (common practice)
        assert err < 50 * tol, (tol, err)
        errors.append(err)
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    assert np.all((ratios > 20) & (ratios < 500)), ratios  # 100x tighter tol -> about 100x smaller error


def test_step_count_scales_like_tolerance_power():
    # accepted steps ~ tol^(-1/(q+1)), q = 2 for Bogacki-Shampine: 1000x tighter -> about 10x the steps
    counts = []
    for tol in (1e-4, 1e-7):
        stepper = st.steppers.Adaptive(rtol=tol, atol=tol, method="bs32")
        counts.append(integrate(stepper, 3.0)[1])
    assert 5 < counts[1] / counts[0] < 20, counts


def test_too_large_first_step_is_rejected_and_shrunk():
    stepper = st.steppers.Adaptive(rtol=1e-6, atol=1e-6, first_step=5.0)
    stepper.bind(U0)
    u = stepper.step(U0, velocity(U0), velocity)
    assert stepper.last_info["rejections"] >= 1
    assert stepper.step_size < 5.0
    assert stepper.last_info["error"] <= 1.0
    torch.testing.assert_close(u, exact(stepper.time), rtol=0, atol=1e-4)


def test_non_finite_stage_causes_rejection():
    # velocity undefined (NaN) outside |u| < 1.3: a big step that leaves the region must be rejected
    def guarded(u):
        v = velocity(u)
        return torch.where(u.abs().amax(-1, keepdim=True) < 1.3, v, torch.full_like(v, float("nan")))

    stepper = st.steppers.Adaptive(rtol=1e-5, atol=1e-5, first_step=3.0)
    u, steps, rejections = integrate(stepper, 1.0, vel=guarded)
    assert rejections >= 1
    assert torch.isfinite(u).all()
    torch.testing.assert_close(u, exact(stepper.time), rtol=0, atol=1e-3)


def test_unrecoverable_velocity_raises():
    stepper = st.steppers.Adaptive(max_rejections=5, first_step=0.1)
    stepper.bind(U0)
    with pytest.raises(FloatingPointError, match="rejected"):
        stepper.step(U0, velocity(U0), lambda u: torch.full_like(u, float("nan")))


def test_argument_errors():
    with pytest.raises(ValueError, match="rtol"):
        st.steppers.Adaptive(rtol=-1.0)
    with pytest.raises(TypeError, match="atol"):
        st.steppers.Adaptive(atol="small")
    with pytest.raises(ValueError, match="method"):
        st.steppers.Adaptive(method="rk4")
    with pytest.raises(ValueError, match="norm"):
        st.steppers.Adaptive(norm="l1")


def test_sampler_with_adaptive_stepper_counts_and_traces():
    # 2-D Gaussian N(m, S) (closed form moments); Laplace whitening makes it standard in u
    m = torch.tensor([1.0, -2.0], dtype=torch.float64)
    S = torch.tensor([[2.0, 0.6], [0.6, 0.5]], dtype=torch.float64)
    P = torch.linalg.inv(S)
    t = st.Target(lambda x: -0.5 * (((x - m) @ P) * (x - m)).sum(-1), dim=2)
    stepper = st.steppers.Adaptive(rtol=1e-3, atol=1e-3)
    sampler = st.Sampler(t, 100, stepper=stepper, seed=0, stop=False)  # all 150 steps: the counts are the point
    evals0 = sampler.grad_evals
    sampler.run(150, progress=False)
    run = sampler.result()
    # every velocity call evaluates all 100 particles; the sampler reuses the last stage (FSAL)
    assert run.history["grad_evals"][-1] - evals0 == 100 * stepper.evaluations
    attempts = 150 + int(run.history["rejections"].sum())
    assert stepper.evaluations == 3 * attempts + 1  # 3 stages per attempt + the starting-step probe
    assert np.all(np.isfinite(run.history["step_size"])) and np.all(run.history["step_size"] > 0)
    z = run.particles[0]
    torch.testing.assert_close(z.mean(0), m, rtol=0, atol=0.05 * math.sqrt(2.0))
    torch.testing.assert_close(torch.cov(z.T), S, rtol=0.1, atol=0.02)

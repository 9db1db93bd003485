"""Targets: constraints and transforms against torch.distributions, batching, lifting single-value
functions, and errors that name the argument."""

import warnings

import numpy as np
import pytest
import torch
from torch.distributions import Gamma, HalfCauchy, Normal, biject_to, constraints

import stein_torch as st

torch.set_default_dtype(torch.float64)


def test_constrain_matches_torch_distributions_transforms():
    # Transforms and log-Jacobians are those of torch.distributions.biject_to.
    latents = {
        "mu": st.Latent(),
        "tau": st.Latent(support=constraints.positive),
        "p": st.Latent((3,), constraints.unit_interval),
        "w": st.Latent((4,), constraints.simplex),
    }
    t = st.Target(lambda p: p["mu"] * 0, latents=latents)
    assert t.dim == 1 + 1 + 3 + 3  # the simplex has one free coordinate less
    z = torch.randn(5, t.dim, generator=torch.Generator().manual_seed(0))
    values, log_jac = t.constrain(z)
    expected = 0.0
    for name, free in (("mu", z[:, 0]), ("tau", z[:, 1]), ("p", z[:, 2:5]), ("w", z[:, 5:8])):
        transform = biject_to(latents[name].support)
        torch.testing.assert_close(values[name], transform(free))
        ladj = transform.log_abs_det_jacobian(free, transform(free))
        expected = expected + (ladj.sum(-1) if ladj.dim() > 1 else ladj)
        assert bool(latents[name].support.check(values[name]).all())
    torch.testing.assert_close(log_jac, expected)
    torch.testing.assert_close(t.unconstrain(values), z)


def test_log_prob_adds_log_jacobian_and_is_batched():
    # On the unconstrained scale the density of log(tau) for tau ~ Gamma(3, 2) is Gamma.log_prob(e^z) + z
    # (change of variables; torch.distributions.Gamma).
    t = st.Target(lambda p: Gamma(3.0, 2.0).log_prob(p["tau"]), latents={"tau": st.Latent(support=constraints.positive)})
    z = torch.randn(2, 3, 1, generator=torch.Generator().manual_seed(1))
    lp, score = t.log_prob_and_score(z)
    assert lp.shape == (2, 3) and score.shape == (2, 3, 1)
    torch.testing.assert_close(lp, Gamma(3.0, 2.0).log_prob(z[..., 0].exp()) + z[..., 0])
    # d/dz [3 z - 2 e^z] (up to a constant) = 3 - 2 e^z
    torch.testing.assert_close(score[..., 0], 3 - 2 * z[..., 0].exp())


def test_from_priors_sums_prior_terms_and_likelihood():
    priors = {"mu": Normal(0.0, 5.0), "tau": HalfCauchy(5.0), "theta": Normal(torch.zeros(3), 1.0)}
    t = st.Target.from_priors(priors, log_likelihood=lambda p: -p["mu"] ** 2)
    assert t.shapes == {"mu": torch.Size([]), "tau": torch.Size([]), "theta": torch.Size([3])}
    values = {"mu": torch.tensor([0.3, -1.0]), "tau": torch.tensor([2.0, 0.5]), "theta": torch.randn(2, 3)}
    z = t.unconstrain(values)
    lp = t.log_prob(z)
    expected = (
        Normal(0.0, 5.0).log_prob(values["mu"]) + HalfCauchy(5.0).log_prob(values["tau"])
        + Normal(0.0, 1.0).log_prob(values["theta"]).sum(-1) - values["mu"] ** 2 + torch.log(values["tau"])
    )
    torch.testing.assert_close(lp, expected)


def test_single_value_function_is_vectorised_with_vmap():
    calls = []

    def log_prob(x):  # written for one x of shape (3,)
        calls.append(x.shape)
        return -0.5 * x @ x

    t = st.Target(log_prob, dim=3)
    z = torch.randn(4, 5, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        lp = t.log_prob(z)
    torch.testing.assert_close(lp, -0.5 * (z**2).sum(-1))


def test_unvectorisable_function_falls_back_to_a_loop_with_one_warning():
    def log_prob(x):  # .item() cannot be traced by vmap
        return -0.5 * (x**2).sum() * (1.0 if x[0].item() > -100 else 0.0)

    t = st.Target(log_prob, dim=2)
    z = torch.randn(6, 2)
    with pytest.warns(RuntimeWarning, match="loop"):
        lp = t.log_prob(z)
    torch.testing.assert_close(lp, -0.5 * (z**2).sum(-1))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # warned once only
        t.log_prob(z)


@pytest.mark.parametrize(
    "log_prob, match",
    [
        (lambda x: 3.0, "torch.Tensor"),
        (lambda x: x.sum(-1, keepdim=True), "shape"),
        (lambda x: torch.zeros(7), "shape"),
    ],
)
def test_bad_log_density_outputs_are_named(log_prob, match):
    t = st.Target(log_prob, dim=2)
    with pytest.raises((TypeError, ValueError), match=match):
        t.log_prob(torch.zeros(4, 2))


def test_non_differentiable_log_density_is_named():
    t = st.Target(lambda x: torch.as_tensor(x.detach().numpy().sum(-1)), dim=2)
    with pytest.raises(ValueError, match="not differentiable"):
        t.log_prob_and_score(torch.zeros(3, 2))


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda: st.Target(lambda x: x.sum(-1)), "exactly one"),
        (lambda: st.Target(lambda x: x.sum(-1), dim=0), "dim"),
        (lambda: st.Target(lambda x: x.sum(-1), dim=2.5), "dim"),
        (lambda: st.Target("not callable", dim=2), "callable"),
        (lambda: st.Target(lambda p: p, latents={"mu": (3,)}), "Latent"),
        (lambda: st.Target(lambda p: p, latents={"a b": st.Latent()}), "identifier"),
        (lambda: st.Latent((0,)), "shape"),
        (lambda: st.Latent(support="positive"), "support"),
    ],
)
def test_bad_specs_are_named(make, match):
    with pytest.raises((TypeError, ValueError), match=match):
        make()


def test_unknown_name_and_outside_support_in_values_are_named():
    t = st.Target(lambda p: -p["tau"], latents={"tau": st.Latent(support=constraints.positive)})
    with pytest.raises(ValueError, match="unknown"):
        t.unconstrain({"tau": torch.ones(2), "sigma": torch.ones(2)})
    with pytest.raises(ValueError, match="outside the support"):
        t.unconstrain({"tau": torch.tensor([1.0, -2.0])})


def test_init_outside_support_is_refused_by_sample():
    t = st.Target(lambda p: -p["tau"], latents={"tau": st.Latent(support=constraints.positive)})
    with pytest.raises(ValueError, match="init"):
        st.svgd(t, particles=4, steps=1, init={"tau": torch.tensor([1.0, 2.0, -1.0, 3.0])}, precondition=None)


@pytest.mark.parametrize("particles", [0, -3, 2.5, None, True])
def test_non_positive_or_non_integer_particle_count_is_named(particles):
    t = st.Target(lambda x: -(x**2).sum(-1), dim=2)
    with pytest.raises((TypeError, ValueError), match="particles"):
        st.svgd(t, particles=particles, steps=1)


def test_prior_draws_start_the_particles_inside_the_support():
    priors = {"rate": Gamma(2.0, 1.0), "loc": Normal(torch.zeros(2), 1.0)}
    t = st.Target.from_priors(priors, log_likelihood=lambda p: -((p["loc"] - 1) ** 2).sum(-1))
    run = st.svgd(t, particles=30, steps=3, init="prior", seed=1, precondition=None)
    assert run.draws["rate"].shape == (1, 30) and run.draws["loc"].shape == (1, 30, 2)
    assert bool((run.draws["rate"] > 0).all())
    assert np.isfinite(run.lp.numpy()).all()

"""Validate the torch models (``stein_torch/benchmarks/reference_models.py``) against posteriordb reference draws.

Check used (Stein identity, see shared/posteriordb/README.md): for a correct log-density on the
unconstrained scale, log-Jacobian included, E_p[grad_z log p(z)] = 0, so the mean score over the
reference draws mapped to z must be zero up to Monte-Carlo error. Needs no sampler.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch
from torch.distributions import biject_to

try:
    import posteriordb as pdb
except ImportError:  # tests/ collected as a package
    from tests import posteriordb as pdb

# Monte-Carlo error of the mean score: the reference draws are (thinned) NUTS chains, so draws are
# not exactly independent. Batch means cover autocorrelation: each of the 10 chains of 1000 draws is
# cut into 5 consecutive batches of 200 (50 batch means); the standard error is the sd of the batch
# means / sqrt(50) (batch-means estimator, common practice). |mean| <= 4.5 standard errors per
# coordinate: for a Student-t with 49 df the two-sided tail beyond 4.5 is about 4e-5, so over the
# ~70 coordinates of all eight models a false alarm has probability below 0.3% (from memory).
# The absolute slack of 1e-8 times the score's rms only absorbs float64 rounding.
BATCHES = 50
THRESHOLD = 4.5
RELATIVE_SLACK = 1e-8


@pytest.fixture(autouse=True)
def _posteriors_present():
    pdb.require_posteriors()


def reference_params(model: pdb.Model) -> dict[str, torch.Tensor]:
    """Reference draws of ``model`` mapped to its sampled parameters, float64 tensors (n, *shape)."""
    underlying = model.from_reference(pdb.load_reference(model.name))
    return {key: torch.as_tensor(np.array(underlying[key], dtype=np.float64))
            for key in model.params}


def unconstrained_scores(model: pdb.Model, params: dict[str, torch.Tensor]) -> torch.Tensor:
    """grad_z [log_joint(T(z)) + log|det dT/dz|] at z = T^{-1}(params), shape (n, total dim)."""
    leaves, constrained, log_det = [], {}, 0.0
    for key, (shape, constraint) in model.params.items():
        transform = biject_to(constraint)
        z = transform.inv(params[key]).detach().requires_grad_(True)
        value = transform(z)
        jacobian = transform.log_abs_det_jacobian(z, value)
        log_det = log_det + jacobian.reshape(jacobian.shape[0], -1).sum(-1)
        leaves.append(z)
        constrained[key] = value
    total = model.log_joint(constrained) + log_det
    grads = torch.autograd.grad(total.sum(), leaves)
    return torch.cat([g.reshape(g.shape[0], -1) for g in grads], dim=-1)


def stein_statistics(model: pdb.Model) -> np.ndarray:
    """Per-coordinate |mean score| / (batch-means standard error + slack) over the reference draws."""
    scores = unconstrained_scores(model, reference_params(model)).detach().numpy()
    assert np.all(np.isfinite(scores)), f"{model.name}: non-finite scores at reference draws"
    batch_means = scores.reshape(BATCHES, -1, scores.shape[-1]).mean(axis=1)
    standard_error = batch_means.std(axis=0, ddof=1) / np.sqrt(BATCHES)
    slack = RELATIVE_SLACK * np.sqrt((scores ** 2).mean(axis=0))
    return np.abs(scores.mean(axis=0)) / (standard_error + slack)


@pytest.mark.parametrize("name", pdb.NAMES)
def test_stein_identity_holds_at_reference_draws(name):
    # Source: posteriordb reference posterior <name> (posteriordb, BSD-3); the reference draws are
    # long NUTS runs, so a correct model has mean unconstrained score zero within Monte-Carlo error.
    model = pdb.model(name)
    statistics = stein_statistics(model)
    assert statistics.shape[0] == sum(int(np.prod(s)) for s, _ in model.params.values())
    assert np.all(statistics <= THRESHOLD), (
        f"posteriordb reference posterior {name}: mean score / s.e. per coordinate = "
        f"{np.round(statistics, 2)}")


def test_stein_check_rejects_model_with_shifted_mean():
    # Source: posteriordb reference posterior kidiq-kidscore_momhsiq (posteriordb, BSD-3). Shifting
    # the model by 0.1 reference sd in beta moves its mode away from the reference draws; the same
    # check must then fail, which shows it has power at that size of error.
    correct = pdb.model("kidiq-kidscore_momhsiq")
    shift = 0.1 * torch.as_tensor(pdb.reference_moments(correct.name)["beta"][1])

    def shifted(p):
        return correct.log_joint({**p, "beta": p["beta"] - shift.to(p["beta"].dtype)})

    wrong = dataclasses.replace(correct, log_joint=shifted)
    assert np.max(stein_statistics(wrong)) > THRESHOLD


def test_stein_check_rejects_gp_with_squared_noise_term():
    # Source: posteriordb reference posterior gp_pois_regr-gp_regr (posteriordb, BSD-3). The README
    # warns that sigma enters the covariance diagonal unsquared; coding sigma^2 instead (the tempting
    # mistake) must fail the check.
    correct = pdb.model("gp_pois_regr-gp_regr")

    def squared_noise(p):
        return correct.log_joint({**p, "sigma": p["sigma"] ** 2})

    wrong = dataclasses.replace(correct, log_joint=squared_noise)
    assert np.max(stein_statistics(wrong)) > THRESHOLD


@pytest.mark.parametrize("name", pdb.NAMES)
def test_log_joint_is_batched_over_leading_dims(name):
    # Common practice: a batched density must equal the same density evaluated one value at a time.
    # Values are reference draws of posteriordb reference posterior <name> (posteriordb, BSD-3).
    model = pdb.model(name)
    params = {k: v[:6] for k, v in reference_params(model).items()}
    batched = model.log_joint({k: v.reshape(2, 3, *v.shape[1:]) for k, v in params.items()})
    single = torch.stack([model.log_joint({k: v[i] for k, v in params.items()}) for i in range(6)])
    assert batched.shape == (2, 3)
    torch.testing.assert_close(batched.reshape(6), single, rtol=1e-10, atol=1e-8)


@pytest.mark.parametrize("name", pdb.NAMES)
def test_derived_inverts_from_reference(name):
    # Source: posteriordb reference posterior <name> (posteriordb, BSD-3): mapping reference draws to
    # the sampled parameters and back must reproduce them, with every reference name present.
    model = pdb.model(name)
    reference = pdb.load_reference(name)
    roundtrip = model.derived(model.from_reference(reference))
    assert sorted(roundtrip) == sorted(reference)
    for key, values in reference.items():
        np.testing.assert_allclose(roundtrip[key], values, rtol=1e-12, atol=1e-12)


def test_compare_moments_of_reference_against_itself():
    # Source: posteriordb reference posterior eight_schools-eight_schools_noncentered (posteriordb,
    # BSD-3). The reference draws match their own moments exactly; the first half of the chains
    # differs from the full set by a Monte-Carlo amount only (well under 0.2 sd, common practice).
    name = "eight_schools-eight_schools_noncentered"
    reference = pdb.load_reference(name)
    exact = pdb.compare_moments(reference, name)
    assert set(exact) == {"mu", "tau", "theta"}
    for stats in exact.values():
        assert stats["mean_error"] < 1e-12
        assert abs(stats["sd_ratio_min"] - 1) < 1e-12 and abs(stats["sd_ratio_max"] - 1) < 1e-12
    half = pdb.compare_moments({k: v[:5000] for k, v in reference.items()}, name)
    for stats in half.values():
        assert 0 < stats["mean_error"] < 0.2
        assert 0.8 < stats["sd_ratio_min"] <= stats["sd_ratio_max"] < 1.2
    with pytest.raises(ValueError, match="theta"):
        pdb.compare_moments({k: v for k, v in reference.items() if k != "theta"}, name)
    with pytest.raises(ValueError, match="shape"):
        pdb.compare_moments({**reference, "theta": reference["theta"][:, :3]}, name)

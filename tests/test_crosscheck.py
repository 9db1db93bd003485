"""`st.crosscheck`: an SVGD result against NUTS on the same target, parameter by parameter.

Sources: the conjugate Gaussian model (closed-form posterior: precision = prior precision + n /
sigma^2, mean = posterior variance x (sum of data / sigma^2)); the standard normal in 50-D (closed
form) for the plain RBF kernel whose particles collapse in high dimension (a known weakness of SVGD,
"Stein Variational Gradient Descent With Matrix-Valued Kernels", arXiv:1910.12794, from memory; the
collapse is measured here, not assumed: sd ratios are checked against the closed form first).
"""

from __future__ import annotations

import functools
import warnings

import numpy as np
import pytest
import torch

import stein_torch as st
from stein_torch.crosscheck import default_draws

SIGMA, PRIOR_SD = 2.0, 3.0


def conjugate_model():
    """theta (4,) ~ N(0, 3^2) each; y_ij ~ N(theta_i, 2^2), 6 invented readings per sensor."""
    g = torch.Generator().manual_seed(7)
    truth = torch.tensor([1.0, -2.0, 0.5, 4.0], dtype=torch.float64)
    y = truth[:, None] + SIGMA * torch.randn(4, 6, generator=g, dtype=torch.float64)

    def log_joint(p):
        theta = p["theta"]
        prior = -0.5 * (theta / PRIOR_SD) ** 2
        like = -0.5 * ((y - theta[..., None]) / SIGMA) ** 2
        return prior.sum(-1) + like.sum((-1, -2))

    precision = 1 / PRIOR_SD ** 2 + 6 / SIGMA ** 2
    mean = (y.sum(1) / SIGMA ** 2) / precision
    return st.Target(log_joint, latents={"theta": st.Latent((4,))}), mean, precision ** -0.5


@functools.lru_cache(maxsize=None)
def correct_run():
    """A default SVGD run of the conjugate model and its crosscheck (NUTS run by crosscheck itself)."""
    target, _, _ = conjugate_model()
    run = st.svgd(target, particles=200, seed=0)
    return run, st.crosscheck(run, target, seed=1)


def reference_run():
    return correct_run()[1].reference


def test_a_correct_svgd_run_is_not_flagged_and_nuts_matches_the_closed_form():
    target, mean, sd = conjugate_model()
    table = correct_run()[1]   # NUTS with the default budget
    assert [row["parameter"] for row in table] == ["theta[0]", "theta[1]", "theta[2]", "theta[3]"]
    assert table.flagged == [] and all(row["agree"] for row in table)
    assert table.health["ok"] and table.health["divergences"] == 0 and table.health["rhat_max"] < 1.01
    assert table.reference.particles.shape == (4, default_draws(200), 4)
    # closed form: NUTS's means within 5 Monte Carlo errors, its sds within 5%
    for j, row in enumerate(table):
        assert abs(row["nuts_mean"] - float(mean[j])) < 5 * float(sd) / np.sqrt(row["ess"])
        assert abs(row["nuts_sd"] / float(sd) - 1) < 0.05
        assert abs(row["mean_diff"]) < 0.1 and abs(row["sd_ratio"] - 1) < 0.1   # SVGD is right too
    text = str(table)
    assert "theta[3]" in text and "no parameter differs beyond Monte Carlo error" in text
    frame = table.to_dataframe()
    assert list(frame["parameter"]) == [r["parameter"] for r in table] and {"mean_diff", "mcse", "sd_ratio", "agree"} <= set(frame)


def test_too_few_steps_from_a_far_start_are_flagged_on_the_parameters_started_far():
    target, mean, sd = conjugate_model()
    g = torch.Generator().manual_seed(3)
    start = mean + float(sd) * torch.randn(200, 4, generator=g, dtype=torch.float64)   # exact draws...
    start[:, :2] += 10 * float(sd)                                  # ... except theta[0], theta[1]: 10 sd off
    run = st.svgd(target, particles=200, steps=5, stop=False, init={"theta": start}, precondition=None, seed=0)
    with pytest.warns(RuntimeWarning, match="differ beyond Monte Carlo error on theta\\[0\\], theta\\[1\\]"):
        table = st.crosscheck(run, target, reference=reference_run())
    assert table.flagged == ["theta[0]", "theta[1]"]
    assert all(abs(row["mean_diff"]) > 5 for row in table[:2])


def test_a_plain_rbf_kernel_in_50d_is_flagged_on_its_collapsed_spread():
    target = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=50)
    run = st.svgd(target, particles=100, kernel=st.kernels.RBF(), seed=0)
    sd = run.draws["x"].reshape(-1, 50).std(0)
    assert float(sd.max()) < 0.8                     # closed form sd is 1: the spread collapsed
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        table = st.crosscheck(run, target, draws=500, warmup=300, seed=2)   # 2000 draws: ample for 100 particles
    assert table.health["ok"]
    assert len(table.flagged) == 50 and all(row["sd_ratio"] < 0.8 for row in table)
    # the default IMQ + linear kernel on the same target keeps the spread: nothing flagged
    good = st.svgd(target, particles=100, seed=0)
    assert st.crosscheck(good, target, reference=table.reference).flagged == []


def test_trouble_in_the_nuts_run_is_reported_not_blamed_on_svgd():
    target, _, _ = conjugate_model()
    run = correct_run()[0]
    with pytest.warns(RuntimeWarning, match="NUTS itself reports trouble"):
        table = st.crosscheck(run, target, draws=8, warmup=175, seed=0)   # far too few draws
    assert not table.health["ok"] and table.health["warnings"]
    assert "NUTS itself reports trouble" in str(table)


def test_bad_input_is_named():
    target, _, _ = conjugate_model()
    with pytest.raises(TypeError, match="crosscheck: result must be a stein_torch Result"):
        st.crosscheck({"theta": 1}, target)
    other = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=4)
    with pytest.raises(ValueError, match=r"crosscheck: target Target\(dim=4\) is not the model result was drawn from"):
        st.crosscheck(reference_run(), other)
    with pytest.raises(ValueError, match="crosscheck: draws == 0, must be >= 1"):
        st.crosscheck(reference_run(), target, draws=0)

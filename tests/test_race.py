"""`st.race`: SVGD, Langevin and NUTS side by side at equal score evaluations.

Sources: closed-form Gaussian moments (reference draws from `scipy.stats.multivariate_normal`); the
1-D Wasserstein distance of a translate, W1(X, X + c) = |c| (closed form), checked through
`scipy.stats.wasserstein_distance`.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pytest
import scipy.stats
import torch

import stein_torch as st
from stein_torch.race import accuracy, plot_race

MEAN = np.array([1.0, -2.0])
COV = np.array([[1.0, 0.6], [0.6, 2.0]])


def gaussian_target():
    mean, prec = torch.tensor(MEAN), torch.linalg.inv(torch.tensor(COV))
    return st.Target(lambda x: -0.5 * (((x - mean) @ prec) * (x - mean)).sum(-1), dim=2)


def reference_draws(n=20000):
    return {"x": scipy.stats.multivariate_normal(MEAN, COV).rvs(n, random_state=np.random.default_rng(0))}


def test_accuracy_of_a_translate_is_the_shift():
    # W1(X, X + c) = |c| and the sd is unchanged (closed form); scipy.stats.wasserstein_distance computes it.
    ref = np.random.default_rng(1).normal(size=(5000, 2))
    shifted = ref + np.array([0.5, 0.0])
    figures = accuracy({"x": shifted}, {"x": ref})
    sd = ref.std(0, ddof=1)
    assert figures["mean_error"] == pytest.approx(0.5 / sd[0], rel=1e-9)
    assert figures["w1"] == pytest.approx((0.5 / sd[0] + 0.0) / 2, rel=1e-6)
    assert figures["sd_ratio_min"] == pytest.approx(1.0) and figures["sd_ratio_max"] == pytest.approx(1.0)
    with pytest.raises(ValueError, match="reference"):
        accuracy({"y": shifted}, {"x": ref})


def test_compare_at_equal_budget_on_a_gaussian():
    budget = 8000
    rows = st.race(gaussian_target(), reference_draws(), budget=budget, checkpoints=4, ksd_points=400,
                      methods={"svgd": {"particles": 50}, "mala": {"chains": 4}})
    assert [r["method"] for r in rows] == ["svgd", "mala"]
    for row in rows:
        for key in ("grad_evals", "seconds", "ksd", "mean_error", "sd_ratio_min", "sd_ratio_max", "w1"):
            assert np.isfinite(row[key]), key
        # equal numbers of score evaluations, within one SVGD step of particles
        assert budget - 50 <= row["grad_evals"] <= budget
        evals = [p["grad_evals"] for p in row["path"]]
        assert evals == sorted(evals) and len(evals) == 4 + (row["method"] == "svgd")  # + starting particles
    svgd, mala = rows
    # closed-form Gaussian: both meet the project's accuracy tolerance (0.1 sd in mean, sd within 10%)
    for row in rows:
        assert row["mean_error"] < 0.1 and 0.9 <= row["sd_ratio_min"] <= row["sd_ratio_max"] <= 1.1
        assert row["evals_to_tolerance"] is not None and row["evals_to_tolerance"] <= row["grad_evals"]
    # the KSD of MALA is taken on 400 evenly thinned draws, SVGD's on its 50 particles
    assert svgd["points"] == 50 and mala["points"] == 400
    assert svgd["result"].settings["steps"] == budget // 50 - 1 and svgd["stop_reason"] == "steps"
    ax = plot_race(rows, metric="w1")
    assert len(ax.get_lines()) == 2 and ax.get_xscale() == "log"


def test_compare_without_reference_and_with_ula_and_derived_names():
    def derived(draws):
        return {"first": draws["x"][:, 0]}

    rows = st.race(gaussian_target(), {"first": reference_draws()["x"][:, 0]}, budget=4000, checkpoints=2,
                      methods=["ula"], derived=derived)
    assert rows[0]["method"] == "ula" and rows[0]["result"].settings["method"] == "ula"
    assert "w1" in rows[0]
    bare = st.race(gaussian_target(), budget=2000, checkpoints=1, methods=["mala"])
    assert "mean_error" not in bare[0] and bare[0]["ksd"] > 0


def test_bad_input_is_named():
    t = gaussian_target()
    with pytest.raises(ValueError, match="method must be one of"):
        st.race(t, budget=100, methods=["hmc"])
    with pytest.raises(ValueError, match="unknown options"):
        st.race(t, budget=100, methods={"svgd": {"chains": 2}})
    with pytest.raises(ValueError, match="budget"):
        st.race(t, budget=0)
    with pytest.raises(ValueError, match="reference"):
        st.race(t, {"x": np.zeros(1)}, budget=100)
    with pytest.raises(ValueError, match="metric"):
        plot_race([{"path": [{"grad_evals": 1, "ksd": 1.0, "points": 1}]}], metric="rmse")


def test_reference_as_flattened_names_or_inference_data_equals_the_arrays():
    # Source: posteriordb reference posterior kidiq-kidscore_momhsiq (posteriordb, BSD-3), whose draws
    # come as columns named beta[1], beta[2], beta[3] (1-based) per chain, as reference draws usually do
    import json
    import zipfile

    import arviz as az

    from stein_torch.benchmarks import reference_data, reference_models
    from stein_torch.race import reference_draws

    name = "kidiq-kidscore_momhsiq"
    path = reference_data.locate() / name / "reference_draws.json.zip"
    with zipfile.ZipFile(path) as archive:
        chains = json.loads(archive.read(archive.namelist()[0]))
    columns = {k: np.concatenate([c[k] for c in chains]) for k in chains[0]}
    assert "beta[1]" in columns
    arrays = reference_data.load_reference(name)
    flat = reference_draws(columns)
    assert sorted(flat) == sorted(arrays)
    for k in arrays:
        np.testing.assert_array_equal(flat[k], arrays[k])
    idata = az.from_dict(posterior={k: v.reshape(10, 1000, *v.shape[1:]) for k, v in arrays.items()})
    for k, v in reference_draws(idata).items():
        np.testing.assert_array_equal(v, arrays[k])
    model = reference_models.model(name)
    target = st.Target(model.log_joint, latents={k: st.Latent(s, c) for k, (s, c) in model.params.items()})
    options = dict(budget=3000, checkpoints=2, methods={"svgd": {"particles": 50}})
    by_columns = st.race(target, columns, **options)[0]
    by_idata = st.race(target, idata, **options)[0]
    for key in ("mean_error", "sd_ratio_min", "sd_ratio_max", "w1"):
        assert by_columns[key] == by_idata[key]
    assert by_columns["mean_error"] < 0.5  # a short run, but on the right posterior


def test_flattened_names_with_gaps_or_zero_are_refused():
    from stein_torch.race import reference_draws

    draws = np.zeros(10)
    with pytest.raises(ValueError, match=r"lacks b\[2\]"):
        reference_draws({"b[1]": draws, "b[3]": draws})
    with pytest.raises(ValueError, match="1-based"):
        reference_draws({"b[0]": draws})
    matrix = reference_draws({f"a[{i},{j}]": draws + 10 * i + j for i in (1, 2) for j in (1, 2, 3)})
    assert matrix["a"].shape == (10, 2, 3) and matrix["a"][0, 1, 2] == 23  # a[2,3] at 0-based [1, 2]


# NUTS in a race: equal score-evaluation budgets, the path of measurements, time to tolerance
def test_nuts_in_a_race_spends_the_budget_and_meets_the_tolerance():
    budget = 12000
    rows = st.race(gaussian_target(), reference_draws(), budget=budget, checkpoints=5,
                   methods={"svgd": {"particles": 50}, "nuts": {"warmup": 200}})
    svgd, nuts = rows
    assert nuts["method"] == "nuts" and nuts["stop_reason"] == "budget"
    # the run stops before a transition as costly as the last one would pass the budget: equal
    # budgets within the cost of one transition
    cost = np.diff(nuts["result"].history["grad_evals"])
    assert budget - 3 * cost[-1] <= nuts["grad_evals"] <= budget + cost.max()
    evals = [p["grad_evals"] for p in nuts["path"]]
    assert evals == sorted(evals) and len(evals) >= 4
    # closed form: NUTS meets the accuracy tolerance and holds it to the end
    assert nuts["mean_error"] < 0.1 and 0.9 <= nuts["sd_ratio_min"] <= nuts["sd_ratio_max"] <= 1.1
    assert nuts["evals_to_tolerance"] is not None and nuts["evals_to_tolerance"] <= nuts["grad_evals"]
    assert nuts["seconds_to_tolerance"] <= nuts["seconds"]
    assert nuts["result"].sample_stats["diverging"].shape[0] == 4


def test_a_budget_that_ends_in_warm_up_gives_no_draws_and_no_tolerance():
    rows = st.race(gaussian_target(), reference_draws(), budget=400, checkpoints=3, methods=["nuts"])
    assert rows[0]["points"] == 0 and rows[0]["evals_to_tolerance"] is None
    assert rows[0]["result"].particles.shape[1] == 0
    assert any("no draws after warm-up" in w for w in rows[0]["result"].warnings)


def test_race_runs_svgd_with_the_threads_svgd_would_use_and_restores_the_callers():
    # a small SVGD run uses one torch thread (stein_torch.samplers.threads), in st.race as in st.svgd
    seen = []

    def log_prob(x):
        if x.shape[:-1].numel() == 20:  # the particles (the race's own whitening scores single points)
            seen.append(torch.get_num_threads())
        return -0.5 * (x * x).sum(-1)

    before = torch.get_num_threads()
    torch.set_num_threads(2)
    try:
        st.race(st.Target(log_prob, dim=2), methods={"svgd": {"method": "svgd", "particles": 20, "steps": 5}}, seed=0)
        assert len(seen) >= 5 and set(seen) == {1}
        assert torch.get_num_threads() == 2
    finally:
        torch.set_num_threads(before)

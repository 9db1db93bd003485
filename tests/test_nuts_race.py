"""NUTS in `st.race`: equal score-evaluation budgets, the path of measurements, time to tolerance.

Source: closed-form Gaussian moments; reference draws from `scipy.stats.multivariate_normal`.
"""

from __future__ import annotations

import numpy as np
import scipy.stats
import torch

import stein_torch as st

MEAN = np.array([1.0, -2.0])
COV = np.array([[1.0, 0.6], [0.6, 2.0]])


def gaussian_target():
    mean, prec = torch.tensor(MEAN), torch.linalg.inv(torch.tensor(COV))
    return st.Target(lambda x: -0.5 * (((x - mean) @ prec) * (x - mean)).sum(-1), dim=2)


def reference_draws(n=20000):
    return {"x": scipy.stats.multivariate_normal(MEAN, COV).rvs(n, random_state=np.random.default_rng(0))}


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

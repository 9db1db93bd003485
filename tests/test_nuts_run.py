"""`st.nuts` as a sampler of the package: ArviZ schema, checkpoints and bit-identical resume, Ctrl-C,
fault containment, divergences reported, bad input named.

Sources: closed-form moments of N(0, 1) truncated at 1 (`scipy.stats.truncnorm`); ArviZ's
sample_stats schema (`arviz.rhat`, `arviz.ess`, `arviz.bfmi`, `arviz.plot_energy` read it); the
determinism of a seeded torch.Generator (common practice) for bit-identical resume.
"""

from __future__ import annotations

import functools
import re
import signal
import warnings

import arviz as az
import matplotlib
import numpy as np
import pytest
import scipy.stats
import torch
from torch.distributions import constraints

import stein_torch as st
from stein_torch import io as st_io

matplotlib.use("Agg")

LOC = torch.tensor([0.5, -1.0, 2.0], dtype=torch.float64)
SHAPE = torch.tensor([[2.0, 0.6, 0.0], [0.6, 1.0, -0.3], [0.0, -0.3, 0.5]], dtype=torch.float64)
PRECISION = torch.linalg.inv(SHAPE)


def student3(x):
    """Multivariate t, df 6 (up to a constant): a small non-Gaussian target."""
    r = x - LOC
    return -0.5 * (6.0 + 3) * torch.log1p(((r @ PRECISION) * r).sum(-1) / 6.0)


def small_target():
    return st.Target(student3, dim=3)


RUN = dict(chains=3, draws=30, warmup=175, seed=21, progress=False)


@functools.lru_cache(maxsize=None)
def uninterrupted(metric):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # 3 x 30 draws: R-hat and ESS warnings expected
        return st.nuts(small_target(), metric=metric, **RUN)


def test_sample_stats_follow_the_arviz_schema_and_arviz_reads_them():
    target = st.Target(lambda p: -0.5 * (p["mu"] ** 2) - 2 * p["tau"] + torch.log(p["tau"]),
                       latents={"mu": st.Latent(), "tau": st.Latent(support=constraints.positive)})
    run = st.nuts(target, draws=300, warmup=175, seed=3, progress=False)
    idata = run.to_inference_data()
    stats = idata.sample_stats
    for name, kind in [("lp", "f"), ("acceptance_rate", "f"), ("step_size", "f"), ("tree_depth", "i"),
                       ("n_steps", "i"), ("diverging", "b"), ("energy", "f")]:
        assert stats[name].dims == ("chain", "draw") and stats[name].shape == (4, 300), name
        assert stats[name].dtype.kind == kind, name
    # leapfrog steps of a tree of depth j: 2^(j-1) <= n <= 2^j - 1 ("The No-U-Turn Sampler", arXiv:1111.4246)
    depth, steps = stats["tree_depth"].values, stats["n_steps"].values
    assert np.all((2 ** (depth - 1) <= steps) & (steps <= 2 ** depth - 1))
    # Gamma(2, rate 2) for tau and N(0, 1) for mu: scipy.stats moments, within 5 Monte Carlo errors
    summary = az.summary(idata, var_names=["mu", "tau"])
    for name, law in [("mu", scipy.stats.norm()), ("tau", scipy.stats.gamma(2, scale=0.5))]:
        assert abs(summary.loc[name, "mean"] - law.mean()) < 5 * summary.loc[name, "mcse_mean"]
    assert float(az.rhat(idata)["tau"]) < 1.05 and float(az.ess(idata)["mu"]) > 200
    assert az.bfmi(idata).shape == (4,) and np.all(az.bfmi(idata) > 0.3)
    assert az.plot_energy(idata) is not None
    assert idata.posterior.attrs["method"] == "nuts"
    # the history keeps every transition, warm-up included
    assert run.history["tree_depth"].shape == (475, 4) and run.history["grad_evals"][-1] == run.settings["grad_evals"]


def test_divergences_are_counted_warned_with_their_count_and_the_draws_stay_right():
    # A wall: the model raises (and is NaN) beyond x = 1. Each trajectory into it ends as a divergence;
    # what remains samples N(0, 1) truncated at 1 (scipy.stats.truncnorm). Many trajectories hit the
    # wall, so divergences pass 1% of the draws: the warning names their count and reparametrising.
    def walled(x):
        if bool((x >= 1.0).any()) and x.shape[0] == 1:
            raise ValueError("outside the model's domain")
        return torch.where(x[..., 0] < 1.0, -0.5 * x[..., 0] ** 2, torch.nan)

    with pytest.warns(RuntimeWarning, match=r"nuts: \d+ of 2000 draws after warm-up .* divergent") as caught:
        run = st.nuts(st.Target(walled, dim=1), draws=500, warmup=200, seed=4, precondition=None, progress=False)
    count = int(run.sample_stats["diverging"].sum())
    assert count > 20
    message = next(str(w.message) for w in caught if "divergent" in str(w.message))
    assert int(re.search(r"(\d+) of 2000", message).group(1)) == count and "reparameterise" in message
    assert any(w.startswith(f"{count} of 2000") for w in run.warnings)
    x = run.draws["x"].flatten().numpy()
    assert x.max() < 1.0
    truncated = scipy.stats.truncnorm(-np.inf, 1.0)
    ess = float(az.ess(run.draws["x"][..., 0].numpy()))
    assert abs(x.mean() - truncated.mean()) < 5 * truncated.std() / np.sqrt(ess)


@pytest.mark.parametrize("metric, split", [("diag", 60), ("dense", 60), ("dense", 150), ("diag", 190)])
# splits in a metric window, in the closing phase, after warm-up
def test_resume_from_a_checkpoint_is_bit_identical(tmp_path, split, metric):
    whole = uninterrupted(metric)
    path = tmp_path / "nuts.pt"
    first = st.NUTS(small_target(), RUN["chains"], RUN["draws"], RUN["warmup"], metric=metric, seed=RUN["seed"])
    first.run(split, progress=False, checkpoint=path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        resumed = st.nuts(small_target(), metric=metric, resume=path, **{**RUN, "seed": None})
    assert torch.equal(resumed.particles, whole.particles) and torch.equal(resumed.lp, whole.lp)
    for name, value in whole.sample_stats.items():
        np.testing.assert_array_equal(resumed.sample_stats[name], value, err_msg=name)
    for name, value in whole.history.items():
        if name != "seconds":
            np.testing.assert_array_equal(resumed.history[name], value, err_msg=name)
    # st.load reads the checkpoint back as the draws so far
    loaded = st.load(path, small_target())
    assert loaded.method == "nuts" and loaded.particles.shape == (3, max(0, split - RUN["warmup"]), 3)


def test_a_checkpoint_with_other_settings_is_refused(tmp_path):
    path = tmp_path / "nuts.pt"
    st.NUTS(small_target(), 3, 40, 175, seed=1).run(20, progress=False, checkpoint=path)
    with pytest.raises(ValueError, match="metric='dense' in the file, 'diag' now"):
        st.nuts(small_target(), 3, 40, 175, seed=1, metric="diag", resume=path, progress=False)


def test_ctrl_c_returns_the_draws_so_far_and_the_checkpoint_resumes_exactly(tmp_path):
    path = tmp_path / "nuts.pt"
    seen = {"steps": 0}

    def interrupt_after_200(sampler):
        seen["steps"] += 1
        if sampler.step_count == 200:
            signal.raise_signal(signal.SIGINT)   # the loop's guard turns it into a stop after this step

    sampler = st.NUTS(small_target(), 3, 40, 175, seed=2)
    sampler.run(progress=False, checkpoint=path, hooks=[interrupt_after_200])
    partial = sampler.result()
    assert partial.stop_reason == "interrupted" and partial.particles.shape[1] == 25
    assert st_io.load_checkpoint(path)["step"] == 200
    resumed = st.nuts(small_target(), 3, 40, 175, resume=path, progress=False)
    whole = st.nuts(small_target(), 3, 40, 175, seed=2, progress=False)
    assert resumed.stop_reason == "draws" and torch.equal(resumed.particles, whole.particles)


def test_points_where_the_model_raises_are_divergences_not_crashes():
    # the log density raises for a whole batch that contains a point with x0 > 3 (a region fault);
    # the fault-contained evaluation isolates those points and the chains never stop
    def touchy(x):
        if bool((x[..., 0] > 3.0).any()):
            raise RuntimeError("solver did not converge")
        return -0.5 * (x ** 2).sum(-1)

    run = st.nuts(st.Target(touchy, dim=2), draws=300, warmup=200, seed=0, precondition=None, progress=False)
    # N(0, 1) reaches beyond 3 at an energy level chi2(2) > 9: about 1% of trajectories (closed form)
    assert run.particles[..., 0].max() <= 3.0 and np.isfinite(run.lp.numpy()).all()
    assert run.history["diverging"].sum() > 0


@pytest.mark.parametrize("kwargs, pattern", [
    (dict(chains=0), r"nuts: chains == 0, must be >= 1"),
    (dict(draws=-5), r"nuts: draws == -5, must be >= 1"),
    (dict(warmup=100), r"nuts: warmup == 100; expected 0 \(no adaptation\) or at least 175 iterations"),
    (dict(metric="full"), r"nuts: metric must be one of 'diag', 'dense'; got 'full'"),
    (dict(acceptance_goal=1.5), r"nuts: acceptance_goal == 1.5, must lie in \(0, 1\)"),
    (dict(depth_limit=0), r"nuts: depth_limit == 0, must be >= 1"),
])
def test_bad_arguments_are_named(kwargs, pattern):
    with pytest.raises((ValueError, TypeError), match=pattern):
        st.nuts(small_target(), progress=False, **kwargs)
    with pytest.raises(TypeError, match="nuts: draws must be an int, got float"):
        st.nuts(small_target(), draws=2.5, progress=False)


def test_a_target_that_is_nan_at_the_start_is_named():
    nan_everywhere = st.Target(lambda x: (x * torch.nan).sum(-1), dim=2)
    with pytest.raises(ValueError, match="target: the log density or its score is NaN/inf"):
        st.nuts(nan_everywhere, progress=False)
    # finite log density, NaN score: d/dx sqrt(0 * x) = 0 / 0
    nan_score = st.Target(lambda x: -0.5 * (x ** 2).sum(-1) + torch.sqrt(0 * x).sum(-1), dim=2)
    with pytest.raises(ValueError, match="target: "):
        st.nuts(nan_score, progress=False)
    with pytest.raises(ValueError, match="init"):
        st.nuts(small_target(), init=torch.full((4, 3), torch.nan, dtype=torch.float64), progress=False)


def test_progress_figures_show_draws_divergences_step_size_and_depth():
    sampler = st.NUTS(small_target(), 2, 30, 175, seed=0)
    sampler.run(180, progress=False)
    figures = sampler.progress_figures()
    assert figures["draws"] == "5/30" and set(figures) == {"draws", "div", "step", "depth"}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert sampler.run(progress=False).result().particles.shape == (2, 30, 3)

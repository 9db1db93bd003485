"""Diagnostic figures: what they mark is what happened, and titles give the values they promise.

Sources: the re-whitening schedule documented in ``st.svgd`` (steps 25, 50, 100, 200, ...) checked
against the sampler's own whitening map, step by step; annealing drive < 1 exactly on the schedule's
ramp (``st.schedules.linear``); numpy's ``corrcoef``, means and sds for the values in titles; a
labelled axis on every panel (common practice for diagnostic plots).
"""

from __future__ import annotations

import re

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
import numpy as np
import torch

import stein_torch as st
from stein_torch.demo import _pair_plot, compare_draws, comparison_figure, demo_target


def correlated_target():
    prec = torch.linalg.inv(torch.tensor([[1.0, 0.8], [0.8, 1.0]], dtype=torch.float64))
    return st.Target(lambda x: -0.5 * ((x @ prec) * x).sum(-1), dim=2)


def test_rewhitening_marks_are_the_steps_whose_whitening_changed():
    sampler = st.Sampler(correlated_target(), 60, ensembles=2, seed=0, precondition="covariance")
    changed = []
    for _ in range(110):
        before = sampler.affine.matrix.clone()
        sampler.step()
        if not torch.equal(before, sampler.affine.matrix):
            changed.append(sampler.step_count)
    assert changed == [25, 50, 100]  # the documented schedule
    result = sampler.result()
    figure = result.plot_history()
    marked = sorted({int(line.get_xdata()[0]) for line in figure.axes[0].get_lines() if line.get_linestyle() == "--"})
    assert marked == changed
    plt.close(figure)


def test_history_panels_are_labelled_and_annealing_is_shaded():
    run = st.svgd(correlated_target(), particles=50, ensembles=3, steps=80, seed=1, progress=False,
                  anneal=st.schedules.linear(40))
    figure = run.plot_history()
    axes = figure.axes
    assert len(axes) == 4 and all(ax.get_ylabel() for ax in axes)
    assert [ax.get_xlabel() for ax in axes[2:]] == ["step", "step"]
    ksd_lines = [line for line in axes[0].get_lines() if line.get_linestyle() == "-"]
    assert len(ksd_lines) == 3  # one line per ensemble
    ksd = np.asarray(run.history["ksd"], dtype=float)
    spans_a_decade = np.nanmax(ksd) >= 10 * np.nanmin(ksd)
    assert axes[0].get_yscale() == ("log" if spans_a_decade else "linear")
    drive = np.asarray(run.history["drive"])
    annealed = np.flatnonzero(drive < 1) + 1
    span = axes[0].patches[0]  # the shaded annealing steps (a Rectangle)
    assert span.get_x() == annealed.min() - 0.5 and span.get_x() + span.get_width() == annealed.max() + 0.5
    assert annealed.max() == 40 < len(drive)  # drive < 1 on the 40 steps of the ramp, full drive afterwards
    plt.close(figure)


def test_langevin_history_marks_the_end_of_warmup():
    run = st.langevin(correlated_target(), chains=2, draws=100, warmup=150, seed=0, progress=False)
    figure = run.plot_history()
    assert [ax.get_ylabel().split("\n")[0] for ax in figure.axes] == ["step size per chain", "acceptance rate per chain"]
    dotted = [line for line in figure.axes[0].get_lines() if line.get_linestyle() == ":"]
    assert len(dotted) == 1 and dotted[0].get_xdata()[0] == 150
    plt.close(figure)


def test_titles_give_the_values_they_promise():
    target = demo_target()
    run = st.svgd(target, particles=60, steps=40, seed=2, progress=False)
    figure = _pair_plot(run.to_inference_data(), run.draws)
    corr = np.corrcoef(run.draws["initial_moisture"].ravel(), run.draws["drying_rate"].ravel())[0, 1]
    assert f"{corr:+.2f}" in figure._suptitle.get_text() and "60 posterior particles" in figure._suptitle.get_text()
    plt.close(figure)
    other = st.langevin(target, chains=2, draws=200, warmup=200, seed=0, progress=False)
    figures = compare_draws(run.draws, other.draws)
    figure = comparison_figure(run.draws, other.draws, figures)
    for ax, name in zip(figure.axes, ["initial_moisture", "drying_rate", "noise_sd"]):
        got, ref = run.draws[name].numpy().ravel(), other.draws[name].numpy().ravel()
        shift = abs(got.mean() - ref.mean()) / ref.std(ddof=1)
        ratio = got.std(ddof=1) / ref.std(ddof=1)
        numbers = [float(v) for v in re.findall(r"\d+\.\d+", ax.get_title())]
        assert numbers == [round(shift, 2), round(ratio, 2)], (name, ax.get_title())
        assert ax.get_xlabel()
    plt.close(figure)

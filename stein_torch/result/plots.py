"""Figures of a run's history: what a practitioner looks at before trusting the draws.

:func:`plot_history` draws, per step: the kernel Stein discrepancy of each ensemble (log scale, at
the steps where it was computed), the mean log density, the step size and the size of the SVGD
direction; re-whitening steps are marked by vertical lines and annealing steps (drive below 1) are
shaded. For Langevin runs: step size and acceptance rate per chain, with the end of warmup marked.
"""

from __future__ import annotations

import numpy as np

__all__ = ["plot_history"]

# (history key, axis label, log scale)
SVGD_PANELS = (
    ("ksd", "KSD per ensemble\n(whitened coordinates)", True),
    ("lp", "mean log density\n(unconstrained, with log-Jacobian)", False),
    ("step_size", "step size", True),
    ("phi_rms", "direction size\n(rms of the SVGD direction)", True),
)
MCMC_PANELS = (
    ("step_size", "step size per chain", True),
    ("acceptance_rate", "acceptance rate per chain\n(mean of the last 50 steps)", False),
)
SMOOTH = 50  # steps in the running mean of acceptance rates


def _series(history: dict, key: str) -> np.ndarray | None:
    values = history.get(key)
    if values is None or len(values) == 0:
        return None
    array = np.asarray(values, dtype=float)
    return array.reshape(len(array), -1)  # (steps, lines)


def _running_mean(values: np.ndarray, width: int) -> np.ndarray:
    cumulative = np.cumsum(np.vstack([np.zeros((1, values.shape[1])), values]), axis=0)
    steps = np.arange(1, len(values) + 1)
    lower = np.maximum(steps - width, 0)
    return (cumulative[steps] - cumulative[lower]) / (steps - lower)[:, None]


def _draw(ax, values: np.ndarray, log: bool, lines_label: str) -> None:
    steps = np.arange(1, len(values) + 1)
    for i in range(values.shape[1]):
        finite = np.isfinite(values[:, i])
        label = f"{lines_label} {i}" if values.shape[1] > 1 else None
        style = {"marker": "o", "markersize": 3} if finite.sum() < len(values) / 2 else {}
        ax.plot(steps[finite], values[finite, i], lw=1, label=label, **style)
    finite = values[np.isfinite(values)]
    if log and finite.size and np.all(finite > 0) and finite.max() >= 10 * finite.min():
        ax.set_yscale("log")  # only over a decade or more: within one, a log axis gets too few labels


def _marks(ax, history: dict, settings: dict, method: str) -> None:
    """Vertical lines at re-whitening steps, shading where annealing damps the drive, end of warmup."""
    rewhitened = _series(history, "rewhitened")
    if rewhitened is not None:
        for i, step in enumerate(np.flatnonzero(rewhitened[:, 0] > 0) + 1):
            ax.axvline(step, color="grey", ls="--", lw=0.8, label="re-whitened" if i == 0 else None)
    drive = _series(history, "drive")
    if drive is not None and np.any(drive[:, 0] < 1):
        annealed = np.flatnonzero(drive[:, 0] < 1) + 1
        ax.axvspan(annealed.min() - 0.5, annealed.max() + 0.5, color="tab:orange", alpha=0.12,
                   label="annealing (drive < 1)")
    warmup = settings.get("warmup")
    if method in ("mala", "ula") and isinstance(warmup, (int, np.integer)) and warmup > 0:
        ax.axvline(int(warmup), color="grey", ls=":", lw=1, label="end of warmup")


def plot_history(result, figsize: tuple | None = None):
    """Per-step figures of ``result`` as a matplotlib Figure (see the module docstring).

    Parameters
    ----------
    result : Result
    figsize : tuple of float, optional
        Default (10, 6.5).

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    history, method = result.history, result.method
    panels = SVGD_PANELS if method == "svgd" else MCMC_PANELS
    present = [(key, label, log) for key, label, log in panels if _series(history, key) is not None]
    if not present:
        raise ValueError(f"plot_history: the history of this {method} result holds none of {[p[0] for p in panels]}")
    columns = 2 if len(present) > 1 else 1
    rows = -(-len(present) // columns)
    figure, axes = plt.subplots(rows, columns, figsize=figsize or (10, 3.25 * rows), sharex=True, squeeze=False)
    lines_label = "ensemble" if method == "svgd" else "chain"
    for ax, (key, label, log) in zip(axes.ravel(), present):
        values = _series(history, key)
        if key == "acceptance_rate":
            values = _running_mean(values, SMOOTH)
        _draw(ax, values, log, lines_label)
        _marks(ax, history, result.settings, method)
        ax.set_ylabel(label)
    for ax in axes.ravel()[len(present):]:
        ax.set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("step")
    first = axes.ravel()[0]
    handles, labels = first.get_legend_handles_labels()
    if handles:
        first.legend(fontsize="small")
    steps = len(next(iter(history.values()), []))
    stop = f", stopped by {result.stop_reason}" if result.stop_reason not in ("steps", "draws") else ""
    figure.suptitle(f"{method.upper()} run: {steps} steps{stop}")
    figure.tight_layout()
    return figure

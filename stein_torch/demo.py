"""The embedded demo: how fast do timber boards dry in a kiln?

Scenario (invented; data generated in code with a fixed seed): a small sawmill kiln-dries green oak
boards. Each of 28 boards is taken out once, on some day between the 2nd and the 21st, and its
moisture content (percent of dry weight) is measured with a pin meter. Moisture falls roughly
exponentially,

    log moisture_b = log initial_moisture - drying_rate * day_b + noise,   noise ~ Normal(0, noise_sd),

with three unknowns: ``initial_moisture`` (percent, positive), ``drying_rate`` (per day, positive) and
``noise_sd`` (on the log scale, positive). Because all boards are measured after day 2, a board set
that started wetter must have dried faster to fit the same readings: the posterior of
(initial_moisture, drying_rate) is strongly correlated, which the pair plot shows. A derived
quantity answers the mill's question: the day the boards reach 12 % moisture.

Use from the shell with ``stein-torch demo`` or from Python::

    from stein_torch.demo import demo_target, run_demo
    run = run_demo("demo_output", particles=200, steps=300, seed=0)
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Callable

import numpy as np
import torch
from torch.distributions import HalfNormal, LogNormal, Normal, constraints

from .io import save_figure, save_netcdf
from .model import Latent, Target
from .result import Result
from .samplers import svgd

__all__ = ["kiln_data", "demo_target", "run_demo", "days_to_moisture", "DEMO_STEPS", "KILN_DRY_PERCENT"]

DATA_SEED = 1729  # the invented boards; fixed so every run sees the same data
BOARDS = 28
DEMO_STEPS = 300
KILN_DRY_PERCENT = 12.0  # the moisture the mill ships at
_TRUE = {"initial_moisture": 62.0, "drying_rate": 0.085, "noise_sd": 0.06}  # used only to invent data


def kiln_data() -> dict[str, torch.Tensor]:
    """The invented measurements: ``day`` (28,) and ``moisture`` (28,) in percent, float64."""
    g = torch.Generator().manual_seed(DATA_SEED)
    day = 2.0 + 19.0 * torch.rand(BOARDS, generator=g, dtype=torch.float64)
    day = torch.round(day).sort().values
    log_m = math.log(_TRUE["initial_moisture"]) - _TRUE["drying_rate"] * day
    noise = _TRUE["noise_sd"] * torch.randn(BOARDS, generator=g, dtype=torch.float64)
    moisture = torch.round(torch.exp(log_m + noise) * 10) / 10  # the meter shows one decimal
    return {"day": day, "moisture": moisture}


def demo_target(data: dict[str, torch.Tensor] | None = None) -> Target:
    """The kiln-drying model as a :class:`~stein_torch.Target` with three positive parameters.

    Parameters
    ----------
    data : dict, optional
        ``day`` and ``moisture`` tensors of shape (boards,); default :func:`kiln_data`.
    """
    data = kiln_data() if data is None else data
    day, log_moisture = data["day"], torch.log(data["moisture"])

    def f64(value: float) -> torch.Tensor:  # Python floats would make float32 parameters
        return torch.tensor(value, dtype=torch.float64)

    prior_initial = LogNormal(f64(math.log(50.0)), f64(0.5))  # green oak: typically 40-80 % (from memory)
    prior_rate = LogNormal(f64(math.log(0.1)), f64(0.75))  # per day
    prior_noise = HalfNormal(f64(0.2))  # meter and board-to-board scatter on the log scale

    def log_joint(p: dict[str, torch.Tensor]) -> torch.Tensor:
        # p[name] has shape (...,): a batch of parameter values; returns (...,)
        initial, rate, noise_sd = p["initial_moisture"], p["drying_rate"], p["noise_sd"]
        expected = torch.log(initial)[..., None] - rate[..., None] * day  # (..., boards)
        log_lik = Normal(expected, noise_sd[..., None]).log_prob(log_moisture).sum(-1)
        return (
            prior_initial.log_prob(initial)
            + prior_rate.log_prob(rate)
            + prior_noise.log_prob(noise_sd)
            + log_lik
        )

    return Target(
        log_joint,
        latents={
            "initial_moisture": Latent(support=constraints.positive),
            "drying_rate": Latent(support=constraints.positive),
            "noise_sd": Latent(support=constraints.positive),
        },
    )


def days_to_moisture(draws: dict[str, torch.Tensor], percent: float = KILN_DRY_PERCENT) -> torch.Tensor:
    """Day at which the expected moisture reaches ``percent``: log(initial / percent) / drying_rate."""
    return torch.log(draws["initial_moisture"] / percent) / draws["drying_rate"]


def run_demo(
    out_dir: str | Path = "demo_output",
    particles: int = 200,
    steps: int = DEMO_STEPS,
    seed: int = 0,
    progress: bool | None = None,
) -> Result:
    """Sample the kiln-drying posterior and write ``posterior.nc``, ``pair_plot.png`` and
    ``trace_figures.png`` into ``out_dir`` (created if needed).

    Returns
    -------
    Result
        The run; its files are listed in ``result.settings["files"]``.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    data = kiln_data()
    run = svgd(demo_target(data), particles=particles, steps=steps, seed=seed, progress=progress)
    idata = run.to_inference_data(
        observed_data={"moisture": data["moisture"].numpy()},
        constant_data={"day": data["day"].numpy()},
    )
    for group in ("observed_data", "constant_data"):  # name the per-board dimension
        dataset = idata[group]
        idata[group] = dataset.rename({dim: "board" for dim in dataset.dims})
    files = {
        "posterior": save_netcdf(idata, out / "posterior.nc"),
        "pair_plot": _save_plot(lambda: _pair_plot(idata), out / "pair_plot.png"),
        "trace_figures": _save_plot(lambda: trace_figure(run.history), out / "trace_figures.png"),
    }
    run.settings["files"] = {k: str(v) for k, v in files.items()}
    return run


def _save_plot(make: Callable, path: Path) -> Path:
    import matplotlib.pyplot as plt

    figure = make()
    try:
        return save_figure(figure, path)
    finally:
        plt.close(figure)


def _pair_plot(idata):
    import arviz as az

    axes = az.plot_pair(idata, kind="scatter", marginals=True, scatter_kwargs={"alpha": 0.5}, figsize=(7, 7))
    figure = np.asarray(axes).ravel()[0].figure
    figure.suptitle("Kiln drying: posterior particles (correlation of initial moisture and rate)")
    return figure


def trace_figure(trace: dict[str, np.ndarray]):
    """Per-step figures of a run: mean log density, step size, direction size (rms of phi) and the
    kernel bandwidth, one panel each. Returns a matplotlib Figure."""
    import matplotlib.pyplot as plt

    panels = [
        ("lp", "mean log density"),
        ("step_size", "step size"),
        ("phi_rms", "direction size (rms of phi)"),
        ("bandwidth", "kernel bandwidth"),
    ]
    figure, axes = plt.subplots(2, 2, figsize=(9, 6), sharex=True)
    for ax, (key, title) in zip(axes.ravel(), panels):
        values = np.asarray(trace.get(key, []), dtype=float)
        if values.size:
            ax.plot(np.arange(1, len(values) + 1), values.reshape(len(values), -1))
            if key == "phi_rms" and np.all(values > 0):
                ax.set_yscale("log")
        else:
            ax.text(0.5, 0.5, "not recorded", ha="center", va="center", transform=ax.transAxes)
        ax.set_title(title)
    for ax in axes[-1]:
        ax.set_xlabel("step")
    figure.tight_layout()
    return figure

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

The readings are described by a distribution (log-normal around the drying curve), so the same
definition scores them and simulates new ones: the InferenceData holds a ``posterior_predictive``
group for ``arviz.plot_ppc``. The particles are checked against a NUTS run on the same model
(:func:`stein_torch.crosscheck`; ``comparison.png``).

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
from torch.distributions import HalfNormal, LogNormal, constraints

from .crosscheck import crosscheck
from .io import save_figure, save_netcdf
from .model import Latent, Target
from .result import Result
from .samplers import svgd

__all__ = ["kiln_data", "demo_target", "run_demo", "days_to_moisture", "DEMO_STEPS", "KILN_DRY_PERCENT", "LABELS"]

DATA_SEED = 1729  # the invented boards; fixed so every run sees the same data
BOARDS = 28
DEMO_STEPS = 300
KILN_DRY_PERCENT = 12.0  # the moisture the mill ships at
_TRUE = {"initial_moisture": 62.0, "drying_rate": 0.085, "noise_sd": 0.06}  # used only to invent data
LABELS = {"initial_moisture": "initial moisture (% of dry weight)", "drying_rate": "drying rate (per day)",
          "noise_sd": "noise sd (log scale)"}


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

    def f64(value: float) -> torch.Tensor:  # Python floats would make float32 parameters
        return torch.tensor(value, dtype=torch.float64)

    prior_initial = LogNormal(f64(math.log(50.0)), f64(0.5))  # green oak: typically 40-80 % (from memory)
    prior_rate = LogNormal(f64(math.log(0.1)), f64(0.75))  # per day
    prior_noise = HalfNormal(f64(0.2))  # meter and board-to-board scatter on the log scale

    def log_prior(p: dict[str, torch.Tensor]) -> torch.Tensor:
        # p[name] has shape (...,): a batch of parameter values; returns (...,)
        return (prior_initial.log_prob(p["initial_moisture"]) + prior_rate.log_prob(p["drying_rate"])
                + prior_noise.log_prob(p["noise_sd"]))

    def readings(p: dict[str, torch.Tensor], d: dict[str, torch.Tensor]) -> LogNormal:
        # the readings' distribution, batch shape (..., boards): scores them and simulates new ones
        expected = torch.log(p["initial_moisture"])[..., None] - p["drying_rate"][..., None] * d["day"]
        return LogNormal(expected, p["noise_sd"][..., None])

    return Target(
        log_prior,
        latents={
            "initial_moisture": Latent(support=constraints.positive),
            "drying_rate": Latent(support=constraints.positive),
            "noise_sd": Latent(support=constraints.positive),
        },
        log_likelihood=readings, data={"day": data["day"], "moisture": data["moisture"]}, observed="moisture",
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
    """Sample the kiln-drying posterior, check it against NUTS, and write ``posterior.nc``,
    ``pair_plot.png``, ``history.png`` and ``comparison.png`` into ``out_dir`` (created if needed).

    Returns
    -------
    Result
        The run; its files are listed in ``result.settings["files"]``, the comparison with NUTS
        (per parameter: mean difference in NUTS sd, sd ratio) in ``result.settings["against_nuts"]``
        and the printed :func:`stein_torch.crosscheck` table in ``result.settings["crosscheck"]``.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    target = demo_target(kiln_data())
    run = svgd(target, particles=particles, steps=steps, seed=seed, progress=progress)
    idata = run.to_inference_data(dims={"moisture": ["board"], "day": ["board"]})
    check = crosscheck(run, target, seed=seed, progress=progress)  # NUTS, 4 chains x 1000 draws
    reference = check.reference.draws
    figures = compare_draws(run.draws, reference)
    files = {
        "posterior": save_netcdf(idata, out / "posterior.nc"),
        "pair_plot": _save_plot(lambda: _pair_plot(idata, run.draws), out / "pair_plot.png"),
        "history": _save_plot(run.plot_history, out / "history.png"),
        "comparison": _save_plot(lambda: comparison_figure(run.draws, reference, figures), out / "comparison.png"),
    }
    run.settings["files"] = {k: str(v) for k, v in files.items()}
    run.settings["against_nuts"] = figures
    run.settings["crosscheck"] = str(check)
    return run


def compare_draws(particles: dict, reference: dict) -> dict[str, tuple[float, float]]:
    """Per parameter: (|mean difference| / reference sd, sd / reference sd), draws pooled."""
    out = {}
    for name, ref in reference.items():
        ref, got = ref.reshape(-1).double(), particles[name].reshape(-1).double()
        sd = float(ref.std())
        out[name] = (abs(float(got.mean() - ref.mean())) / sd, float(got.std()) / sd)
    return out


def _save_plot(make: Callable, path: Path) -> Path:
    import matplotlib.pyplot as plt

    figure = make()
    try:
        return save_figure(figure, path)
    finally:
        plt.close(figure)


def _pair_plot(idata, draws: dict):
    import arviz as az

    axes = az.plot_pair(idata, kind="scatter", marginals=True, scatter_kwargs={"alpha": 0.5}, figsize=(7, 7))
    figure = np.asarray(axes).ravel()[0].figure
    flat = [draws[k].reshape(-1) for k in ("initial_moisture", "drying_rate")]
    corr = float(torch.corrcoef(torch.stack(flat))[0, 1])
    count = draws["initial_moisture"].numel()
    figure.suptitle(f"Kiln drying: {count} posterior particles\n"
                    f"correlation of initial moisture and drying rate {corr:+.2f}")
    return figure


def comparison_figure(particles: dict, reference: dict, figures: dict):
    """SVGD particles against NUTS draws, one panel per parameter, titles giving the differences."""
    import matplotlib.pyplot as plt

    names = list(reference)
    figure, axes = plt.subplots(1, len(names), figsize=(4 * len(names), 3.6), layout="constrained")
    for ax, name in zip(np.atleast_1d(axes), names):
        ref, got = reference[name].reshape(-1).numpy(), particles[name].reshape(-1).numpy()
        bins = np.linspace(min(ref.min(), got.min()), max(ref.max(), got.max()), 30)
        ax.hist(ref, bins=bins, density=True, alpha=0.45, color="grey", label=f"NUTS ({ref.size} draws)")
        ax.hist(got, bins=bins, density=True, histtype="step", lw=1.6, color="tab:blue", label=f"SVGD ({got.size} particles)")
        shift, ratio = figures[name]
        ax.set_title(f"means differ by {shift:.2f} NUTS sd\nsd ratio SVGD / NUTS {ratio:.2f}", fontsize=10)
        ax.set_xlabel(LABELS.get(name, name))
    np.atleast_1d(axes)[0].set_ylabel("density")
    np.atleast_1d(axes)[0].legend(fontsize="small")
    figure.suptitle("Kiln drying: SVGD particles against a NUTS run")
    return figure

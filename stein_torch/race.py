"""Side by side on the user's own model: SVGD configurations, Langevin and NUTS at equal score evaluations.

Each method runs once; along the way its output is measured at about ``checkpoints`` points spaced
geometrically (SVGD: the starting particles, then the particles after so many steps; Langevin and
NUTS: the draws kept so far, from 10 on), so one call gives accuracy against score evaluations for a
plot, and the final figures for a table.

Figures (every row and every checkpoint):

- ``ksd``: kernel Stein discrepancy (V-statistic, IMQ c = 1, beta = -1/2, h = 1) of the pooled output,
  computed for all methods on the *same* coordinates: the unconstrained space whitened by the
  curvature at the mode (found once per call). The V-statistic shrinks with the number of points, so
  compare methods at equal ``points`` (Langevin output is thinned evenly to at most ``ksd_points``).
- with ``reference`` draws: ``mean_error`` = max over scalar parameters of |mean - ref mean| / ref sd,
  ``sd_ratio_min``/``sd_ratio_max`` of sd / ref sd, ``w1`` = mean over scalar parameters of the 1-D
  Wasserstein distance (:func:`scipy.stats.wasserstein_distance`) / ref sd, and the score evaluations
  and seconds at which the output first met the accuracy tolerance and stayed within it to the end.
"""

from __future__ import annotations

import re
import time
from typing import Callable, Mapping, Sequence

import numpy as np
import torch

from .checks import check_int, check_type
from .model import Target
from .samplers import NUTS, Sampler, langevin
from .samplers.loop import run_loop
from .samplers.precondition import LAPLACE_MAX_DIM, Affine, laplace_whitening
from .samplers.svgd import DEFAULT_STEPS
from .samplers.threads import run_threads
from .stein import ksd as kernel_stein_discrepancy

__all__ = ["race", "plot_race", "accuracy", "reference_draws", "TOLERANCE"]

TOLERANCE = {"mean_error": 0.1, "sd_ratio_min": 0.9, "sd_ratio_max": 1.1}
METRIC_LABELS = {"w1": "W1 / reference sd (mean over parameters)", "mean_error": "largest |mean error| / reference sd",
                 "ksd": "KSD (whitened coordinates)", "sd_ratio_min": "smallest sd / reference sd",
                 "sd_ratio_max": "largest sd / reference sd"}
SVGD_OPTIONS = {"particles", "ensembles", "kernel", "stepper", "steps", "stop", "precondition", "dtype", "init"}
LANGEVIN_OPTIONS = {"chains", "draws", "warmup", "step_size", "precondition", "dtype", "init"}
NUTS_OPTIONS = {"chains", "draws", "warmup", "metric", "depth_limit", "acceptance_goal", "precondition", "dtype", "init"}


def accuracy(draws: Mapping[str, np.ndarray], reference: Mapping[str, np.ndarray]) -> dict[str, float]:
    """Moments and 1-D Wasserstein distances of ``draws`` against ``reference``.

    Parameters
    ----------
    draws, reference : mapping of str to array of shape (n, *shape)
        Every reference name must be in ``draws`` with the same ``shape``.

    Returns
    -------
    dict
        ``mean_error``, ``sd_ratio_min``, ``sd_ratio_max``, ``w1`` (see the module docstring).
    """
    from scipy.stats import wasserstein_distance

    errors, ratios, distances = [], [], []
    for name, ref in reference.items():
        ref = np.asarray(ref, dtype=np.float64)
        if name not in draws:
            raise ValueError(f"reference: parameter {name!r} is not among the draws {sorted(draws)}")
        got = np.asarray(draws[name], dtype=np.float64)
        if got.shape[1:] != ref.shape[1:]:
            raise ValueError(f"reference[{name!r}]: expected shape (n_draws, *{got.shape[1:]}), got {ref.shape}")
        ref2, got2 = ref.reshape(ref.shape[0], -1), got.reshape(got.shape[0], -1)
        ref_sd = ref2.std(0, ddof=1)
        errors.extend(np.abs(got2.mean(0) - ref2.mean(0)) / ref_sd)
        ratios.extend(got2.std(0, ddof=1) / ref_sd)
        distances.extend(wasserstein_distance(got2[:, i], ref2[:, i]) / ref_sd[i] for i in range(ref2.shape[1]))
    return {"mean_error": float(np.max(errors)), "sd_ratio_min": float(np.min(ratios)),
            "sd_ratio_max": float(np.max(ratios)), "w1": float(np.mean(distances))}


_FLAT_NAME = re.compile(r"(\w+)\[(\d+(?:\s*,\s*\d+)*)\]")


def reference_draws(reference) -> dict[str, np.ndarray]:
    """Reference draws as name -> float64 array (n_draws, *shape).

    Accepts a dict of arrays (n_draws, *shape), a dict of columns under flattened 1-based names
    (``"beta[1]"``, ``"a[1,2]"``), or an :class:`arviz.InferenceData` (its ``posterior`` group,
    chains pooled).
    """
    if hasattr(reference, "groups") and hasattr(reference, "posterior"):  # arviz.InferenceData
        posterior = reference.posterior
        reference = {k: v.values.reshape(-1, *v.shape[2:]) for k, v in posterior.data_vars.items()}
    if not isinstance(reference, Mapping) or not reference:
        raise TypeError(
            "race: reference must be an arviz.InferenceData or a non-empty dict name -> array (n_draws, *shape), "
            f"got {type(reference).__qualname__}"
        )
    out: dict[str, np.ndarray] = {}
    elements: dict[str, dict[tuple, np.ndarray]] = {}
    for key, value in reference.items():
        array = np.asarray(value, dtype=np.float64)
        match = _FLAT_NAME.fullmatch(str(key).strip())
        if match:
            index = tuple(int(i) for i in match.group(2).split(","))
            if min(index) < 1 or array.ndim != 1:
                raise ValueError(f"race: reference[{key!r}]: flattened names are 1-based columns of draws (n_draws,); "
                                 f"got index {index} and shape {array.shape}")
            elements.setdefault(match.group(1), {})[index] = array
        else:
            out[str(key)] = array
    for base, columns in elements.items():
        if base in out:
            raise ValueError(f"race: reference has both {base!r} and flattened names {base}[...]")
        ranks = {len(i) for i in columns}
        shape = tuple(max(i[a] for i in columns) for a in range(ranks.pop()))
        if ranks:
            raise ValueError(f"race: reference names {base}[...] mix different numbers of indices")
        missing = [i for i in np.ndindex(*shape) if tuple(a + 1 for a in i) not in columns]
        if missing:
            first = ",".join(str(a + 1) for a in missing[0])
            raise ValueError(f"race: reference lacks {base}[{first}] ({len(missing)} of {int(np.prod(shape))} elements "
                             f"of {base}, shape {shape} from the largest 1-based indices)")
        lengths = {c.shape[0] for c in columns.values()}
        if len(lengths) != 1:
            raise ValueError(f"race: reference columns {base}[...] have different numbers of draws {sorted(lengths)}")
        stacked = np.stack([columns[tuple(a + 1 for a in i)] for i in np.ndindex(*shape)], axis=-1)
        out[base] = stacked.reshape(stacked.shape[0], *shape)
    for k, v in out.items():
        if v.ndim < 1 or v.shape[0] < 2:
            raise ValueError(f"race: reference[{k!r}] must have shape (n_draws >= 2, *shape), got {v.shape}")
    return out


def _within_tolerance(figures: Mapping[str, float]) -> bool:
    return (figures["mean_error"] <= TOLERANCE["mean_error"] and figures["sd_ratio_min"] >= TOLERANCE["sd_ratio_min"]
            and figures["sd_ratio_max"] <= TOLERANCE["sd_ratio_max"])


def _parse_methods(methods) -> dict[str, dict]:
    if methods is None:
        methods = ("svgd", "mala", "nuts")
    if isinstance(methods, str):
        methods = (methods,)
    if isinstance(methods, Mapping):
        items = list(methods.items())
    elif isinstance(methods, Sequence):
        items = [(m, {"method": m}) for m in methods]
    else:
        raise TypeError(f"methods must be a list of names or a dict name -> options, got {type(methods).__qualname__}")
    parsed = {}
    for label, options in items:
        if not isinstance(options, Mapping):
            raise TypeError(f"methods[{label!r}] must be a dict of options, got {type(options).__qualname__}")
        options = dict(options)
        kind = options.pop("method", label)
        allowed = {"svgd": SVGD_OPTIONS, "mala": LANGEVIN_OPTIONS, "ula": LANGEVIN_OPTIONS, "nuts": NUTS_OPTIONS}.get(kind)
        if allowed is None:
            raise ValueError(f"methods[{label!r}]: method must be one of 'svgd', 'mala', 'ula', 'nuts'; got {kind!r}")
        unknown = set(options) - allowed
        if unknown:
            raise ValueError(f"methods[{label!r}]: unknown options {sorted(unknown)} for {kind}; allowed {sorted(allowed)}")
        parsed[str(label)] = {"method": kind, **options}
    return parsed


class _Meter:
    """Measures pooled output z (n, dim): KSD in common whitened coordinates and reference accuracy."""

    def __init__(self, target, reference, derived, ksd_points, affine):
        self.target, self.reference, self.derived = target, reference, derived
        self.ksd_points, self.affine = ksd_points, affine

    def __call__(self, z: torch.Tensor) -> dict[str, float]:
        index = np.unique(np.linspace(0, z.shape[0] - 1, min(z.shape[0], self.ksd_points)).round().astype(int))
        zk = z[index].to(self.affine.matrix.dtype)
        _, score = self.target.log_prob_and_score(zk)
        u, su = self.affine.to_u(zk), self.affine.score_u(score)
        finite = torch.isfinite(su).all(-1)
        figures = {"ksd": float(kernel_stein_discrepancy(u[finite], su[finite])), "points": int(finite.sum())}
        if self.reference is not None:
            with torch.no_grad():
                values, _ = self.target.constrain(z)
            draws = {k: v.detach().cpu().numpy() for k, v in values.items()}
            if self.derived is not None:
                draws = self.derived(draws)
            figures.update(accuracy(draws, self.reference))
        return figures


def _run_svgd(target, options, budget, checkpoints, meter, seed, progress):
    opts = dict(options)
    opts.pop("method")
    steps = opts.pop("steps", DEFAULT_STEPS)
    n = opts.get("particles", 200) * opts.get("ensembles", 1)
    if budget is not None:
        steps = max(1, budget // n - 1)  # the initial evaluation counts too
        opts.setdefault("stop", False)
    particles = opts.pop("particles", 200)
    start = time.perf_counter()
    sampler = Sampler(target, particles, seed=seed, **opts)
    elapsed = time.perf_counter() - start
    with run_threads(sampler.threads):  # the torch threads st.svgd would use for this size, measuring included
        marks = set(np.unique(np.geomspace(1, steps, checkpoints).round().astype(int)).tolist())
        z = sampler.affine.to_z(sampler.u).reshape(-1, target.dim).detach()
        path = [{"grad_evals": sampler.grad_evals, "seconds": elapsed, **meter(z)}]  # the starting particles
        clock = {"last": time.perf_counter()}

        def measure(s):  # after each step: time the step, measure at the marks and at the end
            nonlocal elapsed
            now = time.perf_counter()
            elapsed += now - clock["last"]
            if s.step_count in marks or s.stop_reason != s.finished_reason or s.step_count == steps:
                z = s.affine.to_z(s.u).reshape(-1, target.dim).detach()
                path.append({"grad_evals": s.grad_evals, "seconds": elapsed, **meter(z)})
            clock["last"] = time.perf_counter()  # measuring is not sampling time

        clock["last"] = time.perf_counter()
        run_loop(sampler, steps, progress=progress, hooks=[measure])
        return path, sampler.result()


def _run_langevin(target, options, budget, checkpoints, meter, seed, progress):
    opts = dict(options)
    kind = opts.pop("method")
    chains = opts.pop("chains", 4)
    if budget is not None:
        per_chain = max(2, budget // chains - 1)
        opts["warmup"] = per_chain // 2
        opts["draws"] = per_chain - per_chain // 2
    start = time.perf_counter()
    run = langevin(target, chains, adjusted=(kind == "mala"), seed=seed, progress=progress, **opts)
    total = time.perf_counter() - start
    warmup, draws = run.settings["warmup"], run.settings["draws"]
    loop = run.history["seconds"][-1]
    setup = total - loop
    path = []
    marks = np.unique(np.geomspace(min(10, draws), draws, checkpoints).round().astype(int).clip(2, draws))
    for kept in marks:
        z = run.particles[:, :kept].reshape(-1, target.dim)
        seconds = setup + float(run.history["seconds"][warmup + kept - 1])
        path.append({"grad_evals": chains * (1 + warmup + int(kept)), "seconds": seconds, **meter(z)})
    return path, run


def _run_nuts(target, options, budget, checkpoints, meter, seed, progress):
    opts = dict(options)
    opts.pop("method")
    chains = opts.pop("chains", 4)
    hooks = []
    if budget is not None:
        opts["draws"] = max(1, budget // chains)  # at least one evaluation per chain and transition

        def spend(s):  # stop before a transition as costly as the last one would pass the budget
            evals = s.history["grad_evals"]
            last = evals[-1] - (evals[-2] if len(evals) > 1 else 0)
            if s.grad_evals + last > budget:
                s.stop_reason = "budget"

        hooks.append(spend)
    start = time.perf_counter()
    sampler = NUTS(target, chains, seed=seed, **opts)
    sampler.run(progress=progress, hooks=hooks)
    run = sampler.result()
    setup = time.perf_counter() - start - sampler.elapsed
    warmup, kept = sampler.warmup, run.particles.shape[1]
    if kept < 2:  # the budget ended in warm-up: no draws to measure
        nan = float("nan")
        empty = {"ksd": nan, "points": 0, **({} if meter.reference is None else {
            "mean_error": nan, "sd_ratio_min": nan, "sd_ratio_max": nan, "w1": nan})}
        return [{"grad_evals": sampler.grad_evals, "seconds": setup + sampler.elapsed, **empty}], run
    path = []
    for k in np.unique(np.geomspace(min(10, kept), kept, checkpoints).round().astype(int).clip(2, kept)):
        i = warmup + int(k) - 1
        path.append({"grad_evals": int(run.history["grad_evals"][i]),
                     "seconds": setup + float(run.history["seconds"][i]),
                     **meter(run.particles[:, :k].reshape(-1, target.dim))})
    return path, run


def race(
    target: Target,
    reference: Mapping[str, np.ndarray] | None = None,
    *,
    budget: int | None = None,
    methods=None,
    checkpoints: int = 20,
    derived: Callable[[dict], dict] | None = None,
    ksd_points: int = 1000,
    seed: int = 0,
    progress: bool | None = False,
) -> list[dict]:
    """Run SVGD configurations and Langevin samplers on ``target`` and measure each the same way.

    Parameters
    ----------
    target : Target
    reference : dict of str to array, or arviz.InferenceData, optional
        Trusted draws (e.g. a long MCMC run) on the constrained scale, by parameter name (or by the
        names ``derived`` returns): arrays of shape (n_draws, *shape); or one column per element
        under flattened, 1-based names such as ``"beta[1]"``, ``"beta[2]"`` (``"a[1,2]"`` for
        matrices); or an InferenceData whose ``posterior`` group holds them (chains pooled).
    budget : int, optional
        Score evaluations per method (particles x steps for SVGD, with the stop rule off unless
        given; chains x (1 + warmup + draws) for Langevin, warmup = half; NUTS: its warm-up (500 by
        default), then draws until the next transition, as costly as the last, would pass the
        budget). None: each method's own defaults (SVGD: the default run, at most 1000 steps with the
        default stop rule; Langevin: 1000 warmup + 1000 draws; NUTS: 500 warm-up + 1000 draws).
    methods : list of str or dict of str to dict, optional
        Names among {"svgd", "mala", "ula", "nuts"}, or label -> options, e.g.
        ``{"svgd": {}, "svgd-imq": {"method": "svgd", "kernel": st.kernels.IMQ()}, "mala":
        {"chains": 8}}`` (``method`` defaults to the label). Options are those of
        :func:`stein_torch.svgd` / :func:`stein_torch.langevin` / :func:`stein_torch.nuts`. Default
        ("svgd", "mala", "nuts").
    checkpoints : int, default=20
        Measurements along each run, spaced geometrically (for :func:`plot_comparison`); SVGD adds
        one for its starting particles.
    derived : callable, optional
        Maps draws (dict name -> array (n, *shape), constrained) to the reference's names.
    ksd_points : int, default=1000
        Largest number of points the KSD is computed on (evenly thinned beyond).
    seed : int, default=0
    progress : bool, default=False

    Returns
    -------
    list of dict
        One row per method: ``method``, ``grad_evals``, ``seconds`` (set-up included), ``ksd``,
        ``points``, ``stop_reason``; with ``reference`` also ``mean_error``, ``sd_ratio_min``,
        ``sd_ratio_max``, ``w1``, ``evals_to_tolerance`` and ``seconds_to_tolerance`` (None when the tolerance
        mean_error <= 0.1, sd ratios in [0.9, 1.1] was not held at the end); ``path``: the
        checkpoints as a list of dicts with the same figures; ``result``: the method's Result.

    Notes
    -----
    Figures from one model and one seed; they are approximate and timings depend on the machine.
    """
    check_type(target, "race: target", Target, "stein_torch.Target")
    if budget is not None:
        check_int(budget, "race: budget")
    check_int(checkpoints, "race: checkpoints")
    if reference is not None:
        reference = reference_draws(reference)
    specs = _parse_methods(methods)
    meter = _Meter(target, reference, derived, ksd_points, _common_affine(target))
    rows = []
    for label, options in specs.items():
        runner = {"svgd": _run_svgd, "nuts": _run_nuts}.get(options["method"], _run_langevin)
        path, result = runner(target, options, budget, checkpoints, meter, seed, progress)
        row = {"method": label, **path[-1], "stop_reason": result.stop_reason}
        if reference is not None:
            row["evals_to_tolerance"], row["seconds_to_tolerance"] = _time_to_tolerance(path)
        row["path"], row["result"] = path, result
        rows.append(row)
    return rows


def _common_affine(target: Target) -> Affine:
    affine = Affine.identity(target.dim, torch.float64)
    if target.dim <= LAPLACE_MAX_DIM:
        candidate, _ = laplace_whitening(target, torch.zeros(target.dim, dtype=torch.float64))
        if candidate is not None and torch.isfinite(candidate.matrix).all():
            affine = candidate
    return affine


def _time_to_tolerance(path: list[dict]) -> tuple[int | None, float | None]:
    """Evaluations and seconds at the first checkpoint from which every later one meets the tolerance."""
    first = None
    for i, point in enumerate(path):
        if not _within_tolerance(point):
            first = None
        elif first is None:
            first = i
    if first is None:
        return None, None
    return path[first]["grad_evals"], path[first]["seconds"]


def plot_race(rows: list[dict], metric: str = "w1", ax=None):
    """Plot ``metric`` against score evaluations for each method of :func:`compare` (log-log).

    Parameters
    ----------
    rows : list of dict
        The return value of :func:`race`.
    metric : {"w1", "mean_error", "ksd", "sd_ratio_min", "sd_ratio_max"}, default="w1"
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib Axes
    """
    import matplotlib.pyplot as plt

    if not rows or any("path" not in r for r in rows):
        raise ValueError("plot_race: rows must be the list returned by st.race")
    if metric not in rows[0]["path"][0]:
        raise ValueError(f"plot_race: metric must be one of {sorted(k for k in rows[0]['path'][0] if k != 'points')}, got {metric!r}")
    if ax is None:
        _, ax = plt.subplots(figsize=(5.5, 3.8), layout="constrained")  # room for the axis labels
    for row in rows:
        x = [p["grad_evals"] for p in row["path"]]
        y = [p[metric] for p in row["path"]]
        ax.plot(x, y, marker="o", markersize=3, label=row["method"])
    ax.set_xscale("log")
    if metric in ("w1", "mean_error", "ksd"):
        ax.set_yscale("log")
    if metric == "mean_error":
        ax.axhline(TOLERANCE["mean_error"], color="grey", lw=0.8, ls="--")
    ax.set_xlabel("score evaluations")
    ax.set_ylabel(METRIC_LABELS.get(metric, metric))
    ax.legend()
    return ax


"""``stein-torch run MODEL.py``: which sampler, with which options, and what the run reports.

:data:`METHODS` maps a ``--method`` name to the package function and the command-line options it
takes (option -> keyword argument); adding a sampler is one entry. A method whose function the
installed package lacks is refused with a message saying so. After the run the report gives the
steps actually run, why the run stopped, the final KSD per ensemble (SVGD), R-hat across
ensembles or chains when there are several, and every warning.

Kernel specifications (``--kernel``): terms joined by ``+``, each ``name`` or ``name:value``:
``rbf``, ``imq``, ``matern:NU`` (NU in 0.5, 1.5, 2.5), ``gamma-exp:G`` (0 < G <= 2),
``linear`` or ``linear:RADIUS``, and ``weighted-`` before a radial term for its target-weighted form;
``default`` is the sampler's default (``imq+linear:2``).
"""

from __future__ import annotations

import warnings
from typing import Callable

__all__ = ["METHODS", "STOP_REASONS", "available_methods", "parse_kernel", "sample", "report"]

# --method name -> (function in stein_torch, {command-line option: keyword argument})
METHODS: dict[str, tuple[str, dict[str, str]]] = {
    "svgd": ("svgd", {"particles": "particles", "ensembles": "ensembles", "steps": "steps", "no_stop": "stop",
                      "kernel": "kernel", "checkpoint": "checkpoint", "resume": "resume", "seed": "seed",
                      "ranks": "distributed"}),
    "langevin": ("langevin", {"ensembles": "chains", "draws": "draws", "warmup": "warmup",
                              "checkpoint": "checkpoint", "resume": "resume", "seed": "seed"}),
    "nuts": ("nuts", {"ensembles": "chains", "draws": "draws", "warmup": "warmup",
                      "checkpoint": "checkpoint", "resume": "resume", "seed": "seed"}),
}
STOP_REASONS = {
    "steps": "ran every step allowed",
    "settled": "the particles settled: their moments stopped moving and the KSD is at the level of exact draws",
    "ksd_plateau": "the kernel Stein discrepancy stopped improving",
    "ksd_tolerance": "the kernel Stein discrepancy fell below the tolerance",
    "draws": "all draws taken",
    "interrupted": "interrupted (Ctrl-C); the run so far",
}
OPTION_FLAGS = {"no_stop": "--no-stop"}


def available_methods() -> list[str]:
    """The ``--method`` names whose function this installation of stein_torch has."""
    import stein_torch

    return [name for name, (function, _) in METHODS.items() if hasattr(stein_torch, function)]


def _flag(option: str) -> str:
    return OPTION_FLAGS.get(option, "--" + option.replace("_", "-"))


def parse_kernel(spec: str):
    """A kernel from a specification such as ``"imq+linear:2"`` (see the module docstring)."""
    from . import kernels

    radial: dict[str, Callable] = {
        "rbf": lambda value: kernels.RBF(),
        "imq": lambda value: kernels.IMQ(),
        "matern": lambda value: kernels.Matern(nu=value),
        "gamma-exp": lambda value: kernels.GammaExponential(gamma=value),
    }
    needs_value = {"matern", "gamma-exp"}
    if spec.strip() == "default":
        spec = "imq+linear:2"
    parts = []
    for term in spec.split("+"):
        name, _, text = term.strip().lower().partition(":")
        weighted = name.startswith("weighted-")
        name = name.removeprefix("weighted-")
        try:
            value = float(text) if text else None
        except ValueError:
            raise ValueError(f"--kernel: {term!r} needs a number after ':', got {text!r}") from None
        if name == "linear" and not weighted:
            parts.append(kernels.Linear(radius=value))
            continue
        if name not in radial or (name in needs_value) != (value is not None):
            raise ValueError(
                f"--kernel: unknown term {term!r}; use rbf, imq, matern:NU, gamma-exp:G, linear[:RADIUS], "
                "weighted-<radial term>, joined by '+' (e.g. imq+linear:2), or default"
            )
        kernel = radial[name](value)
        parts.append(kernels.TargetWeighted(kernel) if weighted else kernel)
    total = parts[0]
    for part in parts[1:]:
        total = total + part
    return total


def sample(target, method: str, options: dict, progress: bool):
    """Run ``method`` on ``target`` with the options the user gave (None = not given).

    Returns
    -------
    (Result, list of str)
        The run and the warnings Python issued during it (text, without duplicates).
    """
    import stein_torch

    function_name, accepted = METHODS[method]
    given = {k: v for k, v in options.items() if v is not None and v is not False}
    refused = sorted(set(given) - set(accepted))
    if refused:
        takers = {o: [m for m, (_, acc) in METHODS.items() if o in acc] for o in refused}
        listed = "; ".join(f"{_flag(o)} applies to --method {' / '.join(takers[o])}" for o in refused)
        raise ValueError(f"--method {method} does not take {', '.join(_flag(o) for o in refused)} ({listed})")
    function = getattr(stein_torch, function_name)
    kwargs = {accepted[k]: v for k, v in given.items()}
    if "stop" in kwargs:
        kwargs["stop"] = False  # --no-stop
    if "kernel" in kwargs:
        kwargs["kernel"] = parse_kernel(kwargs["kernel"])
    if "distributed" in kwargs:  # --ranks R > 1: the particles shared by the R workers of torchrun
        kwargs["distributed"] = "particles"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        run = function(target, progress=progress, **kwargs)
    seen = []
    for w in caught:
        if issubclass(w.category, (DeprecationWarning, FutureWarning, PendingDeprecationWarning)):
            continue
        text = f"{w.category.__name__}: {w.message}"
        if text not in seen:
            seen.append(text)
    return run, seen


def report(run, python_warnings: list[str]) -> list[str]:
    """Lines describing how the run went: steps, stop reason, final KSD, R-hat, warnings."""
    settings = run.settings
    chains = run.particles.shape[0]
    lines = []
    if "warmup" in settings and "draws" in settings:  # MCMC: warmup, then kept draws
        warmup, draws = int(settings["warmup"]), int(settings["draws"])
        lines.append(f"steps run: {warmup + draws} per chain ({warmup} warmup + {draws} kept draws)")
    else:
        lines.append(f"steps run: {settings.get('steps')}")
    reason = run.stop_reason
    lines.append(f"stopped: {reason} ({STOP_REASONS[reason]})" if reason in STOP_REASONS else f"stopped: {reason}")
    if "ksd" in settings:
        values = " ".join(f"{float(v):.4g}" for v in settings["ksd"])
        lines.append(f"final KSD per ensemble (whitened coordinates): {values}")
    if chains > 1:
        lines.append(_rhat_line(run, chains))
    own = [str(w) for w in run.warnings]  # the run's warnings, which it also issued as Python warnings
    every = own + [w for w in python_warnings if w.split(": ", 1)[-1] not in own]
    if every:
        lines.append(f"warnings ({len(every)}):")
        lines.extend(f"  - {w}" for w in every)
    else:
        lines.append("warnings: none")
    return lines


def _rhat_line(run, chains: int) -> str:
    import arviz as az
    import numpy as np

    rhat = az.rhat(run.to_inference_data())
    worst_name, worst = None, -np.inf
    for name, values in rhat.data_vars.items():
        array = np.asarray(values)
        if array.size and np.nanmax(array) > worst:
            worst_name, worst = name, float(np.nanmax(array))
    what = "ensembles" if run.method == "svgd" else "chains"
    verdict = "below 1.01" if worst < 1.01 else "ABOVE 1.01: the " + what + " disagree"
    return f"R-hat across the {chains} {what}: largest {worst:.4f} ({worst_name}), {verdict}"

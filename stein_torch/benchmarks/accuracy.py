"""Accuracy suite: default SVGD, MALA and NUTS on the eight posteriordb reference posteriors.

    stein-torch bench accuracy [--names NAME ...] [--posteriors DIR] [--seed 0] [--threads N] [--budget B]

For each posterior it runs ``st.svgd(target, particles=200, seed=0)`` (default kernel, stepper and
stop rule), ``st.langevin(target, chains=4, draws=1000, warmup=1000, seed=0)`` and
``st.nuts(target, seed=0)`` (4 chains, 500 warm-up, 1000 draws) through :func:`stein_torch.race`
(with ``--budget B`` every method gets B score evaluations instead, see :func:`stein_torch.race`)
and prints, per posterior and method: mean_error (max over parameters of
|mean - ref mean| / ref sd), the range of sd / ref sd, w1 (mean 1-D Wasserstein distance / ref sd),
the KSD (whitened coordinates, see :mod:`stein_torch.race`), score evaluations and seconds, and the
score evaluations and seconds after which the output met the tolerance (mean_error <= 0.1, sd ratios in
[0.9, 1.1]) and held it, and the ratios SVGD / NUTS of those score evaluations and seconds. The exit
status is 0 when SVGD and NUTS meet the tolerance on every posterior and MALA on at least six, else 1.

Two more lines per posterior put the tolerance in proportion:

- ``exact``: the share of random subsets of 200 reference draws (exact, independent draws from the
  posterior) whose moments meet the same tolerance. The tolerance asks for the sd within 10% from 200
  points; for heavy-tailed or many-parameter posteriors independent draws rarely manage that, and
  SVGD meets it only because its particles are spread more evenly than random draws.
- ``seeds`` (with ``--seeds K``): SVGD at seeds 0..K-1, how many meet the tolerance.

The torch models of the posteriors live in ``tests/posteriordb.py`` of a source checkout (beside the
package); the data and reference draws in ``../shared/posteriors`` beside the checkout, or in the
folder given by ``--posteriors`` or the environment variable ``STEIN_TORCH_POSTERIORS``.
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import pathlib
import sys

import stein_torch as st
from stein_torch.race import TOLERANCE

__all__ = ["main"]

MODELS_FILE = pathlib.Path(__file__).resolve().parents[2] / "tests" / "posteriordb.py"
MALA_NEEDED = 6


def load_models(posteriors: str | None):
    """Import tests/posteriordb.py by path; point it at the reference folder."""
    if not MODELS_FILE.is_file():
        raise SystemExit(
            f"bench accuracy: the reference models ({MODELS_FILE}) are not installed; run it from a source "
            "checkout of stein_torch (the tests folder beside the package)"
        )
    spec = importlib.util.spec_from_file_location("_stein_torch_posteriordb", MODELS_FILE)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up while the file runs
    spec.loader.exec_module(module)
    folder = posteriors or os.environ.get("STEIN_TORCH_POSTERIORS")
    if folder:
        module.POSTERIORS_DIR = pathlib.Path(folder).resolve()
    missing = [n for n in module.NAMES if not (module.POSTERIORS_DIR / n / "reference_draws.json.zip").is_file()]
    if missing:
        raise SystemExit(
            f"bench accuracy: reference posteriors not found under {module.POSTERIORS_DIR} (missing {missing}); "
            "pass --posteriors DIR or set STEIN_TORCH_POSTERIORS"
        )
    return module


def target_of(model) -> st.Target:
    return st.Target(model.log_joint, latents={k: st.Latent(tuple(s), c) for k, (s, c) in model.params.items()})


def run_one(pdb, name: str, seed: int, budget: int | None = None) -> list[dict]:
    model = pdb.model(name)
    methods = {"svgd": {"method": "svgd", "particles": 200},
               "mala": {"method": "mala", "chains": 4, "draws": 1000, "warmup": 1000},
               "nuts": {"method": "nuts"}}
    return st.race(target_of(model), pdb.load_reference(name), methods=methods, derived=model.derived, seed=seed,
                   budget=budget)


def svgd_over_nuts(rows: list[dict], key: str) -> str:
    """SVGD's score evaluations (or seconds) to tolerance over NUTS's, or why there is no ratio."""
    found = {r["method"]: r[key] for r in rows}
    if found.get("svgd") is None or found.get("nuts") is None:
        return "-"
    return f"{found['svgd'] / found['nuts']:.2f}"


EXACT_SUBSETS = 400  # random 200-draw subsets of the reference behind the "exact" line


def exact_tolerance_share(pdb, name: str, size: int = 200, subsets: int = EXACT_SUBSETS) -> float:
    """Share of random ``size``-draw subsets of the reference draws that meet the tolerance."""
    import numpy as np

    reference = pdb.load_reference(name)
    n = next(iter(reference.values())).shape[0]
    rng = np.random.default_rng(0)
    met = 0
    for _ in range(subsets):
        idx = rng.choice(n, size, replace=False)
        met += _within_tolerance(pdb.compare_moments({k: v[idx] for k, v in reference.items()}, name))
    return met / subsets


def _within_tolerance(moments: dict) -> bool:
    return (max(m["mean_error"] for m in moments.values()) <= TOLERANCE["mean_error"]
            and min(m["sd_ratio_min"] for m in moments.values()) >= TOLERANCE["sd_ratio_min"]
            and max(m["sd_ratio_max"] for m in moments.values()) <= TOLERANCE["sd_ratio_max"])


def seeds_within_tolerance(pdb, name: str, seeds: int) -> int:
    """How many of SVGD's default runs at seeds 0..seeds-1 meet the tolerance."""
    model = pdb.model(name)
    target = target_of(model)
    met = 0
    for seed in range(seeds):
        run = st.svgd(target, particles=200, seed=seed)
        draws = model.derived({k: v.reshape(-1, *v.shape[2:]).numpy() for k, v in run.draws.items()})
        met += _within_tolerance(pdb.compare_moments(draws, name))
    return met


def _fmt(value, spec):
    return "-" if value is None else format(value, spec)


def main(args: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="stein-torch bench accuracy", description=__doc__.splitlines()[0])
    parser.add_argument("--names", nargs="*", default=None, help="posteriors to run (default: all eight)")
    parser.add_argument("--posteriors", default=None, help="folder of the posteriordb reference posteriors")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--seeds", type=int, default=0,
                        help="also run default SVGD at seeds 0..K-1 and count those meeting the tolerance")
    parser.add_argument("--budget", type=int, default=None,
                        help="score evaluations per method (default: each method's own defaults)")
    parser.add_argument("--threads", type=int, default=None,
                        help="torch intra-op threads (1 is fastest on a machine shared with other jobs)")
    opts = parser.parse_args(args)
    if opts.threads is not None:
        if opts.threads < 1:
            parser.error(f"--threads must be >= 1, got {opts.threads}")
        import torch

        torch.set_num_threads(opts.threads)
    if opts.budget is not None and opts.budget < 1:
        parser.error(f"--budget must be >= 1, got {opts.budget}")
    pdb = load_models(opts.posteriors)
    names = opts.names or pdb.NAMES
    unknown = [n for n in names if n not in pdb.NAMES]
    if unknown:
        parser.error(f"--names: unknown posteriors {unknown}; choose from {pdb.NAMES}")
    header = (f"{'posterior':<38} {'method':<6} {'mean_err':>8} {'sd_min':>6} {'sd_max':>6} {'w1':>6} {'ksd':>7} "
              f"{'evals':>8} {'sec':>7} {'evals_ok':>8} {'sec_ok':>7} stop")
    print(f"accuracy tolerance: mean_error <= {TOLERANCE['mean_error']}, sd ratio in [{TOLERANCE['sd_ratio_min']}, "
          f"{TOLERANCE['sd_ratio_max']}]; *_ok: first point from which the tolerance held to the end")
    print(header)
    print("-" * len(header))
    passed = {"svgd": 0, "mala": 0, "nuts": 0}
    for name in names:
        rows = run_one(pdb, name, opts.seed, opts.budget)
        for row in rows:
            ok = row["evals_to_tolerance"] is not None  # the final output is the last checkpoint
            passed[row["method"]] += ok
            print(f"{name[:38]:<38} {row['method']:<6} {row['mean_error']:8.3f} {row['sd_ratio_min']:6.3f} "
                  f"{row['sd_ratio_max']:6.3f} {row['w1']:6.3f} {row['ksd']:7.4f} {row['grad_evals']:8d} "
                  f"{row['seconds']:7.1f} {_fmt(row['evals_to_tolerance'], '8d'):>8} "
                  f"{_fmt(row['seconds_to_tolerance'], '7.1f'):>7} {row['stop_reason']}{'' if ok else '  (tolerance missed)'}",
                  flush=True)
        print(f"{'':<38} ratio  svgd / nuts to tolerance: score evaluations {svgd_over_nuts(rows, 'evals_to_tolerance')}, "
              f"seconds {svgd_over_nuts(rows, 'seconds_to_tolerance')}", flush=True)
        print(f"{'':<38} exact  200 reference draws meet the tolerance in {exact_tolerance_share(pdb, name):.0%} of "
              f"{EXACT_SUBSETS} random subsets", flush=True)
        if opts.seeds:
            print(f"{'':<38} seeds  svgd meets the tolerance at {seeds_within_tolerance(pdb, name, opts.seeds)} of "
                  f"seeds 0..{opts.seeds - 1}", flush=True)
    print(f"tolerance met: svgd {passed['svgd']}/{len(names)}, mala {passed['mala']}/{len(names)}, "
          f"nuts {passed['nuts']}/{len(names)}")
    good = (passed["svgd"] == len(names) and passed["nuts"] == len(names)
            and passed["mala"] >= min(MALA_NEEDED, len(names)))
    return 0 if good else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))

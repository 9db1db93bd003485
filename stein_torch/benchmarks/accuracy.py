"""Accuracy suite: default SVGD, MALA and NUTS on the eight posteriordb reference posteriors.

    stein-torch bench accuracy [--names NAME ...] [--posteriors DIR] [--seed 0] [--seeds K] [--quick]
                               [--threads N] [--budget B]

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
- ``seeds`` (with ``--seeds K``): SVGD at seeds 0..K-1, how many meet the tolerance and how many
  carry a warning; then one row per seed: the step and score evaluations (set-up apart) at which the
  stop rule ended the run, whether it met the tolerance there, its warnings, and the evaluations after
  which the tolerance first held and kept holding (the same run continued to ``--horizon`` steps
  without the rule), with their ratio.

``--quick`` runs SVGD only, with 50 particles and at most 60 steps, on two posteriors: a check that the
suite runs (its figures mean nothing, and it always exits 0 when it ran).

The torch models are in :mod:`stein_torch.benchmarks.reference_models`; the data and reference draws
are read by :mod:`stein_torch.benchmarks.reference_data` from ``--posteriors DIR``, else
``$STEIN_TORCH_POSTERIORS``, else the repository's ``shared/posteriordb`` beside the package (a source
checkout or editable install), else ``shared/posteriordb`` in the current folder. Every file is checked
against the SHA-256 sums recorded at vendoring; a missing or damaged file ends the suite with a message
naming it (exit status 2).
"""

from __future__ import annotations

import argparse
import sys

import stein_torch as st
from stein_torch.race import TOLERANCE

from . import reference_data, reference_models

__all__ = ["main", "build_parser"]

MALA_NEEDED = 6
QUICK_NAMES = ["kidiq-kidscore_momhsiq", "eight_schools-eight_schools_noncentered"]


class _Posteriors:
    """The reference posteriors of one folder: models, reference draws and moments."""

    NAMES = reference_data.NAMES

    def __init__(self, folder):
        self.folder = reference_data.verify(folder)

    def model(self, name):
        return reference_models.model(name, self.folder)

    def load_reference(self, name):
        return reference_data.load_reference(name, self.folder)

    def compare_moments(self, draws, name):
        return reference_data.compare_moments(draws, name, self.folder)


def load_models(posteriors: str | None) -> _Posteriors:
    """The reference posteriors (see the module docstring for where they are looked for)."""
    try:
        return _Posteriors(posteriors)
    except reference_data.ReferenceDataError as err:
        print(f"stein-torch bench accuracy: {err}", file=sys.stderr)
        raise SystemExit(2) from None


def target_of(model) -> st.Target:
    return st.Target(model.log_joint, latents={k: st.Latent(tuple(s), c) for k, (s, c) in model.params.items()})


def run_one(pdb, name: str, seed: int, quick: bool = False, budget: int | None = None) -> list[dict]:
    model = pdb.model(name)
    methods = {"svgd": {"method": "svgd", "particles": 200},
               "mala": {"method": "mala", "chains": 4, "draws": 1000, "warmup": 1000},
               "nuts": {"method": "nuts"}}
    if quick:
        methods = {"svgd": {"method": "svgd", "particles": 50, "steps": 60}}
    return st.race(target_of(model), pdb.load_reference(name), methods=methods, derived=model.derived, seed=seed,
                   checkpoints=5 if quick else 20, budget=budget)


def svgd_over_nuts(rows: list[dict], key: str) -> str:
    """SVGD's score evaluations (or seconds) to tolerance over NUTS's, or why there is no ratio."""
    found = {r["method"]: r[key] for r in rows}
    if found.get("svgd") is None or found.get("nuts") is None:
        return "-"
    return f"{found['svgd'] / found['nuts']:.3g}"


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


def stop_row(pdb, name: str, seed: int, horizon: int = 400) -> dict:
    """A default SVGD run at ``seed``: where the stop rule ended it and what it had then, and (the same
    run continued to ``horizon`` steps without the rule) the score evaluations after which the
    tolerance first held and kept holding."""
    import warnings

    model = pdb.model(name)
    sampler = st.Sampler(target_of(model), 200, seed=seed)

    def met():
        values, _ = sampler.target.constrain(sampler.affine.to_z(sampler.u).reshape(-1, sampler.target.dim))
        return _within_tolerance(pdb.compare_moments(model.derived({k: v.numpy() for k, v in values.items()}), name))

    path, row = [(sampler.grad_evals, met())], None
    while sampler.step_count < horizon:
        before = sampler.step_count
        sampler.step()
        if row is None and sampler.stop_reason != sampler.finished_reason:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                result = sampler.result()
            row = {"step": sampler.step_count, "evals": sampler.grad_evals, "met": met(), "warnings": result.warnings}
            sampler.stop_rule, sampler.stop_reason = None, sampler.finished_reason
        if sampler.step_count != before:
            path.append((sampler.grad_evals, met()))
    if row is None:
        row = {"step": sampler.step_count, "evals": sampler.grad_evals, "met": path[-1][1],
               "warnings": sampler.result().warnings}
    first = None
    for evals, ok in reversed(path):
        if not ok:
            break
        first = evals
    row.update(setup=sampler.record.setup["setup_evals"], to_tolerance=first)
    return row


def _fmt(value, spec):
    return "-" if value is None else format(value, spec)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="stein-torch bench accuracy", description=__doc__.splitlines()[0])
    parser.add_argument("--names", nargs="*", default=None, metavar="NAME",
                        help="posteriors to run (default: all eight)")
    parser.add_argument("--posteriors", default=None, metavar="DIR",
                        help="folder of the reference posteriors (default: $STEIN_TORCH_POSTERIORS, else shared/posteriordb)")
    parser.add_argument("--seed", type=int, default=0, help="seed of every run (default 0)")
    parser.add_argument("--seeds", type=int, default=0, metavar="K",
                        help="also run default SVGD at seeds 0..K-1: tolerance, warnings, stop against tolerance")
    parser.add_argument("--horizon", type=int, default=400,
                        help="steps the --seeds runs continue without the stop rule to see the tolerance hold")
    parser.add_argument("--quick", action="store_true",
                        help="SVGD only, 50 particles, 60 steps, two posteriors (a check that it runs)")
    parser.add_argument("--budget", type=int, default=None, metavar="B",
                        help="score evaluations per method (default: each method's own defaults)")
    parser.add_argument("--threads", type=int, default=None,
                        help="torch intra-op threads (1 is fastest on a machine shared with other jobs)")
    return parser


def main(args: list[str] | None = None) -> int:
    parser = build_parser()
    opts = parser.parse_args(args)
    if opts.threads is not None:
        if opts.threads < 1:
            parser.error(f"--threads must be >= 1, got {opts.threads}")
        import torch

        torch.set_num_threads(opts.threads)
    if opts.budget is not None and opts.budget < 1:
        parser.error(f"--budget must be >= 1, got {opts.budget}")
    pdb = load_models(opts.posteriors)
    names = opts.names or (QUICK_NAMES if opts.quick else pdb.NAMES)
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
        rows = run_one(pdb, name, opts.seed, opts.quick, opts.budget)
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
            rows = [stop_row(pdb, name, seed, opts.horizon) for seed in range(opts.seeds)]
            print(f"{'':<38} seeds  svgd meets the tolerance at {sum(r['met'] for r in rows)} of seeds "
                  f"0..{opts.seeds - 1}; warnings on {sum(bool(r['warnings']) for r in rows)} runs", flush=True)
            for seed, r in enumerate(rows):
                ratio = "-" if r["to_tolerance"] is None else f"{r['evals'] / r['to_tolerance']:.2f}x"
                print(f"{'':<38}   seed {seed}: stop step {r['step']}, {r['evals']} evals (+{r['setup']} set-up), "
                      f"{'met' if r['met'] else 'MISSED'}; tolerance held from {_fmt(r['to_tolerance'], 'd')} evals "
                      f"({ratio}); warnings: {'; '.join(w[:80] for w in r['warnings']) or 'none'}", flush=True)
    if opts.quick:
        print(f"tolerance met: svgd {passed['svgd']}/{len(names)} (quick run: 50 particles, 60 steps; not a measurement)")
        return 0
    print(f"tolerance met: svgd {passed['svgd']}/{len(names)}, mala {passed['mala']}/{len(names)}, "
          f"nuts {passed['nuts']}/{len(names)}")
    good = (passed["svgd"] == len(names) and passed["nuts"] == len(names)
            and passed["mala"] >= min(MALA_NEEDED, len(names)))
    return 0 if good else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))

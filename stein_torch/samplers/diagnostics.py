"""Warnings of an SVGD run: why its result may be wrong, and what to do about it.

Each check reads what the run recorded (history, moment records, the mode search) and, for the
importance-sampling checks, evaluates the log density at a few hundred more points. Thresholds were
set on the reference posteriors and the closed-form checks of the test suite, where runs that meet
the accuracy tolerance carry no warning (docs/convergence.md lists them with what to do).

- ``cap``: the step cap was reached before the stop rule saw the particles settle (with how much the
  KSD fell and the spread changed over the last part of the run).
- ``tail``: the particle set fails a Pareto-smoothed importance-sampling check
  (:mod:`stein_torch.samplers.importance`): a proposal fitted to the particles, weighted by the
  target, puts some latent's sd (constrained scale) more than 16% off the particles' (|log ratio| >
  0.15), or cannot say (Pareto k > 0.7).
- ``modes``: several modes of similar height, and the particles' shares differ from an
  importance-sampling estimate of the modes' masses by more than 0.1.
- ``runaway``: some mode searches ran away (a density growing without bound, e.g. a funnel's neck).
- ``no_mode``: no mode found at all (whitening by the particles' covariance instead).
- ``wall``: particles kept running into a region where the density is not finite (their steps
  shrunk or undone in at least 80% of the last steps: half the run, at least 10 and at most 100).
- ``ensembles``: independent ensembles disagree (R-hat across ensembles above 1.05, or their KSDs
  more than a factor 2 apart).
- ``loop``: the log density is called once per particle in a Python loop (slow).
"""

from __future__ import annotations

import math

import numpy as np
import torch

from .faults import wall_message
from .importance import mode_shares, spread_check
from .monitor import moments

__all__ = ["run_warnings", "THRESHOLDS"]

THRESHOLDS = {
    "drift_min_steps": 100,  # runs shorter than this report no drift in the cap warning
    "tail_log_sd": 0.15,  # |log(importance-sampling sd / particle sd)| on the constrained scale
    "pareto_k": 0.7,  # Pareto k above which importance sampling cannot confirm the spread
    "mode_share": 0.1,  # particle share vs importance-sampling share of a mode
    "wall_share": 0.8,  # share of the last steps (half the run, 10 to 100) in which some particle's step was faulty
    "rhat": 1.05,  # across-ensemble R-hat
    "ksd_spread": 2.0,  # largest / smallest final KSD over ensembles
}
WALL_WINDOW = 100
WALL_LAST = 10


def run_warnings(sampler, z: torch.Tensor) -> list[str]:
    """Warnings of a finished (or interrupted) run; ``z`` are its particles (B, N, d), unconstrained."""
    found = []
    history = sampler.history
    steps = sampler.step_count
    if sampler.stop_rule is not None and sampler.stop_reason == "steps" and steps > 0:
        found.append(_cap_message(sampler))
    info = sampler.record.setup
    if info.get("runaways", 0) > 0:
        found.append(
            f"{info['runaways']} of {info['starts']} mode searches ran away: the log density keeps growing "
            "along some direction (a funnel-like neck, e.g. a hierarchical scale going to 0 with its group "
            "effects). Particles in such a neck come out too narrow; reparametrise (non-centred form) or "
            "check with NUTS: st.crosscheck(run, target)."
        )
    if info.get("modes", 1) == 0:
        found.append(
            "the mode search found no proper mode (every search ran away or failed), so the run started "
            "from standard normal draws with covariance whitening; check the model for an unbounded or "
            "undefined density."
        )
    last = min(WALL_WINDOW, max(WALL_LAST, steps // 2))
    faults = np.asarray(history.get("faults", []))[-last:]
    if len(faults) >= WALL_LAST and np.mean(faults > 0) >= THRESHOLDS["wall_share"]:
        reverted = int(np.asarray(history["reverted"])[-last:].sum())  # over the same steps as the faults
        found.append(wall_message(steps, int((faults > 0).sum()), len(faults), int(faults.sum()), reverted,
                                  sampler.ensembles * sampler.n, sampler.last_fault_error))
    if sampler.ensembles >= 2:
        message = _ensembles_message(z, sampler.ksd().cpu().numpy())
        if message:
            found.append(message)
    if sampler.target.evaluation_mode == "loop":
        found.append(sampler.target.evaluation_warning or (
            "the log density is written for one value and torch.func.vmap could not vectorise it, so it "
            "was called once per particle in a Python loop (slow). Write it for a batch of values "
            "(leading dimensions) to make the run fast."
        ))
    if steps > 0 or sampler.stop_reason != "steps":
        found += _importance_messages(sampler, z)
    return found


def _cap_message(sampler) -> str:
    ksd = np.asarray(sampler.history.get("ksd", []), dtype=float)
    rows = ksd[np.isfinite(ksd).all(-1)] if ksd.ndim == 2 and len(ksd) else np.zeros((0, 1))
    trend = ""
    if len(rows) >= 4:
        quarter = max(1, len(rows) // 4)
        before, after = rows[-2 * quarter:-quarter].max(-1).min(), rows[-quarter:].max(-1).min()
        if after < 0.99 * before:
            trend = f" while the KSD was still falling ({100 * (1 - after / before):.0f}% over the last quarter)"
    drift = second_half_drift(sampler)
    if drift is not None and abs(drift[0]) >= 0.01:
        trend += (f"{',' if trend else ''} and the sd of coordinate {drift[2]} changed by "
                  f"{100 * math.expm1(drift[0]):+.0f}% since step {drift[1]}")
    return (
        f"the run reached the step cap ({sampler.step_count} steps){trend} before the particles settled "
        "(the stop rule did not fire): the draws may still be moving. Run more steps (steps=), and if the "
        "run still does not settle, the posterior's shape (curved, funnel-like or heavy-tailed) is hard "
        "for SVGD: reparametrise or compare with NUTS: st.crosscheck(run, target)."
    )


def second_half_drift(sampler) -> tuple[float, int, int] | None:
    """Largest change of a log sd between the moment records at about half the run and at its end:
    (signed change, step of the first record, coordinate), or None for short runs."""
    trace = sampler.record.moments
    steps = sampler.step_count
    if steps < THRESHOLDS["drift_min_steps"] or len(trace) < 2:
        return None
    half = [t for t in trace if t[0] <= steps // 2]
    if not half:
        return None
    start = half[-1]
    end_log_sd = trace[-1][2] if trace[-1][0] == steps else None
    if end_log_sd is None:  # the end of the run is after the last record
        end_log_sd = moments(sampler.affine.to_z(sampler.u))[1]
    change = end_log_sd - start[2]
    flat = int(change.abs().reshape(-1).argmax())
    return float(change.reshape(-1)[flat]), int(start[0]), flat % change.shape[-1]


def _ensembles_message(z: torch.Tensor, ksd: np.ndarray) -> str | None:
    b, n, d = z.shape
    means, variances = z.mean(1), z.var(1)
    within = variances.mean(0).clamp_min(1e-300)
    between = n * means.var(0)
    rhat = torch.sqrt(((n - 1) / n * within + between / n) / within)
    worst = float(rhat.max())
    if worst > THRESHOLDS["rhat"]:
        return (
            f"the {b} ensembles disagree: R-hat across ensembles reaches {worst:.3f} (coordinate "
            f"{int(rhat.argmax())}; above {THRESHOLDS['rhat']}). They found different answers (modes, or a "
            "spread that has not settled): run longer, or look at each ensemble's draws."
        )
    spread = float(np.max(ksd) / max(np.min(ksd), 1e-300))
    if spread > THRESHOLDS["ksd_spread"]:
        return (
            f"the {b} ensembles disagree: their final KSDs differ by a factor {spread:.1f} (above "
            f"{THRESHOLDS['ksd_spread']}), so some ensemble is further from the target than the others: run "
            "longer, or look at each ensemble's draws (history['ksd'])."
        )
    return None


def _importance_messages(sampler, z: torch.Tensor) -> list[str]:
    found = []
    generator = torch.Generator().manual_seed((sampler.seed + 3) % 2**63)
    if len(sampler.record.modes) >= 2:
        shares = mode_shares(sampler.target, z, sampler.record.modes, generator)
        if shares is not None:
            particle, sampled = shares
            gap = float(np.max(np.abs(particle - sampled)))
            if gap > THRESHOLDS["mode_share"]:
                found.append(
                    f"several modes of similar height: the particles' shares of the {len(particle)} modes found "
                    f"({', '.join(f'{p:.2f}' for p in particle)}) differ from an importance-sampling estimate "
                    f"({', '.join(f'{s:.2f}' for s in sampled)}). Mode weights follow the start, not the "
                    "target: use the importance-sampling shares, more particles, or annealing (anneal=)."
                )
    check = spread_check(sampler.target, z, generator)
    if check is not None:
        k_hat, worst, coordinate = check
        if k_hat > THRESHOLDS["pareto_k"]:
            why = "the weights degenerate" if math.isinf(k_hat) else f"Pareto k = {k_hat:.2f} > {THRESHOLDS['pareto_k']}"
            found.append(
                f"an importance-sampling check of the particles failed ({why}): the target has mass the particles "
                "do not cover (a long tail, a "
                "missed mode, or a funnel). The spread may be too small; compare with NUTS: st.crosscheck(run, target)."
            )
        elif abs(worst) > THRESHOLDS["tail_log_sd"]:
            found.append(
                f"an importance-sampling check of the particles puts the sd of coordinate {coordinate} "
                f"{100 * math.expm1(worst):+.0f}% off the particles' (Pareto k = {k_hat:.2f}): the particles "
                "probably miss part of a tail. Run longer, reparametrise (e.g. log scale for a long right "
                "tail) or compare with NUTS: st.crosscheck(run, target)."
            )
    return found

"""``st.crosscheck``: an SVGD result against a NUTS run on the same target, parameter by parameter.

For every scalar parameter (``"theta[3]"``: element 3 of ``theta``, 0-based as ArviZ's coordinates)
on the constrained scale, with SVGD's particles pooled over ensembles (N of them) and NUTS's draws
pooled over chains:

- ``mean_diff = (SVGD mean - NUTS mean) / NUTS sd``, and its Monte Carlo standard error ``mcse``
  (same units): ``sqrt(sd_svgd^2 / N + mcse_nuts^2) / sd_nuts``. SVGD's part treats the particles as
  N independent draws; its particles are spread more evenly than random draws, so this overstates
  SVGD's own random error and the check errs towards agreeing. NUTS's part is
  :func:`arviz.mcse` (effective sample size of the chains).
- ``sd_ratio = sd_svgd / sd_nuts`` with ``sd_ratio_mcse``: delta method, relative error of a sample
  sd ``sqrt((kurtosis - 1) / (4 N))`` for SVGD (common practice) and ``arviz.mcse(method="sd")`` for NUTS.
- ``agree``: both differences within ``z`` of their standard errors, ``z`` the two-sided normal
  quantile at a family-wise level of 1% over the 2k tests (Bonferroni, common practice), so a correct
  run of a 50-parameter model is flagged somewhere with probability below 1%.

NUTS's own health (R-hat, bulk ESS, divergences, E-BFMI, its warnings) comes with the table: when
NUTS reports trouble, its rows are no evidence against SVGD.
"""

from __future__ import annotations

import math
import statistics
import warnings
import numpy as np

from .checks import check_int, check_type
from .model import Target
from .result import Result
from .samplers.mcmc_health import chain_health, scalar_columns
from .samplers.nuts import DEFAULT_CHAINS, DEFAULT_DRAWS, nuts

__all__ = ["crosscheck", "Crosscheck", "FAMILY_LEVEL", "default_draws"]

FAMILY_LEVEL = 0.01   # chance that a correct run is flagged on any parameter (Bonferroni bound)
DRAWS_PER_PARTICLE = 4  # NUTS draws per SVGD particle: NUTS's Monte Carlo error small next to SVGD's


class Crosscheck(list):
    """One dict per scalar parameter (a list, so ``pandas.DataFrame(table)`` works), printable.

    Keys of each row: ``parameter``, ``svgd_mean``, ``nuts_mean``, ``nuts_sd``, ``mean_diff``,
    ``mcse``, ``sd_ratio``, ``sd_ratio_mcse``, ``agree``, ``rhat``, ``ess`` (the last two of NUTS).

    Attributes
    ----------
    health : dict
        NUTS's ``rhat_max``, ``ess_min``, ``divergences``, ``draws``, ``bfmi_min``, ``warnings`` and
        ``ok`` (no warning: the reference can be trusted as far as its diagnostics tell).
    reference : Result
        The NUTS run.
    z : float
        Standard errors beyond which a difference is flagged.
    """

    def __init__(self, rows, health: dict, reference: Result, z: float):
        super().__init__(rows)
        self.health, self.reference, self.z = health, reference, z

    @property
    def flagged(self) -> list[str]:
        """Parameters where SVGD and NUTS differ beyond Monte Carlo error."""
        return [row["parameter"] for row in self if not row["agree"]]

    def to_dataframe(self):
        """The rows as a :class:`pandas.DataFrame` (pandas comes with ArviZ)."""
        import pandas as pd

        return pd.DataFrame(list(self))

    def __str__(self) -> str:
        h = self.health
        lines = [f"SVGD against NUTS ({h['draws']} draws; R-hat max {h['rhat_max']:.3f}, bulk ESS min "
                 f"{h['ess_min']:.0f}, {h['divergences']} divergences, E-BFMI min {h['bfmi_min']:.2f}); "
                 f"flagged beyond {self.z:.2f} standard errors",
                 f"{'parameter':<20} {'mean_diff':>9} {'mcse':>6} {'sd_ratio':>8} {'mcse':>6} {'agree':>5} "
                 f"{'rhat':>6} {'ess':>6}"]
        for r in self:
            lines.append(f"{r['parameter'][:20]:<20} {r['mean_diff']:9.3f} {r['mcse']:6.3f} {r['sd_ratio']:8.3f} "
                         f"{r['sd_ratio_mcse']:6.3f} {'yes' if r['agree'] else 'NO':>5} {r['rhat']:6.3f} {r['ess']:6.0f}")
        if not h["ok"]:
            lines.append("NUTS itself reports trouble, so its rows are no evidence against SVGD:")
            lines.extend(f"  - {w}" for w in h["warnings"])
        elif self.flagged:
            lines.append(f"differ beyond Monte Carlo error: {', '.join(self.flagged)}")
        else:
            lines.append("no parameter differs beyond Monte Carlo error")
        return "\n".join(lines)

    __repr__ = __str__


def default_draws(particles: int, chains: int = DEFAULT_CHAINS) -> int:
    """NUTS draws per chain for a result of ``particles`` points: the default 1000, more when
    ``DRAWS_PER_PARTICLE`` x particles need it, so NUTS's Monte Carlo error stays small next to SVGD's."""
    return max(DEFAULT_DRAWS, math.ceil(DRAWS_PER_PARTICLE * particles / chains))


def crosscheck(result: Result, target: Target, *, chains: int = DEFAULT_CHAINS, draws: int | None = None,
               warmup: int | None = None, metric: str | None = None, seed: int = 0, progress: bool | None = None,
               reference: Result | None = None) -> Crosscheck:
    """Run NUTS on ``target`` and compare ``result`` with it, parameter by parameter.

    Parameters
    ----------
    result : Result
        A finished run (SVGD's, or any sampler's) on ``target``.
    target : Target
        The model ``result`` was drawn from (names, shapes and supports must match).
    chains : int, default=4
    draws : int, optional
        NUTS draws per chain; default ``max(1000, 4 x particles / chains)`` (:func:`default_draws`).
    warmup : int, optional
        NUTS warm-up; default that of :func:`stein_torch.nuts` (500).
    metric : {"diag", "dense"}, optional
        Default that of :func:`stein_torch.nuts`: dense up to 200 coordinates, diagonal above.
    seed : int, default=0
    progress : bool, optional
    reference : Result, optional
        A finished NUTS run on ``target`` to compare with instead of running one.

    Returns
    -------
    Crosscheck
        A list of dicts, one per scalar parameter (see :class:`Crosscheck`), with ``health``,
        ``flagged`` and ``reference``; ``print(table)`` shows it. Disagreements and trouble reported by
        NUTS are also issued as RuntimeWarning.

    Notes
    -----
    Agreement within Monte Carlo error is not proof of correctness: both methods can miss a mode,
    and the test's power grows with the number of particles. Validate before a decision rests on it.
    """
    check_type(result, "crosscheck: result", Result, "stein_torch Result")
    check_type(target, "crosscheck: target", Target, "stein_torch.Target")
    _same_model(result, target, "result")
    particles = int(np.prod(result.particles.shape[:2]))
    if particles < 4:
        raise ValueError(f"crosscheck: result has {particles} draws; at least 4 are needed for a spread")
    if reference is None:
        check_int(chains, "crosscheck: chains")
        draws = default_draws(particles, chains) if draws is None else check_int(draws, "crosscheck: draws")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)   # NUTS's warnings go into the health report
            reference = nuts(target, chains, draws, **({} if warmup is None else {"warmup": warmup}), seed=seed,
                             metric=metric, progress=progress)
    else:
        check_type(reference, "crosscheck: reference", Result, "stein_torch Result")
        _same_model(reference, target, "reference")
    table = _compare(result, reference)
    if not table.health["ok"]:
        warnings.warn("crosscheck: NUTS itself reports trouble, so the comparison is no evidence against SVGD: "
                      + "; ".join(table.health["warnings"]), RuntimeWarning, stacklevel=2)
    elif table.flagged:
        warnings.warn(f"crosscheck: SVGD and NUTS differ beyond Monte Carlo error on {', '.join(table.flagged)}",
                      RuntimeWarning, stacklevel=2)
    return table


def _same_model(result: Result, target: Target, name: str) -> None:
    if result.target.signature() != target.signature():
        raise ValueError(f"crosscheck: target {target!r} is not the model {name} was drawn from "
                         f"({result.target!r}); pass the same target (latent names, shapes and supports)")


def _compare(result: Result, reference: Result) -> Crosscheck:
    import arviz as az

    names, svgd = scalar_columns(result.draws)
    _, mcmc = scalar_columns(reference.draws)
    k = len(names)
    s = svgd.reshape(-1, k)
    n = s.shape[0]
    x = mcmc.reshape(-1, k)
    stats = reference.sample_stats if "diverging" in reference.sample_stats else None
    health = chain_health(mcmc, stats)
    dataset = az.convert_to_dataset({"v": mcmc})
    mcse_mean = np.asarray(az.mcse(dataset, method="mean")["v"].values, dtype=np.float64).reshape(k)
    mcse_sd = np.asarray(az.mcse(dataset, method="sd")["v"].values, dtype=np.float64).reshape(k)
    x_mean, x_sd = x.mean(0), x.std(0, ddof=1)
    s_mean, s_sd = s.mean(0), s.std(0, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_diff = (s_mean - x_mean) / x_sd
        mcse = np.sqrt(s_sd ** 2 / n + mcse_mean ** 2) / x_sd
        centred = s - s_mean
        kurtosis = np.nan_to_num((centred ** 4).mean(0) / (centred ** 2).mean(0) ** 2, nan=3.0)
        sd_ratio = s_sd / x_sd
        rel = np.sqrt(np.maximum(kurtosis - 1.0, 0.0) / (4 * n) + (mcse_sd / x_sd) ** 2)
        ratio_mcse = sd_ratio * rel
    z = statistics.NormalDist().inv_cdf(1.0 - FAMILY_LEVEL / (2 * 2 * k))
    agree = (np.abs(mean_diff) <= z * mcse) & (np.abs(sd_ratio - 1.0) <= z * ratio_mcse)
    rows = [{"parameter": names[j], "svgd_mean": float(s_mean[j]), "nuts_mean": float(x_mean[j]),
             "nuts_sd": float(x_sd[j]), "mean_diff": float(mean_diff[j]), "mcse": float(mcse[j]),
             "sd_ratio": float(sd_ratio[j]), "sd_ratio_mcse": float(ratio_mcse[j]), "agree": bool(agree[j]),
             "rhat": float(health["rhat"][j]), "ess": float(health["ess"][j])} for j in range(k)]
    summary = {"rhat_max": float(np.nanmax(health["rhat"])) if np.isfinite(health["rhat"]).any() else math.nan,
               "ess_min": float(np.nanmin(health["ess"])) if np.isfinite(health["ess"]).any() else math.nan,
               "divergences": health["divergences"], "draws": health["draws"],
               "bfmi_min": float(np.nanmin(health["bfmi"])) if np.isfinite(health["bfmi"]).any() else math.nan,
               "warnings": list(reference.warnings)}
    summary["ok"] = not summary["warnings"]
    return Crosscheck(rows, summary, reference, z)

"""Health of MCMC draws: divergences, trajectories cut at the maximum depth, E-BFMI, R-hat and ESS.

The figures and the thresholds that turn them into warnings:

- divergences after warm-up above 1% of the draws (each divergent transition is still counted in
  ``sample_stats["diverging"]``);
- trajectories cut at ``depth_limit`` (the sampler hit its limit: mixing may be poor);
- E-BFMI below 0.3 in a chain ("Diagnosing Suboptimal Cotangent Disintegrations in Hamiltonian Monte
  Carlo", arXiv:1604.00695; the threshold is common practice, from memory);
- rank-normalised split R-hat above 1.01 or bulk ESS below 100 per chain for a scalar parameter
  ("Rank-normalization, folding, and localization: An improved R-hat for assessing convergence of
  MCMC", arXiv:1903.08008, from memory), computed by :func:`arviz.rhat` and :func:`arviz.ess`.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

__all__ = ["scalar_columns", "chain_health", "mcmc_warnings", "DIVERGENCE_SHARE", "BFMI_MIN", "RHAT_MAX",
           "ESS_PER_CHAIN"]

DIVERGENCE_SHARE = 0.01   # warn when more than this share of the draws diverged
BFMI_MIN = 0.3            # E-BFMI below this: momentum resampling explores the energy poorly (from memory)
RHAT_MAX = 1.01           # rank-normalised split R-hat (arXiv:1903.08008, from memory)
ESS_PER_CHAIN = 100       # bulk ESS per chain (same source)
NAMED = 5                 # parameters named in one warning


def scalar_columns(draws: Mapping[str, object]) -> tuple[list[str], np.ndarray]:
    """Every scalar element of every parameter as one column.

    Parameters
    ----------
    draws : mapping of str to array of shape (C, n, *shape)

    Returns
    -------
    names : list of str
        ``"mu"`` for a scalar, ``"theta[3]"`` for element 3 of a vector, ``"w[1,2]"`` of a matrix
        (0-based, as ArviZ's coordinates).
    values : ndarray of shape (C, n, k), float64
    """
    names, columns = [], []
    for name, value in draws.items():
        array = np.asarray(value.detach().cpu() if hasattr(value, "detach") else value, dtype=np.float64)
        shape = array.shape[2:]
        flat = array.reshape(*array.shape[:2], int(np.prod(shape, dtype=np.int64)))
        if not shape:
            names.append(name)
        else:
            names.extend(f"{name}[{','.join(map(str, index))}]" for index in np.ndindex(*shape))
        columns.append(flat)
    return names, np.concatenate(columns, axis=2)


def chain_health(values: np.ndarray, stats: Mapping[str, np.ndarray] | None = None) -> dict:
    """Per-parameter R-hat and bulk ESS, and the sampler's divergences and E-BFMI.

    Parameters
    ----------
    values : ndarray of shape (C, n, k)
    stats : mapping with ``diverging`` and ``energy`` of shape (C, n), optional

    Returns
    -------
    dict
        ``rhat`` and ``ess`` (k,) (NaN with fewer than 4 draws per chain), ``divergences`` (int),
        ``bfmi`` (C,) (NaN per chain with fewer than 2 draws), ``draws`` (C * n).
    """
    import arviz as az

    chains, n, k = values.shape
    rhat, ess = np.full(k, np.nan), np.full(k, np.nan)
    if n >= 4:
        dataset = az.convert_to_dataset({"v": values})
        rhat = np.asarray(az.rhat(dataset)["v"].values, dtype=np.float64).reshape(k)
        ess = np.asarray(az.ess(dataset)["v"].values, dtype=np.float64).reshape(k)
    health = {"rhat": rhat, "ess": ess, "draws": chains * n, "divergences": 0, "bfmi": np.full(chains, np.nan)}
    if stats is not None:
        health["divergences"] = int(np.asarray(stats["diverging"]).sum())
        energy = np.asarray(stats["energy"], dtype=np.float64)
        if n >= 2:
            health["bfmi"] = np.asarray(az.bfmi(energy), dtype=np.float64).reshape(chains)
    return health


def _listed(names: list[str], values: np.ndarray, fmt: str) -> str:
    order = np.argsort(values) if fmt == "ess" else np.argsort(-values)
    shown = [f"{names[i]} ({values[i]:.3f})" if fmt == "rhat" else f"{names[i]} ({values[i]:.0f})" for i in order[:NAMED]]
    more = f" and {len(names) - NAMED} more" if len(names) > NAMED else ""
    return ", ".join(shown) + more


def mcmc_warnings(draws: Mapping[str, object], stats: Mapping[str, np.ndarray], depth_limit: int) -> list[str]:
    """Why these draws may be wrong; empty when nothing was seen.

    Parameters
    ----------
    draws : mapping of str to array of shape (C, n, *shape)
        Draws after warm-up, by parameter.
    stats : mapping of str to ndarray of shape (C, n)
        ``diverging``, ``tree_depth``, ``energy``.
    depth_limit : int

    Returns
    -------
    list of str
    """
    names, values = scalar_columns(draws)
    chains, n, _ = values.shape
    if n == 0:
        return ["no draws after warm-up: the run ended (or was interrupted) during warm-up"]
    found = []
    health = chain_health(values, stats)
    total, divergences = health["draws"], health["divergences"]
    if divergences > DIVERGENCE_SHARE * total:
        found.append(
            f"{divergences} of {total} draws after warm-up ({divergences / total:.1%}) ended in a divergent "
            "transition: regions of high curvature were not explored and the draws may be biased; reparameterise "
            "the model (e.g. a non-centred form of a hierarchical prior), or raise acceptance_goal")
    cut = int((np.asarray(stats["tree_depth"]) >= depth_limit).sum())
    if cut:
        found.append(
            f"{cut} of {total} trajectories were cut at depth_limit={depth_limit}: the sampler hit its limit and "
            "may mix poorly; reparameterise the model or raise depth_limit")
    low = np.flatnonzero(health["bfmi"] < BFMI_MIN)
    if low.size:
        shown = ", ".join(f"chain {c} ({health['bfmi'][c]:.2f})" for c in low)
        found.append(
            f"E-BFMI below {BFMI_MIN} in {shown}: the momentum resampling explores the energy poorly, often a "
            "sign of heavy tails or a funnel; reparameterise the model")
    high = np.flatnonzero(health["rhat"] > RHAT_MAX)
    if high.size:
        found.append(
            f"R-hat above {RHAT_MAX} for {_listed([names[i] for i in high], health['rhat'][high], 'rhat')}: the "
            "chains disagree; run longer, check for several modes or reparameterise")
    small = np.flatnonzero(health["ess"] < ESS_PER_CHAIN * chains)
    if small.size:
        found.append(
            f"bulk ESS below {ESS_PER_CHAIN} per chain ({ESS_PER_CHAIN * chains} over {chains} chains) for "
            f"{_listed([names[i] for i in small], health['ess'][small], 'ess')}: "
            "means and intervals carry a large Monte Carlo error; run longer")
    return found

"""MALA baseline on the eight posteriordb reference posteriors (slow: about a minute per posterior).

Source: posteriordb reference posteriors (posteriordb, BSD-3), reference draws vendored in
shared/posteriordb (10 NUTS chains x 1000 draws). Floor: max over parameters of |mean - ref mean| / ref sd <= 0.1 and every
sd / ref sd in [0.9, 1.1] for `st.langevin(target, chains=4, draws=1000, warmup=1000, seed=0)` on at
least six. The default SVGD run is checked on all eight in tests/test_reference_posteriors.py.
"""

from __future__ import annotations

import pytest

import stein_torch as st

try:
    import posteriordb as pdb
except ImportError:  # tests/ collected as a package
    from tests import posteriordb as pdb

pytestmark = pytest.mark.slow

MEAN_ERROR, SD_LOW, SD_HIGH = 0.1, 0.9, 1.1


@pytest.fixture(autouse=True)
def _posteriors_present():
    pdb.require_posteriors()


def target_of(model):
    return st.Target(model.log_joint, latents={k: st.Latent(tuple(s), c) for k, (s, c) in model.params.items()})


def floor_figures(result, model):
    """Pool chains, map to the reference names, compare with the reference moments."""
    draws = {k: v.reshape(-1, *v.shape[2:]).cpu().numpy() for k, v in result.draws.items()}
    figures = pdb.compare_moments(model.derived(draws), model.name)
    return (max(f["mean_error"] for f in figures.values()), min(f["sd_ratio_min"] for f in figures.values()),
            max(f["sd_ratio_max"] for f in figures.values()))


def meets_floor(mean_error, sd_low, sd_high):
    return mean_error <= MEAN_ERROR and sd_low >= SD_LOW and sd_high <= SD_HIGH


def test_mala_meets_the_floor_on_at_least_six():
    results = {}
    for name in pdb.NAMES:
        model = pdb.model(name)
        run = st.langevin(target_of(model), chains=4, draws=1000, warmup=1000, seed=0)
        results[name] = floor_figures(run, model)
    passed = [name for name, figures in results.items() if meets_floor(*figures)]
    assert len(passed) >= 6, results

"""Default NUTS against the eight posteriordb reference posteriors, through the named interface (slow).

Source: posteriordb reference posteriors (posteriordb, BSD-3), read from ../shared/posteriors/ (or
$STEIN_TORCH_POSTERIORS). Floor: with ``st.nuts(target, seed=0)`` and otherwise defaults, every
parameter's mean within 0.1 reference sd and sd within 10% of the reference, R-hat < 1.01 (arviz.rhat
per scalar parameter), and no warning from NUTS itself (these posteriors are well behaved: a warning
here would be a false alarm or a real failure, both worth a look).
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pytest

import stein_torch as st

from posteriordb import NAMES, compare_moments, model, require_posteriors

pytestmark = pytest.mark.slow


@pytest.mark.parametrize("name", NAMES)
def test_default_nuts_matches_the_reference(name):
    require_posteriors()
    m = model(name)
    target = st.Target(m.log_joint, latents={k: st.Latent(tuple(s), c) for k, (s, c) in m.params.items()})
    run = st.nuts(target, seed=0, progress=False)
    draws = {k: v.reshape(-1, *v.shape[2:]).numpy() for k, v in run.draws.items()}
    for param, row in compare_moments(m.derived(draws), name).items():
        # posteriordb reference posterior <name> (posteriordb, BSD-3): mean and sd per parameter
        assert row["mean_error"] <= 0.1, f"{name} {param}: mean off by {row['mean_error']:.3f} ref sd"
        assert 0.9 <= row["sd_ratio_min"] and row["sd_ratio_max"] <= 1.1, (
            f"{name} {param}: sd ratio {row['sd_ratio_min']:.3f}..{row['sd_ratio_max']:.3f}")
    rhat = az.rhat(run.to_inference_data())
    worst = max(float(np.max(rhat[k].values)) for k in rhat.data_vars)
    assert worst < 1.01, f"{name}: R-hat {worst:.4f}"
    assert run.warnings == [], run.warnings

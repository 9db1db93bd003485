"""Result -> ArviZ: groups, dims and attrs, NetCDF round trip (arviz.from_netcdf), summaries."""

import arviz as az
import numpy as np
from torch.distributions import constraints

import stein_torch as st
from stein_torch.samplers.svgd import default_kernel


def _run(tmp_path=None):
    def log_joint(p):
        return -0.5 * p["mu"] ** 2 - p["tau"] - 0.5 * ((p["theta"] - p["mu"][..., None]) ** 2).sum(-1)

    target = st.Target(
        log_joint,
        latents={"mu": st.Latent(), "tau": st.Latent(support=constraints.positive), "theta": st.Latent((3,))},
    )
    return st.svgd(target, particles=40, steps=30, ensembles=2, seed=0)


def test_inference_data_layout_and_netcdf_round_trip(tmp_path):
    run = _run()
    idata = run.to_inference_data()
    post = idata.posterior
    assert dict(post.sizes) == {"chain": 2, "draw": 40, "theta_dim_0": 3}
    np.testing.assert_array_equal(post["theta"].values, run.draws["theta"].numpy())
    assert (post["tau"].values > 0).all()
    np.testing.assert_array_equal(idata.sample_stats["lp"].values, run.lp.numpy())
    assert idata.posterior.attrs["inference_library"] == "stein_torch"
    assert idata.posterior.attrs["inference_library_version"] == st.__version__
    assert idata.posterior.attrs["kernel"] == repr(default_kernel())
    path = tmp_path / "run.nc"
    idata.to_netcdf(str(path))
    back = az.from_netcdf(str(path))
    for name in ("mu", "tau", "theta"):
        np.testing.assert_array_equal(back.posterior[name].values, post[name].values)
    assert back.posterior.attrs["steps"] == 30


def test_summary_uses_arviz():
    run = _run()
    table = run.summary()
    assert list(table.index) == ["mu", "tau", "theta[0]", "theta[1]", "theta[2]"]
    np.testing.assert_allclose(table.loc["mu", "mean"], run.draws["mu"].numpy().mean(), atol=1e-3)
    assert "r_hat" in run.summary(kind="all").columns  # across ensembles, on request


def test_trace_has_one_row_per_step():
    run = _run()
    for key in ("lp", "step_size", "phi_rms", "faults", "grad_evals"):
        assert len(run.history[key]) == 30, key
    assert np.all(np.diff(run.history["grad_evals"]) > 0)

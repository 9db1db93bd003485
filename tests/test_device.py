"""CUDA devices: used when present, never required.

The CUDA tests carry the ``cuda`` marker: deselected by default (this project's machines have no GPU),
run them with ``python -m pytest -m cuda`` on a machine with a CUDA device. Sources:
the closed-form posterior of a normal mean with known sd (conjugate normal model), and the same run
on the CPU (a CUDA run must give draws of the same law; it is not bit-identical across devices).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch.distributions import Normal

import stein_torch as st

CUDA = torch.cuda.is_available()
NO_CUDA = "needs a CUDA device (torch.cuda.is_available() is False); nothing in stein_torch requires one"
Y = torch.tensor([2.1, 3.5, 1.7, 2.9, 4.2, 2.6], dtype=torch.float64)
PRECISION = 1 / 9 + len(Y) / 4
POST_MEAN, POST_SD = (1 / 9 + float(Y.sum()) / 4) / PRECISION, PRECISION**-0.5  # closed form


def normal_mean_target(device):
    y = Y.to(device)
    return st.Target(lambda p: Normal(torch.tensor(1.0, dtype=torch.float64, device=device), 3.0).log_prob(p["mu"]),
                     latents={"mu": st.Latent()},
                     log_likelihood=lambda p, d: Normal(p["mu"][..., None], 2.0), data={"y": y}, observed="y")


def check_posterior(run):
    draws = run.draws["mu"].cpu().numpy().ravel()
    assert abs(draws.mean() - POST_MEAN) < 0.1 * POST_SD and abs(draws.std() / POST_SD - 1) < 0.1


def test_the_cpu_is_the_default_and_an_absent_cuda_device_is_named():
    run = st.svgd(normal_mean_target("cpu"), particles=100, seed=0, progress=False)
    assert run.particles.device.type == "cpu"
    check_posterior(run)
    if not CUDA:
        with pytest.raises((ValueError, RuntimeError), match="cuda"):
            st.svgd(normal_mean_target("cpu"), particles=10, steps=2, device="cuda", progress=False)


@pytest.mark.cuda
@pytest.mark.skipif(not CUDA, reason=NO_CUDA)
def test_svgd_on_cuda_matches_the_closed_form_and_fills_every_group():
    run = st.svgd(normal_mean_target("cuda"), particles=200, ensembles=2, seed=0, device="cuda", progress=False)
    assert run.particles.device.type == "cuda"
    check_posterior(run)
    idata = run.to_inference_data()
    assert idata.posterior_predictive["y"].shape == (2, 200, 6)
    predictive_mean = idata.posterior_predictive["y"].values.mean()
    assert abs(predictive_mean - POST_MEAN) < 4 * np.sqrt((POST_SD**2 + 4) / 2400)  # closed-form predictive sd


@pytest.mark.cuda
@pytest.mark.skipif(not CUDA, reason=NO_CUDA)
def test_langevin_on_cuda_matches_the_closed_form():
    run = st.langevin(normal_mean_target("cuda"), chains=4, draws=1000, warmup=500, seed=0, device="cuda",
                      progress=False)
    check_posterior(run)

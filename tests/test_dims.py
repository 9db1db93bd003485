"""Dimension names and coordinates in every InferenceData group.

Sources: ArviZ's InferenceData schema (a variable's dims are (chain, draw, *dims) in sampled groups and
(*dims) in data groups; coords label a dimension's positions), and torch.nn's documented parameter
layouts (``nn.Linear.weight`` is (out_features, in_features), ``nn.Conv1d.weight`` is
(out_channels, in_channels / groups, kernel_size)).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn
from torch.distributions import HalfNormal, Normal

import stein_torch as st

F64 = torch.float64
SCHOOLS = ["Ash", "Birch", "Cedar", "Elm"]


def school_target():
    """Invented: test-score gains of 4 schools, 5 pupils each."""
    g = torch.Generator().manual_seed(2)
    school = torch.arange(4).repeat_interleave(5)
    gain = torch.tensor([1.0, 3.0, 2.0, 0.5], dtype=F64)[school] + torch.randn(20, generator=g, dtype=F64)
    return st.Target(
        lambda p: Normal(0.0, 5.0).log_prob(p["effect"]).sum(-1) + HalfNormal(2.0).log_prob(p["noise"]),
        latents={"effect": st.Latent((4,), dims=("school",)),
                 "noise": st.Latent(support=torch.distributions.constraints.positive)},
        log_likelihood=lambda p, d: Normal(p["effect"][..., d["attends"]], p["noise"][..., None]),
        data={"attends": school, "gain": gain}, observed="gain",
        initial=lambda n, g: {"effect": torch.randn(n, 4, generator=g, dtype=F64),
                              "noise": torch.rand(n, generator=g, dtype=F64) + 0.5},
    )


def test_latent_dims_and_coords_reach_every_group():
    target = school_target()
    run = st.svgd(target, particles=30, steps=10, seed=0, progress=False)
    idata = run.to_inference_data(coords={"school": SCHOOLS, "pupil": np.arange(20)},
                                  dims={"gain": ["pupil"], "attends": ["pupil"]})
    assert idata.posterior["effect"].dims == ("chain", "draw", "school")
    assert list(idata.posterior["effect"].coords["school"].values) == SCHOOLS
    for group in ("observed_data", "constant_data"):
        assert all(v.dims == ("pupil",) for v in idata[group].data_vars.values())
    assert idata.log_likelihood["gain"].dims == ("chain", "draw", "pupil")
    assert idata.posterior_predictive["gain"].dims == ("chain", "draw", "pupil")
    idata.extend(st.prior_predictive(target, draws=20, seed=1, coords={"school": SCHOOLS}))
    assert idata.prior["effect"].dims == ("chain", "draw", "school")
    assert list(idata.prior["effect"].coords["school"].values) == SCHOOLS


def test_default_names_and_passing_dims_for_a_latent():
    run = st.svgd(st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=3), particles=10, steps=2, seed=0, progress=False)
    assert run.to_inference_data().posterior["x"].dims == ("chain", "draw", "x_dim_0")
    renamed = run.to_inference_data(dims={"x": ["axis"]}, coords={"axis": ["a", "b", "c"]})  # was a TypeError
    assert list(renamed.posterior["x"].coords["axis"].values) == ["a", "b", "c"]


def test_bad_dims_are_refused_with_what_was_expected():
    with pytest.raises(ValueError, match="each of the 2 axes"):
        st.Latent((2, 3), dims=("row",))
    with pytest.raises(TypeError, match="dims must be a tuple"):
        st.Latent((2,), dims=(1,))
    with pytest.raises(ValueError, match="distinct"):
        st.Latent((2, 2), dims=("a", "a"))
    run = st.svgd(st.Target(lambda x: -(x**2).sum(-1), dim=1), particles=5, steps=1, seed=0, progress=False)
    with pytest.raises(TypeError, match="dims must be a dict"):
        run.to_inference_data(dims=["x"])
    with pytest.raises(TypeError, match="coords must be a dict"):
        run.to_inference_data(coords=[1])


def test_module_targets_name_dims_after_the_layer_axes():
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(2, 3), nn.Tanh(), nn.Linear(3, 1)).double()
    x = torch.randn(12, 2, dtype=F64)
    y = x.sum(-1, keepdim=True)
    target = st.Target.from_module(net, prior=Normal(0.0, 1.0), data=(x, y),
                                   likelihood=lambda out, t: Normal(out, 0.5).log_prob(t).sum(-1))
    run = st.svgd(target, particles=10, steps=2, seed=0, progress=False)
    posterior = run.to_inference_data().posterior
    # torch.nn.Linear documents weight as (out_features, in_features) and bias as (out_features,)
    assert posterior["layer0__weight"].dims == ("chain", "draw", "layer0_out", "layer0_in")
    assert posterior["layer0__weight"].shape[2:] == (3, 2)
    assert posterior["layer0__bias"].dims == ("chain", "draw", "layer0_out")
    assert posterior["layer2__weight"].dims == ("chain", "draw", "layer2_out", "layer2_in")


def test_convolution_and_embedding_axes():
    from stein_torch.model.module import layer_dims

    dims = layer_dims(nn.Sequential(nn.Conv1d(2, 4, 3), nn.Embedding(7, 5)))
    # torch.nn.Conv1d: weight (out_channels, in_channels, kernel_size); nn.Embedding: (num_embeddings, dim)
    assert dims["0.weight"] == ("layer0_out", "layer0_in", "layer0_kernel_0")
    assert dims["0.bias"] == ("layer0_out",)
    assert dims["1.weight"] == ("layer1_index", "layer1_feature")


def test_from_priors_names_dims_and_refuses_unknown_names():
    priors = {"effect": Normal(torch.zeros(4, dtype=F64), 1.0), "noise": HalfNormal(torch.tensor(1.0, dtype=F64))}
    target = st.Target.from_priors(priors, dims={"effect": ("school",)})
    assert target.dims == {"effect": ("school",), "noise": ()}
    with pytest.raises(ValueError, match="not among the priors"):
        st.Target.from_priors(priors, dims={"effects": ("school",)})

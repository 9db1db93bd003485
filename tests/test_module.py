"""Module targets: parameters stacked per particle, evaluated by functional_call under vmap.

Source for every value check: the module's own forward pass (torch.nn, one particle at a time after
load_state_dict) and torch.distributions log densities; the initial-weight bound is the documented
default of torch.nn.Linear (U(-1/sqrt(in_features), 1/sqrt(in_features)), torch docs).
"""

from __future__ import annotations

import math

import pytest
import torch
from torch import nn
from torch.distributions import HalfNormal, Normal

import stein_torch as st


def toy_data(n=40, seed=0):
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(n, 3, generator=g)
    y = torch.sin(x[:, 0]) + 0.1 * torch.randn(n, generator=g)
    return x, y


def network(seed=0, batchnorm=False):
    torch.manual_seed(seed)
    layers = [nn.Linear(3, 8)] + ([nn.BatchNorm1d(8)] if batchnorm else []) + [nn.Tanh(), nn.Linear(8, 1)]
    return nn.Sequential(*layers)


def gaussian(output, targets, extra):
    return Normal(output[..., 0], extra["noise"][..., None]).log_prob(targets)


def module_target(net, **kw):
    x, y = toy_data()
    return st.Target.from_module(net, prior=Normal(0.0, 1.0), likelihood=gaussian, data=(x, y),
                                 extra_priors={"noise": HalfNormal(1.0)}, **kw)


def reference_log_prob(net, names, values, x, y):
    """Log density of one particle by the module's own forward pass (load_state_dict)."""
    net = net.double()
    state = {names[k]: v for k, v in values.items() if k in names}
    net.load_state_dict({**net.state_dict(), **state})
    with torch.no_grad():
        out = net(x.double())
    lp = sum(Normal(0.0, 1.0).log_prob(v).sum() for k, v in values.items() if k != "noise")
    lp = lp + HalfNormal(1.0).log_prob(values["noise"])
    return lp + Normal(out[:, 0], values["noise"]).log_prob(y.double()).sum()


def test_names_shapes_and_log_prob_match_the_module_forward():
    net = network()
    t = module_target(net)
    assert t.names == ["layer0__weight", "layer0__bias", "layer2__weight", "layer2__bias", "noise"]
    assert t.module_names["layer0__weight"] == "0.weight"
    assert t.dim == 8 * 3 + 8 + 8 + 1 + 1
    g = torch.Generator().manual_seed(1)
    z = 0.5 * torch.randn(4, t.dim, generator=g, dtype=torch.float64)
    values, log_jac = t.constrain(z)
    lp = t.log_prob(z)
    x, y = toy_data()
    for i in range(4):  # reference: the module's own forward, one particle at a time
        one = {k: v[i] for k, v in values.items()}
        expected = reference_log_prob(network(), t.module_names, one, x, y) + log_jac[i]
        torch.testing.assert_close(lp[i], expected)
    _, score = t.log_prob_and_score(z)
    assert score.shape == z.shape and torch.isfinite(score).all()


def test_batchnorm_in_train_mode_is_refused_and_eval_mode_uses_running_statistics():
    net = network(batchnorm=True)
    with pytest.raises(ValueError, match="batch-norm.*module.eval"):
        module_target(net)
    with torch.no_grad():  # give the running statistics non-trivial values
        net[1].running_mean.uniform_(-1, 1)
        net[1].running_var.uniform_(0.5, 2)
    net.eval()
    tgt = module_target(net)
    z = 0.3 * torch.randn(3, tgt.dim, dtype=torch.float64, generator=torch.Generator().manual_seed(2))
    run_like = st.Result(tgt, z[None], tgt.log_prob(z)[None], {}, {})
    x, _ = toy_data()
    outputs = run_like.predict(x)
    values, _ = tgt.constrain(z)
    for i in range(3):  # reference: module forward in eval mode with the same weights
        ref = network(batchnorm=True).double().eval()
        ref.load_state_dict({**{k: v.double() for k, v in net.state_dict().items()},
                             **{tgt.module_names[k]: v[i] for k, v in values.items() if k in tgt.module_names}})
        with torch.no_grad():
            torch.testing.assert_close(outputs[0, i], ref(x.double()))


def test_dropout_in_train_mode_is_refused():
    net = nn.Sequential(nn.Linear(3, 4), nn.Dropout(0.2), nn.Linear(4, 1))
    with pytest.raises(ValueError, match="dropout.*module.eval"):
        module_target(net)
    module_target(net.eval())  # eval mode: dropout is the identity


def test_prior_dict_and_errors():
    net = network()
    x, y = toy_data()
    priors = {"0.weight": Normal(0.0, 1.0), "layer0__bias": Normal(0.0, 2.0),
              "2.weight": Normal(torch.zeros(1, 8), 0.5), "2.bias": Normal(0.0, 1.0)}
    tgt = st.Target.from_module(net, prior=priors, likelihood=lambda o, yy: Normal(o[..., 0], 0.1).log_prob(yy), data=(x, y))
    z = torch.zeros(1, tgt.dim, dtype=torch.float64)
    values, _ = tgt.constrain(z)
    expected_prior = (Normal(0.0, 1.0).log_prob(torch.zeros(24)).sum() + Normal(0.0, 2.0).log_prob(torch.zeros(8)).sum()
                      + Normal(0.0, 0.5).log_prob(torch.zeros(8)).sum() + Normal(0.0, 1.0).log_prob(torch.zeros(1)).sum())
    zero = network().double()  # reference at z = 0: the module's forward with all weights zero
    for p in zero.parameters():
        p.data.zero_()
    out = zero(x.double()).detach()
    expected = expected_prior.double() + Normal(out[:, 0], 0.1).log_prob(y.double()).sum()
    torch.testing.assert_close(tgt.log_prob(z)[0], expected)
    with pytest.raises(ValueError, match="missing.*2.bias"):
        st.Target.from_module(net, prior={k: v for k, v in priors.items() if k != "2.bias"}, likelihood=gaussian, data=(x, y))
    with pytest.raises(ValueError, match="does not fit"):
        st.Target.from_module(net, prior={**priors, "2.bias": Normal(torch.zeros(3), 1.0)}, likelihood=gaussian, data=(x, y))
    with pytest.raises(ValueError, match="must be scalar"):
        st.Target.from_module(net, prior=Normal(torch.zeros(2), 1.0), likelihood=gaussian, data=(x, y))
    with pytest.raises(TypeError, match="tuple \\(inputs, targets\\)"):
        st.Target.from_module(net, prior=Normal(0.0, 1.0), likelihood=gaussian, data=x)
    with pytest.raises(TypeError, match="nn.Module"):
        st.Target.from_module(lambda v: v, prior=Normal(0.0, 1.0), likelihood=gaussian, data=(x, y))
    with pytest.raises(ValueError, match="'x': 40.*'y': 5"):
        st.Target.from_module(net, prior=Normal(0.0, 1.0), likelihood=gaussian, data=(x, y[:5]))


def test_initial_particles_are_fresh_layer_initialisations():
    tgt = module_target(network())
    draws = tgt.draw_initial(30, torch.Generator().manual_seed(0))
    w = draws["layer0__weight"]  # (30, 8, 3)
    bound = 1 / math.sqrt(3)  # torch.nn.Linear default init: U(-1/sqrt(in), 1/sqrt(in)) (torch docs)
    assert w.shape == (30, 8, 3) and float(w.abs().max()) <= bound
    assert float(w.std()) == pytest.approx(bound / math.sqrt(3), rel=0.15)  # sd of U(-b, b) is b/sqrt(3)
    assert not torch.equal(w[0], w[1])
    noise = draws["noise"]
    median = 0.6745  # median of HalfNormal(1) = Phi^-1(0.75) (scipy.stats.halfnorm.median, from memory)
    assert float((noise.log() - math.log(median)).abs().max()) < 0.5


def test_sampling_predict_and_predictions_group():
    net = network()
    before = {k: v.clone() for k, v in net.state_dict().items()}
    tgt = module_target(net)
    run = st.svgd(tgt, particles=12, steps=150, ensembles=2, seed=0, progress=False)
    assert run.settings["precondition"] == "None" and "Linear" not in run.settings["kernel"]  # module hints
    for k, v in net.state_dict().items():  # the user's module is left untouched
        assert torch.equal(v, before[k])
    assert run.draws["layer0__weight"].shape == (2, 12, 8, 3)
    x, y = toy_data()
    x_new = torch.linspace(-2, 2, 9)[:, None].expand(9, 3)
    out = run.predict(x_new)
    assert out.shape == (2, 12, 9, 1)
    ref = network().double()  # reference: module forward with particle (1, 5)'s weights
    ref.load_state_dict({tgt.module_names[k]: v[1, 5] for k, v in run.draws.items() if k in tgt.module_names})
    torch.testing.assert_close(out[1, 5], ref(x_new.double()).detach())
    # the fit: the posterior-mean network explains most of the variance of sin(x0) (common practice)
    fit = run.predict(x)[..., 0].mean((0, 1))
    assert float(((fit - y.double()) ** 2).mean()) < 0.3 * float(y.double().var())
    bands = st.predictive_interval(out[..., 0], prob=0.8)
    assert bands.mean.shape == (9,) and bool((bands.lower <= bands.mean).all() & (bands.mean <= bands.upper).all())
    idata = run.to_inference_data(predictions=out[..., 0])
    assert idata.predictions["y"].dims == ("chain", "draw", "pred_obs")
    assert idata.log_likelihood["y"].shape == (2, 12, 40)
    assert idata.constant_data["x"].shape == (40, 3)


def test_predictive_hook_on_a_plain_target_and_errors():
    x, y = toy_data()
    tgt = st.Target(lambda p: Normal(0.0, 1.0).log_prob(p["a"]), latents={"a": st.Latent()},
                    log_likelihood=lambda p, d: Normal(p["a"][..., None] * d["x"][:, 0], 1.0).log_prob(d["y"]),
                    data={"x": x, "y": y}, predictive=lambda p, xs: p["a"][..., None] * xs[:, 0])
    run = st.svgd(tgt, particles=10, steps=20, seed=0, progress=False)
    out = run.predict(x[:5])
    torch.testing.assert_close(out, run.draws["a"][..., None] * x[:5, 0].double())
    plain = st.Target(lambda v: -(v**2).sum(-1), dim=1)
    with pytest.raises(ValueError, match="no predictive function"):
        st.svgd(plain, particles=5, steps=1, seed=0, progress=False).predict(x)
    with pytest.raises(ValueError, match="prob must be"):
        st.predictive_interval(out, prob=1.5)
    with pytest.raises(ValueError, match="predictions"):
        run.to_inference_data(predictions=torch.zeros(3, 3))

"""Messages about the user's own function: typos, indices past the end, code vmap cannot trace.

Sources: the Python language reference (a subclass of KeyError / IndexError is still caught by
``except KeyError`` / ``except IndexError``; a warning's ``filename`` and ``lineno`` say where it is
reported, :mod:`warnings`), and the house rule that a message names the argument, what was expected
and what came (common practice).
"""

from __future__ import annotations

import inspect
import warnings

import pytest
import torch
from torch.distributions import Normal, constraints

import stein_torch as st

HERE = __file__


def run(target):
    return st.svgd(target, particles=8, steps=2, seed=0, progress=False)


def test_a_misspelt_latent_names_the_latents_their_shapes_and_the_line():
    def log_joint(p):
        return -0.5 * p["mu"] ** 2 - p["sigma"] - 0.5 * (p["theta"] ** 2).sum(-1)  # "sigma" is not a latent

    target = st.Target(log_joint, latents={"mu": st.Latent(), "tau": st.Latent(support=constraints.positive),
                                           "theta": st.Latent((8,))})
    with pytest.raises(KeyError) as info:
        run(target)
    message = str(info.value)
    assert "'sigma'" in message and "mu: (...)" in message and "tau: (...)" in message and "theta: (..., 8)" in message
    line = inspect.getsourcelines(log_joint)[1] + 1
    assert f"{HERE}:{line}" in message
    assert not message.startswith('"')  # shown as a sentence, not as a quoted key


def test_a_near_miss_gets_a_suggestion_and_data_keys_are_listed():
    x = torch.linspace(0, 1, 6, dtype=torch.float64)
    target = st.Target(lambda p: -p["slope"] ** 2, latents={"slope": st.Latent()},
                       log_likelihood=lambda p, d: Normal(p["slope"][..., None] * d["xs"], 1.0),
                       data={"x": x, "y": 2 * x}, observed="y")
    with pytest.raises(KeyError, match=r"'xs'.*data with the keys x: \(6,\), y: \(6,\).*did you mean 'x'"):
        run(target)
    target = st.Target(lambda p: -p["slop"] ** 2, latents={"slope": st.Latent()})
    with pytest.raises(KeyError, match="did you mean 'slope'"):
        run(target)


def test_an_index_past_dim_names_dim_and_the_index():
    target = st.Target(lambda x: -(x[..., 5] ** 2), dim=5)
    with pytest.raises(IndexError, match=r"index 5 is out of bounds.*dim=5.*0\.\.4"):
        run(target)


def test_the_loop_warning_points_at_the_users_line():
    def log_prob(x):  # written for one value, with Python control flow vmap cannot trace
        if x[0].item() > 0:
            return -(x**2).sum()
        return -(x**2).sum()

    line = inspect.getsourcelines(log_prob)[1] + 1  # the line with .item()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        run(st.Target(log_prob, dim=2))
    loop = [w for w in caught if "Python loop" in str(w.message)]
    assert len(loop) == 1
    assert loop[0].filename == HERE and loop[0].lineno == line
    assert f"{HERE}:{line}" in str(loop[0].message)

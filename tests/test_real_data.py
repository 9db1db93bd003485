"""Real data that scikit-learn ships (no downloads), checked against scikit-learn's own estimators.

- Bayesian logistic regression on sklearn.datasets.load_breast_cancer: test accuracy within 0.02 of
  sklearn.linear_model.LogisticRegression (full batch), the minibatch run (batch_size=64) within
  0.02 of the full-batch run, and arviz.loo runs on the log_likelihood group.
- A Bayesian neural network (one hidden layer, 50 units) on sklearn.datasets.load_diabetes through
  Target.from_module: test RMSE at most 5% above sklearn.linear_model.RidgeCV, and the 90% posterior
  predictive interval covering between 80% and 97% of the test targets.
About 15 s each on an idle 2-core machine.
"""

from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import torch
from torch import nn
from torch.distributions import HalfNormal, Normal

import stein_torch as st

SPLIT_SEED = 0


def standardised_split(X, y, test_size):
    from sklearn.model_selection import train_test_split

    Xtr, Xte, ytr, yte = train_test_split(X, y, test_size=test_size, random_state=SPLIT_SEED)
    mean, sd = Xtr.mean(0), Xtr.std(0)
    return (Xtr - mean) / sd, (Xte - mean) / sd, ytr, yte


def logistic_target(X, y, batch_size=None):
    def log_lik(p, d):  # (*batch, n_obs) Bernoulli terms
        logits = (d["X"] @ p["w"].unsqueeze(-1)).squeeze(-1) + p["b"].unsqueeze(-1)
        return -nn.functional.binary_cross_entropy_with_logits(logits, d["y"].expand_as(logits), reduction="none")

    return st.Target.from_priors(
        {"w": Normal(0.0, 1.0).expand([X.shape[1]]), "b": Normal(0.0, 5.0)}, log_lik,
        data={"X": torch.tensor(X), "y": torch.tensor(y, dtype=torch.float64)}, batch_size=batch_size, observed="y",
    )


def posterior_accuracy(run, X, y):
    w, b = run.draws["w"], run.draws["b"]
    prob = torch.sigmoid(torch.tensor(X) @ w.reshape(-1, w.shape[-1]).T + b.reshape(-1)).mean(1)
    return float(((prob > 0.5).numpy() == y).mean())


def test_logistic_regression_on_breast_cancer_matches_sklearn():
    from sklearn.datasets import load_breast_cancer
    from sklearn.linear_model import LogisticRegression

    X, y = load_breast_cancer(return_X_y=True)
    Xtr, Xte, ytr, yte = standardised_split(X, y, test_size=0.3)
    reference = LogisticRegression(max_iter=5000).fit(Xtr, ytr).score(Xte, yte)  # sklearn LogisticRegression
    full = st.svgd(logistic_target(Xtr, ytr), particles=100, steps=300, seed=0, progress=False)
    mini = st.svgd(logistic_target(Xtr, ytr, batch_size=64), particles=100, steps=300, seed=0, progress=False)
    acc_full, acc_mini = posterior_accuracy(full, Xte, yte), posterior_accuracy(mini, Xte, yte)
    print(f"accuracy: sklearn {reference:.4f}, SVGD full {acc_full:.4f}, SVGD minibatch 64 {acc_mini:.4f}")
    assert abs(acc_full - reference) <= 0.02
    assert abs(acc_mini - acc_full) <= 0.02
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Pareto-k warnings are advice, not failures
        loo = az.loo(full.to_inference_data())
    assert np.isfinite(loo.elpd_loo) and loo.n_data_points == len(ytr)


def test_bayesian_network_on_diabetes_matches_ridge_and_covers():
    from sklearn.datasets import load_diabetes
    from sklearn.linear_model import RidgeCV

    X, y = load_diabetes(return_X_y=True)
    Xtr, Xte, ytr, yte = standardised_split(X, y, test_size=0.25)
    ridge = RidgeCV(alphas=np.logspace(-3, 3, 30)).fit(Xtr, ytr)  # sklearn RidgeCV
    rmse_ridge = float(np.sqrt(np.mean((ridge.predict(Xte) - yte) ** 2)))
    y_mean, y_sd = ytr.mean(), ytr.std()

    torch.manual_seed(0)
    hidden = 50
    net = nn.Sequential(nn.Linear(10, hidden), nn.Tanh(), nn.Linear(hidden, 1))
    # weight priors scaled by 1/sqrt(fan-in) keep the prior function scale independent of the width
    # (common practice); a noise scale with a half-normal prior on the standardised target
    prior = {"0.weight": Normal(0.0, 10**-0.5), "0.bias": Normal(0.0, 1.0),
             "2.weight": Normal(0.0, hidden**-0.5), "2.bias": Normal(0.0, 1.0)}

    def gaussian(output, targets, extra):
        return Normal(output[..., 0], extra["noise"][..., None]).log_prob(targets)

    target = st.Target.from_module(
        net, prior=prior, likelihood=gaussian, extra_priors={"noise": HalfNormal(1.0)},
        data=(torch.tensor(Xtr), torch.tensor((ytr - y_mean) / y_sd)),
    )
    run = st.svgd(target, particles=30, steps=300, seed=0, progress=False)
    mean_net = run.predict(torch.tensor(Xte))[..., 0] * y_sd + y_mean  # (1, 30, n_test)
    rmse = float(np.sqrt(np.mean((mean_net.mean((0, 1)).numpy() - yte) ** 2)))
    # posterior predictive: 40 noise draws per particle around each network's output
    g = torch.Generator().manual_seed(1)
    noise = (run.draws["noise"] * y_sd)[None, ..., None]
    y_draws = mean_net[None] + noise * torch.randn((40, *mean_net.shape), generator=g, dtype=mean_net.dtype)
    bands = st.predictive_interval(y_draws, prob=0.9, sample_dims=3)
    yte_t = torch.tensor(yte)
    coverage = float(((yte_t >= bands.lower) & (yte_t <= bands.upper)).double().mean())
    print(f"diabetes: RMSE {rmse:.2f} vs RidgeCV {rmse_ridge:.2f} (ratio {rmse / rmse_ridge:.3f}), coverage {coverage:.3f}")
    assert rmse <= 1.05 * rmse_ridge
    assert 0.80 <= coverage <= 0.97

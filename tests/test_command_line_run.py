"""`stein-torch run`: methods, options and the report after a run; `--version`; `bench --help`.

Sources: the conjugate normal model y_i ~ N(mu, 2), mu ~ N(1, 3) (closed-form posterior); ArviZ's
``rhat`` and the InferenceData attrs the run writes (the report must print the same figures);
``importlib.metadata`` for the installed version; each suite's own argparse parser for the options
``bench --help`` must list; deterministic resume (a run continued from its checkpoint equals the
uninterrupted run bit for bit: the checkpoint contract of docs/reliability.md).
"""

from __future__ import annotations

import re
import warnings

import arviz as az
import numpy as np
import pytest
import torch

import stein_torch as st
from stein_torch import cli_run
from stein_torch.cli import main

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

MODEL = """
import torch
import stein_torch as st

y = torch.tensor([2.1, 3.5, 1.7, 2.9, 4.2, 2.6], dtype=torch.float64)

def log_joint(p):
    mu = p["mu"]
    return (torch.distributions.Normal(1.0, 3.0).log_prob(mu)
            + torch.distributions.Normal(mu[..., None], 2.0).log_prob(y).sum(-1))

target = st.Target(log_joint, latents={"mu": st.Latent()})
"""
Y = np.array([2.1, 3.5, 1.7, 2.9, 4.2, 2.6])
PRECISION = 1 / 9 + len(Y) / 4
POST_MEAN, POST_SD = (1 / 9 + Y.sum() / 4) / PRECISION, PRECISION**-0.5  # closed form, Normal-Normal


@pytest.fixture
def model(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "model.py").write_text(MODEL)
    return tmp_path / "model.py"


def test_version_is_the_installed_one(capsys):
    from importlib import metadata

    assert main(["--version"]) == 0
    printed = capsys.readouterr().out
    assert printed.startswith(f"stein-torch {metadata.version('stein_torch')} ")
    assert st.__version__ == metadata.version("stein_torch")


def test_the_report_prints_what_the_file_records(model, capsys):
    assert main(["run", str(model), "--ensembles", "3", "--particles", "100", "--steps", "120", "--out", "o.nc"]) == 0
    printed = capsys.readouterr().out
    idata = az.from_netcdf("o.nc")
    steps = int(re.search(r"steps run: (\d+)", printed).group(1))
    assert steps == int(idata.posterior.attrs["steps"]) <= 120
    reason = re.search(r"stopped: (\w+)", printed).group(1)
    assert reason == idata.posterior.attrs["stop_reason"]
    ksd = [float(v) for v in re.search(r"final KSD per ensemble \(whitened coordinates\): (.*)", printed).group(1).split()]
    np.testing.assert_allclose(ksd, np.asarray(idata.posterior.attrs["ksd"]), rtol=1e-3)  # printed to 4 digits
    rhat = float(re.search(r"R-hat across the 3 ensembles: largest ([0-9.]+)", printed).group(1))
    assert rhat == pytest.approx(float(az.rhat(idata)["mu"]), abs=1e-4)  # arviz.rhat on the written file
    assert "warnings: none" in printed
    draws = idata.posterior["mu"].values
    assert abs(draws.mean() - POST_MEAN) < 0.1 * POST_SD and abs(draws.std() / POST_SD - 1) < 0.1


def test_langevin_through_the_table_reaches_the_closed_form(model, capsys):
    assert main(["run", str(model), "--method", "langevin", "--ensembles", "2", "--draws", "1500",
                 "--warmup", "500", "--seed", "3", "--out", "m.nc"]) == 0
    printed = capsys.readouterr().out
    assert "steps run: 2000 per chain (500 warmup + 1500 kept draws)" in printed
    assert "stopped: draws" in printed and "R-hat across the 2 chains" in printed
    draws = az.from_netcdf("m.nc").posterior["mu"].values
    assert draws.shape == (2, 1500)
    assert abs(draws.mean() - POST_MEAN) < 0.15 * POST_SD and abs(draws.std() / POST_SD - 1) < 0.15


def test_warnings_raised_during_the_run_are_printed(model, capsys):
    model.write_text(MODEL + """
def one_value(p):  # written for one value with Python control flow: vmap cannot trace it
    return log_joint(p) if p["mu"].item() < 1e9 else log_joint(p)

looped = st.Target(one_value, latents={"mu": st.Latent()})
""")
    assert main(["run", str(model), "--target", "looped", "--particles", "10", "--steps", "3", "--out", "w.nc"]) == 0
    printed = capsys.readouterr().out
    # the loop warning is printed, once, among the run's warnings (3 steps also reach the step cap)
    assert re.search(r"warnings \(\d\):\n(  - .*\n)*  - (RuntimeWarning: )?log_prob is written for one value", printed)
    assert printed.count("log_prob is written for one value") == 1


def test_no_stop_runs_every_step_and_the_stop_rule_may_not(model, capsys):
    assert main(["run", str(model), "--steps", "250", "--particles", "50", "--no-stop", "--out", "a.nc"]) == 0
    assert "steps run: 250" in capsys.readouterr().out
    assert az.from_netcdf("a.nc").posterior.attrs["stop_reason"] == "steps"


def test_checkpoint_then_resume_equals_one_run(model, capsys):
    common = ["--particles", "40", "--no-stop", "--seed", "5"]
    assert main(["run", str(model), "--steps", "20", "--checkpoint", "c.pt", "--out", "first.nc", *common]) == 0
    assert main(["run", str(model), "--steps", "45", "--resume", "c.pt", "--out", "resumed.nc", *common]) == 0
    assert main(["run", str(model), "--steps", "45", "--out", "whole.nc", *common]) == 0
    resumed, whole = (az.from_netcdf(f).posterior["mu"].values for f in ("resumed.nc", "whole.nc"))
    np.testing.assert_array_equal(resumed, whole)
    assert main(["run", str(model), "--resume", "missing.pt"]) == 2


def test_kernel_specifications_build_the_kernels_they_name():
    k = cli_run.parse_kernel("matern:1.5+linear:2")
    assert [type(p).__name__ for p in k.parts] == ["Matern", "Linear"] and k.parts[0].nu == 1.5
    assert type(cli_run.parse_kernel("weighted-gamma-exp:1")).__name__ == "TargetWeighted"
    from stein_torch.samplers.svgd import default_kernel

    assert repr(cli_run.parse_kernel("default")) == repr(default_kernel())
    for bad in ("matern", "rbf:2", "foo", "gamma-exp:x"):
        with pytest.raises(ValueError, match="--kernel"):
            cli_run.parse_kernel(bad)


def test_run_with_nuts_passes_chains_draws_warmup_and_seed_and_reports_the_draws(model, capsys, tmp_path):
    assert main(["run", str(model), "--method", "nuts", "--ensembles", "2", "--draws", "60", "--warmup", "200",
                 "--seed", "2", "--out", str(tmp_path / "n.nc")]) == 0
    printed = capsys.readouterr().out
    assert "stopped: draws" in printed
    idata = az.from_netcdf(tmp_path / "n.nc")
    assert idata.posterior.sizes["chain"] == 2 and idata.posterior.sizes["draw"] == 60
    assert {"diverging", "tree_depth", "energy"} <= set(idata.sample_stats.data_vars)
    assert main(["run", str(model), "--method", "nuts", "--no-stop"]) == 2
    assert "--no-stop applies to --method svgd" in capsys.readouterr().err


def test_bench_help_lists_every_suite_and_its_options(capsys):
    from stein_torch.benchmarks import SUITES
    import importlib

    assert main(["bench", "--help"]) == 0
    printed = capsys.readouterr().out
    for name, module in SUITES.items():
        assert re.search(rf"^  {name}\s", printed, re.M), name
        parser = importlib.import_module(module).build_parser()
        for action in parser._actions:
            if action.option_strings and action.help not in (None, "==SUPPRESS==") and "-h" not in action.option_strings:
                assert action.option_strings[-1] in printed, (name, action.option_strings)

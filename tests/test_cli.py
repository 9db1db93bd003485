"""The command line (stein-torch demo / run / bench), the demo model and atomic file writing."""

from __future__ import annotations

import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)  # arviz announces its refactor on import
    import arviz as az
from scipy import stats

from stein_torch import io
from stein_torch.cli import main
from stein_torch.demo import DEMO_STEPS, demo_target, kiln_data, run_demo

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (RFC 2083, section 3.1)
NAMES = ("initial_moisture", "drying_rate", "noise_sd")


@pytest.fixture
def one_thread():
    """Small models run faster single-threaded on a shared machine; restore the setting after."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def _one_line_error(captured) -> str:
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1, captured.err  # one-line message (common practice for CLIs)
    assert "Traceback" not in captured.err
    return lines[0]


# ------------------------------------------------------------------------------------------- demo
def test_demo_command_writes_netcdf_and_three_pngs(tmp_path, capsys):
    out = tmp_path / "demo"
    code = main(["demo", "--out", str(out), "--particles", "40", "--steps", "15", "--seed", "3"])
    printed = capsys.readouterr().out
    assert code == 0
    for name in NAMES:  # the ArviZ summary table lists every parameter
        assert name in printed
    assert {p.name for p in out.iterdir()} == {"posterior.nc", "pair_plot.png", "history.png", "comparison.png"}
    assert "against NUTS" in printed and "(stopped: " in printed
    assert "SVGD against NUTS" in printed and "drying_rate" in printed  # the crosscheck table
    for png in ("pair_plot.png", "history.png", "comparison.png"):
        assert (out / png).read_bytes()[:8] == PNG_SIGNATURE
    # NetCDF (Unidata standard, via ArviZ): 1 chain (ensemble) x 40 draws (particles) per parameter
    idata = az.from_netcdf(out / "posterior.nc")
    for name in NAMES:
        assert idata.posterior[name].shape == (1, 40)
        assert np.all(idata.posterior[name].values > 0)  # all three are constrained positive
    assert idata.attrs["inference_library"] == "stein_torch"  # top-level InferenceData attrs


def test_demo_netcdf_round_trip_keeps_values(tmp_path, one_thread):
    run = run_demo(tmp_path, particles=30, steps=10, seed=1, progress=False)
    idata = az.from_netcdf(tmp_path / "posterior.nc")  # ArviZ NetCDF reader
    for name in NAMES:
        # exact round trip: NetCDF stores float64 losslessly (NetCDF data model, double type)
        np.testing.assert_array_equal(idata.posterior[name].values, run.draws[name].numpy())
    np.testing.assert_array_equal(idata.sample_stats["lp"].values, run.lp.numpy())
    data = kiln_data()
    np.testing.assert_array_equal(idata.observed_data["moisture"].values, data["moisture"].numpy())
    np.testing.assert_array_equal(idata.constant_data["day"].values, data["day"].numpy())


def _grid_posterior_moments(points: int = 70):
    """Posterior mean, sd and correlation of the demo model by quadrature on a log-spaced grid.

    Densities from scipy.stats (independent of torch.distributions); the grid is uniform in
    log(parameter), so each point carries the Jacobian theta (common practice for quadrature).
    """
    data = kiln_data()
    day, log_y = data["day"].numpy(), np.log(data["moisture"].numpy())
    # least squares on the log scale locates the grid (common practice)
    slope, intercept = np.polyfit(day, log_y, 1)
    resid_sd = np.std(log_y - (intercept + slope * day), ddof=2)
    log_m0 = np.linspace(intercept - 0.25, intercept + 0.25, points)
    log_rate = np.log(-slope) + np.linspace(-0.25, 0.25, points)
    log_sd = np.log(resid_sd) + np.linspace(-1.2, 1.0, points)
    lm, lr, ls = np.meshgrid(log_m0, log_rate, log_sd, indexing="ij")
    m0, rate, sd = np.exp(lm), np.exp(lr), np.exp(ls)
    expected = np.log(m0)[..., None] - rate[..., None] * day
    log_post = (
        stats.lognorm.logpdf(m0, s=0.5, scale=50.0)
        + stats.lognorm.logpdf(rate, s=0.75, scale=0.1)
        + stats.halfnorm.logpdf(sd, scale=0.2)
        + stats.norm.logpdf(log_y, loc=expected, scale=sd[..., None]).sum(-1)
        + lm + lr + ls  # Jacobian of the log-spaced grid
    )
    w = np.exp(log_post - log_post.max())
    w /= w.sum()
    # the grid must hold the mass: edges carry (almost) none
    for axis in range(3):
        edge = np.take(w, [0, points - 1], axis=axis).sum()
        assert edge < 1e-4, f"quadrature grid too narrow on axis {axis}: edge mass {edge:.2e}"
    values = {"initial_moisture": m0, "drying_rate": rate, "noise_sd": sd}
    mean = {k: float((w * v).sum()) for k, v in values.items()}
    sdev = {k: float(np.sqrt((w * (v - mean[k]) ** 2).sum())) for k, v in values.items()}
    cov = (w * (m0 - mean["initial_moisture"]) * (rate - mean["drying_rate"])).sum()
    corr = float(cov / (sdev["initial_moisture"] * sdev["drying_rate"]))
    return mean, sdev, corr


def test_demo_posterior_matches_grid_quadrature(tmp_path, one_thread):
    run = run_demo(tmp_path, particles=200, steps=DEMO_STEPS, seed=0, progress=False)
    mean, sdev, corr = _grid_posterior_moments()
    for name in NAMES:
        draws = run.draws[name].ravel().numpy()
        # reference: scipy.stats densities integrated on a grid; tolerances as the issue's
        # reference-posterior floor (mean within 0.1 sd, sd within 10 %)
        assert abs(draws.mean() - mean[name]) < 0.1 * sdev[name], name
        assert abs(draws.std() / sdev[name] - 1) < 0.10, name
    got = np.corrcoef(run.draws["initial_moisture"].ravel(), run.draws["drying_rate"].ravel())[0, 1]
    assert corr > 0.8  # the demo's point: a strongly correlated posterior (grid reference)
    assert abs(got - corr) < 0.05


def test_demo_target_log_density_matches_scipy():
    target = demo_target()
    values = {"initial_moisture": torch.tensor([55.0, 70.0], dtype=torch.float64),
              "drying_rate": torch.tensor([0.07, 0.1], dtype=torch.float64),
              "noise_sd": torch.tensor([0.05, 0.2], dtype=torch.float64)}
    z = target.unconstrain(values)
    constrained, log_jac = target.constrain(z)
    got = (target.log_prob(z) - log_jac).numpy()  # log_prob includes the log-Jacobian
    data = kiln_data()
    day, moisture = data["day"].numpy(), data["moisture"].numpy()
    for b in range(2):
        m0, rate, sd = (float(constrained[k][b]) for k in NAMES)
        want = (  # scipy.stats densities of the documented model: readings log-normal around the curve
            stats.lognorm.logpdf(m0, s=0.5, scale=50.0)
            + stats.lognorm.logpdf(rate, s=0.75, scale=0.1)
            + stats.halfnorm.logpdf(sd, scale=0.2)
            + stats.lognorm.logpdf(moisture, s=sd, scale=m0 * np.exp(-rate * day)).sum()
        )
        assert got[b] == pytest.approx(want, rel=1e-10)


# -------------------------------------------------------------------------------------------- run
CONJUGATE_MODEL = """
import torch
import stein_torch as st

# y_i ~ Normal(mu, 2), mu ~ Normal(1, 3): closed-form Normal posterior
y = torch.tensor([2.1, 3.5, 1.7, 2.9, 4.2, 2.6], dtype=torch.float64)

def log_joint(p):
    mu = p["mu"]
    prior = torch.distributions.Normal(1.0, 3.0).log_prob(mu)
    return prior + torch.distributions.Normal(mu[..., None], 2.0).log_prob(y).sum(-1)

{name} = st.Target(log_joint, latents={{"mu": st.Latent()}})
"""


def test_run_command_samples_a_model_file(tmp_path, capsys, one_thread):
    model = tmp_path / "conjugate.py"
    model.write_text(CONJUGATE_MODEL.format(name="my_model"))
    out = tmp_path / "post.nc"
    argv = ["run", str(model), "--target", "my_model", "--particles", "150", "--steps", "100",
            "--ensembles", "2", "--seed", "4", "--out", str(out)]
    assert main(argv) == 0
    assert "mu" in capsys.readouterr().out
    draws = az.from_netcdf(out).posterior["mu"].values
    assert draws.shape == (2, 150)
    # closed form (conjugate Normal-Normal): precision = 1/9 + 6/4, mean = (1/9 + sum(y)/4) / precision
    y = np.array([2.1, 3.5, 1.7, 2.9, 4.2, 2.6])
    precision = 1 / 9 + len(y) / 4
    post_mean, post_sd = (1 / 9 + y.sum() / 4) / precision, precision**-0.5
    assert abs(draws.mean() - post_mean) < 0.05 * post_sd
    assert abs(draws.std() / post_sd - 1) < 0.05


def test_run_command_names_the_targets_it_found(tmp_path, capsys):
    model = tmp_path / "conjugate.py"
    model.write_text(CONJUGATE_MODEL.format(name="my_model"))
    assert main(["run", str(model), "--steps", "5"]) == 2  # default variable name 'target' missing
    line = _one_line_error(capsys.readouterr())
    assert "'target'" in line and "my_model" in line


def test_run_command_reports_a_broken_model_in_one_line(tmp_path, capsys):
    model = tmp_path / "broken.py"
    model.write_text("import torch\nraise RuntimeError('no data file here')\n")
    assert main(["run", str(model)]) == 1  # a run failure, not a usage error
    line = _one_line_error(capsys.readouterr())
    assert "no data file here" in line
    assert main(["run", str(model), "--debug"]) == 1
    assert "Traceback" in capsys.readouterr().err  # --debug shows where it failed


# ------------------------------------------------------------------------------------------ bench
def test_bench_core_quick_prints_every_row(capsys, one_thread):
    code = main(["bench", "core", "--quick"])
    printed = capsys.readouterr().out
    assert code == 0  # --quick never fails on figures (sizes too small to mean anything)
    for tag in ("(a)", "(b)", "(c)", "(d)", "(e)"):
        assert tag in printed
    assert "naive direction matches the engine to" in printed
    # the naive per-particle direction equals the batched engine (common practice: compare two
    # implementations of one formula, arXiv:1608.04471 eq. for phi)
    agreement = float(printed.split("matches the engine to ")[1].split()[0])
    assert agreement < 1e-10


def test_bench_passes_suite_options_through(capsys, one_thread, monkeypatch):
    # options the CLI does not know go to the one suite named (here the module suite's --json)
    from stein_torch.benchmarks import module as module_bench

    seen = {}
    monkeypatch.setattr(module_bench, "main", lambda args: seen.setdefault("args", args) and 0)
    assert main(["bench", "module", "--quick", "--json"]) == 0
    assert seen["args"] == ["--quick", "--json"]


# ---------------------------------------------------------------------------------- bad arguments
@pytest.mark.parametrize(
    "argv, fragment",
    [
        ([], "required"),
        (["frobnicate"], "invalid choice"),
        (["demo", "--particles", "0"], "positive integer"),
        (["demo", "--steps", "many"], "positive integer"),
        (["demo", "--seed", "-1"], "non-negative"),
        (["run", "no_such_model.py"], "no such file"),
        (["run", "--steps", "5"], "MODEL.py"),
        (["bench", "nosuch"], "core, accuracy, kernels, module, nuts, distributed, all"),
        (["demo", "--names", "x"], "unrecognized arguments: --names x"),
        (["bench", "core", "module", "--json"], "name a single suite"),
    ],
)
def test_bad_arguments_exit_2_with_one_line(argv, fragment, capsys):
    assert main(argv) == 2  # usage errors exit 2 (argparse and BSD sysexits convention, common practice)
    assert fragment in _one_line_error(capsys.readouterr())


def test_demo_refuses_a_file_as_output_folder(tmp_path, capsys):
    target = tmp_path / "taken"
    target.write_text("x")
    assert main(["demo", "--out", str(target), "--steps", "1"]) == 2
    assert "folder" in _one_line_error(capsys.readouterr())


def test_module_entry_point_exits_non_zero_without_traceback(tmp_path):
    done = subprocess.run(
        [sys.executable, "-m", "stein_torch", "bench", "nosuch"], capture_output=True, text=True, cwd=tmp_path,
        env={**__import__("os").environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])},
    )
    assert done.returncode == 2
    assert done.stderr.strip().count("\n") == 0 and "Traceback" not in done.stderr
    assert "unknown suite 'nosuch'" in done.stderr


# ------------------------------------------------------------------------------------ atomic files
def test_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    destination = tmp_path / "posterior.nc"
    destination.write_bytes(b"previous result")

    with pytest.raises(OSError, match="disk full"):
        with io.atomic_path(destination) as tmp:
            Path(tmp).write_bytes(b"half a file")
            raise OSError("disk full")
    # atomic replace (POSIX rename(2) semantics): the old file is intact, no temporary remains
    assert destination.read_bytes() == b"previous result"
    assert [p.name for p in tmp_path.iterdir()] == ["posterior.nc"]


def test_run_default_steps_follow_the_sampler_default():
    # the CLI keeps torch out of its import path, so it repeats the sampler's default cap
    from stein_torch import cli
    from stein_torch.samplers.svgd import DEFAULT_STEPS

    assert cli.RUN_STEPS == DEFAULT_STEPS

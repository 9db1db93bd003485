"""The notebooks run from top to bottom without error (executed by nbclient on a fresh kernel).

Each runs its invented scenario with real sampling (20 to 40 s each on a 2-core machine). Checks:
stored with outputs cleared; every cell runs; the figures they print agree
with the values the invented data were generated with (the generating values are the source).
"""

from __future__ import annotations

import pathlib
import re

import pytest

pytestmark = pytest.mark.slow  # a fresh kernel per notebook: run with `pytest -m slow` (CI runs both)

import nbclient  # noqa: E402  test extras: a missing one fails the suite, never skips it
import nbformat  # noqa: E402

NOTEBOOKS = pathlib.Path(__file__).resolve().parent.parent / "notebooks"
TIMEOUT_S = 600  # per cell; a guard against a hung kernel, not a speed assert


def run_notebook(name, monkeypatch):
    book = nbformat.read(NOTEBOOKS / name, as_version=4)
    assert all(not cell.get("outputs") for cell in book.cells if cell.cell_type == "code")  # stored cleared
    monkeypatch.setenv("PYTHONPATH", str(NOTEBOOKS.parent))  # this checkout's stein_torch in the kernel
    client = nbclient.NotebookClient(book, timeout=TIMEOUT_S, kernel_name="python3",
                                     resources={"metadata": {"path": str(NOTEBOOKS)}})
    client.execute()
    return "\n".join(
        out.get("text", "") for cell in book.cells if cell.cell_type == "code" for out in cell.outputs
    )


def test_quickstart(monkeypatch):
    printed = run_notebook("quickstart.ipynb", monkeypatch)
    found = re.search(r"per extra hour of light: ([0-9.]+) \+/- ([0-9.]+)", printed)
    estimate, sd = float(found.group(1)), float(found.group(2))
    assert abs(estimate - 0.12) < 3 * sd  # generated with 0.12 per hour (the notebook's own data)
    assert "elpd_loo" in printed


def test_bayesian_network(monkeypatch):
    printed = run_notebook("bayesian_network.ipynb", monkeypatch)
    found = re.search(r"noise scale: ([0-9.]+) .*inside the 90% band: ([0-9.]+)", printed)
    noise, covered = float(found.group(1)), float(found.group(2))
    assert 0.18 < noise < 0.33  # generated with 0.25 (120 points: a few tenths of relative error)
    assert 0.8 <= covered <= 0.99  # nominal 0.9 on the fitted points (common practice: in-sample bands)


def test_predictive_checks(monkeypatch):
    printed = run_notebook("predictive_checks.ipynb", monkeypatch)
    found = re.search(r"slope: ([0-9.]+) \+/- ([0-9.]+)", printed)
    estimate, sd = float(found.group(1)), float(found.group(2))
    assert abs(estimate - 1.1) < 3 * sd  # generated with 1.1 kWh per sunshine hour (the notebook's own data)
    # scipy.stats.kstest in the notebook: LOO-PIT of the model the data come from is close to uniform
    assert float(re.search(r"per-building model: p = ([0-9.]+)", printed).group(1)) > 0.05
    # the building-level check rejects the shared level and not the model the data come from
    assert "per-building model: building p-values" in printed and "outside [0.025, 0.975]: 0 of 8" in printed
    outside = int(re.search(r"shared-level model: building p-values .* outside \[0.025, 0.975\]: (\d) of 8", printed).group(1))
    assert outside >= 3
    for group in ("posterior_predictive", "prior_predictive", "prior"):
        assert f"'{group}'" in printed

"""The kernel study's robust findings, on a reduced run (1-D mixture, start near equilibrium).

W1 against the exact mixture law by scipy.stats.wasserstein_distance (weighted fine grid of the
closed-form density). What the full study (``stein-torch bench kernels``, seeds 0 and 1) found
robustly, asserted here; it did NOT find the published two-orders-of-magnitude gain of exponents 1
and 0.5 over the RBF ("On the geometry of Stein variational gradient descent", arXiv:1912.00894,
from memory): exponent 1 gained about one order (the RBF stalls with the wrong mode weights),
exponent 0.5 lost to both (stiff, slow).
"""

import os

import pytest

from stein_torch.benchmarks import kernels as study


@pytest.fixture(scope="module")
def final_w1():
    out = {}
    for seed in (0, 1):
        records, baselines = study.run_study(steps=150, checkpoints=3, particles=80, targets=["mixture1d"],
                                             starts=("near",), bandwidths=("median",), seed=seed, log=lambda s: None)
        start = {r["kernel"]: r["w1"] for r in records if r["step"] == 0}
        final = {r["kernel"]: r["w1"] for r in records}  # last record per kernel wins
        out[seed] = (start, final, baselines["mixture1d"])
    return out


@pytest.mark.parametrize("seed", [0, 1])
def test_laplace_and_matern_kernels_beat_the_rbf_on_the_mixture(final_w1, seed):
    start, final, _ = final_w1[seed]
    assert final["gexp1"] < final["rbf"], final
    assert final["matern1.5"] < final["rbf"], final
    assert final["tw-matern1.5"] < 0.5 * final["rbf"], final


@pytest.mark.parametrize("seed", [0, 1])
def test_exponent_half_is_slower_than_exponent_one(final_w1, seed):
    start, final, _ = final_w1[seed]
    assert final["gexp0.5"] > 2 * final["gexp1"], final


@pytest.mark.parametrize("seed", [0, 1])
def test_smooth_and_rough_kernels_improve_on_an_iid_sample(final_w1, seed):
    start, final, base = final_w1[seed]
    for k in ("rbf", "gexp1", "matern1.5", "tw-matern1.5"):
        assert final[k] < start[k] and final[k] < base["iid"], (k, final, base)


def test_benchmark_entry_point_rejects_bad_arguments():
    with pytest.raises(SystemExit):
        study.main(["--steps", "0"])


@pytest.mark.slow
def test_notebook_executes():
    import nbclient  # test extras: a missing one fails the test, never skips it
    import nbformat

    path = os.path.join(os.path.dirname(__file__), "..", "notebooks", "kernel_choice.ipynb")
    nb = nbformat.read(path, as_version=4)
    nbclient.NotebookClient(nb, timeout=600, kernel_name="python3").execute()
    text = "".join(o.get("text", "") for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", []))
    assert "rbf" in text and "records" in text

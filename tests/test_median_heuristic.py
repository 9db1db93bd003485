"""The median-heuristic bandwidth against scipy's pairwise distances."""

import math

import numpy as np
import pytest
import torch
from scipy.spatial.distance import pdist

from stein_torch.kernels.bandwidth import MEDIAN_PAIRS, median_bandwidth


@pytest.mark.parametrize("dtype, rel", [(torch.float64, 1e-12), (torch.float32, 1e-5)])
@pytest.mark.parametrize("offset", [0.0, 100.0])
def test_all_pairs_median_matches_scipy_pdist(dtype, rel, offset):
    # reference: scipy.spatial.distance.pdist (squared Euclidean over all pairs i < j); the rule
    # h = med / log(N + 1) with the lower median ("Stein Variational Gradient Descent", arXiv:1608.04471)
    g = torch.Generator().manual_seed(0)
    x = offset + torch.randn(3, 80, 5, generator=g, dtype=torch.float64)  # 3160 pairs: all of them
    got = median_bandwidth(x.to(dtype))
    for b in range(3):
        d2 = np.sort(pdist(x[b].numpy(), "sqeuclidean"))
        want = d2[(len(d2) - 1) // 2] / math.log(80 + 1)
        assert float(got[b]) == pytest.approx(want, rel=rel)


def test_random_pairs_median_is_close_to_the_all_pairs_median():
    # above MEDIAN_PAIRS pairs a random subset is used; its median is within sampling error of the
    # all-pairs median (scipy pdist). Standard error of a sample median, 1 / (2 f(m) sqrt(P)):
    # about 1.2 % here for P = 4096 pairs and d2 ~ 2 chi2_4 (common practice), so 5 % is about four.
    g = torch.Generator().manual_seed(1)
    n = 600
    assert n * (n - 1) // 2 > MEDIAN_PAIRS
    x = torch.randn(1, n, 4, generator=g, dtype=torch.float64)
    want = np.median(pdist(x[0].numpy(), "sqeuclidean")) / math.log(n + 1)
    got = float(median_bandwidth(x, torch.Generator().manual_seed(2))[0])
    assert got == pytest.approx(want, rel=0.05)

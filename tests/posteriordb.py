"""The eight posteriordb reference posteriors for the tests: models, data and reference draws.

The files are vendored in the repository's ``shared/posteriordb`` (posteriordb, BSD-3; see the
README and LICENSE there) and read through :mod:`stein_torch.benchmarks.reference_data`, which checks
each file against the SHA-256 sums recorded at vendoring. The torch models live in
:mod:`stein_torch.benchmarks.reference_models` so that ``stein-torch bench accuracy`` works from an
installed package too. ``STEIN_TORCH_POSTERIORS`` points both at another copy.

Cite in tests as: "posteriordb reference posterior <name> (posteriordb, BSD-3)".
"""

from __future__ import annotations

import pytest

from stein_torch.benchmarks.reference_data import (  # noqa: F401 - re-exported for the tests
    NAMES,
    ReferenceDataError,
    compare_moments,
    load_data,
    load_reference,
    locate,
    reference_moments,
    verify,
)
from stein_torch.benchmarks.reference_models import Model, model  # noqa: F401


def require_posteriors() -> None:
    """Fail the calling test (never skip) when the vendored reference posteriors are missing or damaged.

    They ship with the repository, so their absence is a broken checkout, not an optional extra.
    """
    try:
        verify()
    except ReferenceDataError as err:
        pytest.fail(str(err))

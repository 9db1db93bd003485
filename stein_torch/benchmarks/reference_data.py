"""The eight posteriordb reference posteriors: where they are, whether they are intact, their draws.

The files (data and reference draws from posteriordb, BSD-3) are vendored in the repository's
``shared/posteriordb/`` folder, one sub-folder per posterior, with ``SHA256SUMS`` recorded when they
were vendored. :func:`locate` finds the folder, in this order:

1. a folder given explicitly (``stein-torch bench accuracy --posteriors DIR``);
2. the environment variable ``STEIN_TORCH_POSTERIORS``;
3. ``shared/posteriordb`` beside the package (a source checkout or an editable install);
4. ``shared/posteriordb`` in the current folder (a wheel install run from a checkout).

Every file is checked against ``SHA256SUMS`` (when the folder has one) before it is read; a missing,
damaged or unreadable file raises :class:`ReferenceDataError` naming it.
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
import pathlib
import re
import zipfile
from typing import Mapping

import numpy as np

__all__ = [
    "NAMES", "ENV_VAR", "ReferenceDataError", "locate", "verify", "load_data", "load_reference",
    "reference_moments", "compare_moments", "read_checksums",
]

ENV_VAR = "STEIN_TORCH_POSTERIORS"
CHECKSUMS = "SHA256SUMS"
FILES = ("data.json.zip", "reference_draws.json.zip", "reference_info.json", "posterior.json")
NAMES = [
    "eight_schools-eight_schools_noncentered",
    "kidiq-kidscore_momhsiq",
    "sblri-blr",
    "low_dim_gauss_mix-low_dim_gauss_mix",
    "arK-arK",
    "garch-garch11",
    "gp_pois_regr-gp_regr",
    "diamonds-diamonds",
]
_BESIDE_PACKAGE = pathlib.Path(__file__).resolve().parents[2] / "shared" / "posteriordb"


class ReferenceDataError(RuntimeError):
    """The reference posteriors are missing, damaged or unreadable."""


def _candidates(folder=None) -> list[tuple[str, pathlib.Path]]:
    if folder is not None:
        return [("the folder given", pathlib.Path(folder))]
    found = []
    if os.environ.get(ENV_VAR):
        return [(f"${ENV_VAR}", pathlib.Path(os.environ[ENV_VAR]))]
    found.append(("the repository's shared/posteriordb beside the package", _BESIDE_PACKAGE))
    found.append(("shared/posteriordb in the current folder", pathlib.Path.cwd() / "shared" / "posteriordb"))
    return found


def locate(folder=None) -> pathlib.Path:
    """The folder of the reference posteriors (see the module docstring for the search order).

    Raises
    ------
    ReferenceDataError
        No candidate folder holds all eight posteriors; the message lists where it looked.
    """
    tried = []
    for how, path in _candidates(folder):
        path = path.expanduser().resolve()
        missing = [n for n in NAMES if not (path / n).is_dir()]
        if not missing:
            return path
        tried.append(f"{path} ({how}: missing {', '.join(missing) if len(missing) < len(NAMES) else 'all eight'})")
    raise ReferenceDataError(
        "reference posteriors not found; looked in " + "; ".join(tried) + ". They ship in the repository's "
        f"shared/posteriordb folder: run from a source checkout, or set {ENV_VAR} to that folder"
    )


def read_checksums(folder) -> dict[str, str]:
    """``SHA256SUMS`` of ``folder`` as relative path -> hex digest ({} when the folder has none)."""
    path = pathlib.Path(folder) / CHECKSUMS
    if not path.is_file():
        return {}
    sums = {}
    for number, line in enumerate(path.read_text().splitlines(), 1):
        match = re.fullmatch(r"([0-9a-f]{64}) [ *](\S+)", line.strip())
        if not match:
            raise ReferenceDataError(f"{path}, line {number}: expected '<sha256>  <file>', got {line!r}")
        sums[match.group(2)] = match.group(1)
    return sums


def sha256(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


@functools.lru_cache(maxsize=None)
def _verified(folder: pathlib.Path, relative: str) -> pathlib.Path:
    path = folder / relative
    if not path.is_file():
        raise ReferenceDataError(f"reference posteriors: {path} is missing")
    expected = read_checksums(folder).get(relative)
    if expected is not None and sha256(path) != expected:
        raise ReferenceDataError(
            f"reference posteriors: {path} is damaged (its SHA-256 differs from the one recorded in "
            f"{folder / CHECKSUMS}); restore it, e.g. with 'git checkout -- {relative}' in shared/posteriordb"
        )
    return path


def verify(folder=None) -> pathlib.Path:
    """Check every file of every posterior against ``SHA256SUMS``; return the folder."""
    root = locate(folder)
    for name in NAMES:
        for file in FILES:
            _verified(root, f"{name}/{file}")
    return root


def _check_name(name: str) -> None:
    if name not in NAMES:
        raise ValueError(f"name must be one of {NAMES}, got {name!r}")


def _read_zipped_json(path: pathlib.Path):
    try:
        with zipfile.ZipFile(path) as archive:
            return json.loads(archive.read(archive.namelist()[0]))
    except (zipfile.BadZipFile, json.JSONDecodeError, IndexError, KeyError, UnicodeDecodeError) as err:
        raise ReferenceDataError(f"reference posteriors: {path} is unreadable ({type(err).__name__}: {err})") from None


@functools.lru_cache(maxsize=None)
def _data_cached(root: pathlib.Path, name: str) -> dict:
    return _read_zipped_json(_verified(root, f"{name}/data.json.zip"))


def load_data(name: str, folder=None) -> dict:
    """Data of posterior ``name``: the JSON object stored in ``data.json.zip`` (lists and numbers)."""
    _check_name(name)
    return dict(_data_cached(locate(folder), name))


@functools.lru_cache(maxsize=None)
def _reference_cached(root: pathlib.Path, name: str) -> dict[str, np.ndarray]:
    chains = _read_zipped_json(_verified(root, f"{name}/reference_draws.json.zip"))
    columns = {key: np.concatenate([np.asarray(c[key], dtype=np.float64) for c in chains]) for key in chains[0]}
    grouped: dict[str, dict[int, np.ndarray]] = {}
    result: dict[str, np.ndarray] = {}
    for key, values in columns.items():
        match = re.fullmatch(r"(\w+)\[(\d+)\]", key)
        if match:
            grouped.setdefault(match.group(1), {})[int(match.group(2))] = values
        else:
            result[key] = values
    for base, parts in grouped.items():
        result[base] = np.stack([parts[i] for i in sorted(parts)], axis=-1)
    for array in result.values():
        array.setflags(write=False)
    return result


def load_reference(name: str, folder=None) -> dict[str, np.ndarray]:
    """Reference draws of posterior ``name``, all chains concatenated in chain order.

    Returns
    -------
    dict
        Parameter name -> read-only array of shape ``(n_draws,)`` for scalars or ``(n_draws, k)`` for
        indexed names (``beta[1]..beta[k]`` become ``beta``). Chain ``c`` of the 10 chains of 1000 draws
        occupies rows ``1000 * c : 1000 * (c + 1)``.
    """
    _check_name(name)
    return dict(_reference_cached(locate(folder), name))


def reference_moments(name: str, folder=None) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per-parameter reference mean and standard deviation (ddof=1), each of the parameter's shape."""
    return {key: (draws.mean(axis=0), draws.std(axis=0, ddof=1)) for key, draws in load_reference(name, folder).items()}


def compare_moments(draws: Mapping[str, np.ndarray], name: str, folder=None) -> dict[str, dict[str, float]]:
    """Compare draws with the reference moments of posterior ``name``.

    Parameters
    ----------
    draws : mapping
        Reference parameter name -> array of shape ``(n_draws, *shape)`` (apply the model's
        ``derived`` first). Every reference parameter must be present.
    name : str
        One of :data:`NAMES`.

    Returns
    -------
    dict
        Parameter name -> ``{"mean_error": max |mean - ref mean| / ref sd, "sd_ratio_min": min sd / ref
        sd, "sd_ratio_max": max sd / ref sd}`` over the parameter's coordinates.
    """
    result = {}
    for key, (ref_mean, ref_sd) in reference_moments(name, folder).items():
        if key not in draws:
            raise ValueError(f"draws must contain every reference parameter of {name}; missing {key!r}, got {sorted(draws)}")
        values = np.asarray(draws[key], dtype=np.float64)
        if values.ndim < 1 or values.shape[1:] != ref_mean.shape or values.shape[0] < 2:
            raise ValueError(f"draws[{key!r}] must have shape (n_draws >= 2, *{ref_mean.shape}), got {values.shape}")
        mean_error = np.abs(values.mean(axis=0) - ref_mean) / ref_sd
        sd_ratio = values.std(axis=0, ddof=1) / ref_sd
        result[key] = {"mean_error": float(np.max(mean_error)), "sd_ratio_min": float(np.min(sd_ratio)),
                       "sd_ratio_max": float(np.max(sd_ratio))}
    return result

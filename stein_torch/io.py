"""Files: atomic writes, checkpoints and saved results, loaded without running code.

Every file is written next to its destination under a temporary name, flushed, ``fsync``-ed and
moved into place with :func:`os.replace` (atomic on POSIX and Windows), and the folder is
``fsync``-ed, so a crash or kill at any moment leaves either the previous file or the new one,
never a torn one. A hard kill can leave a stray ``.<name>.*.tmp`` file beside it; it is never read.

Checkpoints and saved results hold only tensors, numbers, strings, lists and dicts, and are read
with ``torch.load(..., weights_only=True)``, which refuses any other object instead of
unpickling it, so a crafted file cannot run code on load.

Examples
--------
>>> import stein_torch as st
>>> with st.io.atomic_write("summary.txt", "w") as f:      # doctest: +SKIP
...     f.write("done\\n")
>>> state = st.io.load_checkpoint("run.pt")                 # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import numbers
import os
import pickle
import secrets
import warnings
from typing import Any, Iterator, Mapping

import numpy as np
import torch

__all__ = [
    "atomic_write",
    "atomic_path",
    "save_checkpoint",
    "load_checkpoint",
    "save_netcdf",
    "save_figure",
]

CHECKPOINT_FORMAT = "stein_torch.checkpoint"
FORMAT_VERSION = 2  # 2: latents and history (version 1 files are not read)


# ---------------------------------------------------------------------- atomic files
def check_output_path(path, argname: str) -> str:
    """Validate a destination path before any work starts: str or PathLike, folder exists."""
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"{argname}: expected a file path (str or os.PathLike), got {type(path).__qualname__}")
    path = os.fspath(path)
    if isinstance(path, bytes):
        path = os.fsdecode(path)
    if not path or path.endswith(os.sep):
        raise ValueError(f"{argname}: expected a file path, got {path!r}")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise ValueError(f"{argname}: folder {folder!r} does not exist")
    if os.path.isdir(path):
        raise ValueError(f"{argname}: {path!r} is a folder, expected a file path")
    if not os.access(folder, os.W_OK):
        raise ValueError(f"{argname}: folder {folder!r} is not writable")
    return path


def _fsync_folder(folder: str) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # e.g. Windows cannot open folders; the rename is still atomic there
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_path(path) -> Iterator[str]:
    """Give a temporary path beside ``path``; on success move it into place atomically.

    For writers that take a file name (``xarray``/``arviz`` ``to_netcdf``, ``matplotlib``
    ``savefig``). The temporary name keeps the suffix of ``path`` so format detection by suffix
    still works. On an exception the temporary file is removed and ``path`` is untouched.

    Parameters
    ----------
    path : str or os.PathLike
        Destination.

    Yields
    ------
    str
        Temporary path in the same folder.
    """
    path = check_output_path(path, "path")
    folder, name = os.path.split(os.path.abspath(path))
    suffix = os.path.splitext(name)[1]
    tmp = os.path.join(folder, f".{name}.{secrets.token_hex(6)}.tmp{suffix}")
    try:
        yield tmp
        with open(tmp, "rb+") as f:  # data written by a third-party writer: make it durable
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.remove(tmp)
        raise
    _fsync_folder(folder)


@contextlib.contextmanager
def atomic_write(path, mode: str = "wb", **open_kwargs):
    """Open a temporary file beside ``path`` for writing; on success flush, fsync and rename it.

    Parameters
    ----------
    path : str or os.PathLike
        Destination; replaced only when the ``with`` block finishes without an exception.
    mode : {"wb", "w"}, default="wb"
        Binary or text.
    **open_kwargs
        Passed to :func:`open` (e.g. ``encoding="utf-8"``).

    Yields
    ------
    file object

    Examples
    --------
    >>> with atomic_write("table.csv", "w", encoding="utf-8") as f:   # doctest: +SKIP
    ...     f.write("a,b\\n1,2\\n")
    """
    if mode not in ("wb", "w"):
        raise ValueError(f"atomic_write: mode must be 'wb' or 'w', got {mode!r}")
    with atomic_path(path) as tmp:
        with open(tmp, mode, **open_kwargs) as f:
            yield f
            f.flush()
            os.fsync(f.fileno())


# ---------------------------------------------------------------------- plain data
def to_plain(obj, where: str = "state"):
    """Copy ``obj`` into what ``torch.load(weights_only=True)`` accepts, or raise TypeError.

    Tensors, None, bool, int, float, str, and lists, tuples and dicts of them (dict keys str or
    int). NumPy arrays and scalars are converted to tensors and Python numbers.
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, torch.Tensor):
        return obj.detach().cpu().clone()  # a copy: views would drag their whole storage along
    if isinstance(obj, np.ndarray):
        if obj.dtype == object:
            raise TypeError(f"{where}: numpy arrays of Python objects cannot be stored safely")
        return torch.from_numpy(np.ascontiguousarray(obj))
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, numbers.Integral):
        return int(obj)
    if isinstance(obj, numbers.Real):
        return float(obj)
    if isinstance(obj, (list, tuple)):
        items = [to_plain(v, f"{where}[{i}]") for i, v in enumerate(obj)]
        return items if isinstance(obj, list) else tuple(items)
    if isinstance(obj, Mapping):
        out = {}
        for k, v in obj.items():
            if isinstance(k, bool) or not isinstance(k, (str, int)):
                raise TypeError(f"{where}: dict keys must be str or int, got {type(k).__qualname__} ({k!r})")
            out[k] = to_plain(v, f"{where}[{k!r}]")
        return out
    if isinstance(obj, torch.dtype):
        return str(obj).replace("torch.", "")
    raise TypeError(
        f"{where}: cannot store a {type(obj).__qualname__} in a checkpoint; state_dict() must return "
        "only tensors, numbers, strings, lists and dicts"
    )


def _safe_load(path, argname: str) -> Any:
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"{argname}: expected a file path (str or os.PathLike), got {type(path).__qualname__}")
    path = os.fspath(path)
    if not os.path.exists(path):
        raise FileNotFoundError(f"{argname}: no file at {path!r}")
    if os.path.isdir(path):
        raise ValueError(f"{argname}: {path!r} is a folder, expected a file")
    try:
        with warnings.catch_warnings():  # foreign files trigger torch's pickle-protocol notice
            warnings.simplefilter("ignore", UserWarning)
            return torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as err:
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise ValueError(
            f"{argname}: refusing to load {path!r}: it holds objects other than tensors, numbers, strings, "
            f"lists and dicts, which could run code when unpickled ({first[:200]})"
        ) from None
    except Exception as err:  # junk makes the restricted unpickler fail in many ways (IndexError, EOFError...)
        raise ValueError(
            f"{argname}: {path!r} is not a readable stein_torch file (truncated or not a torch file: "
            f"{type(err).__name__}: {str(err)[:200]})"
        ) from None


def _check_format(obj, expected: tuple[str, ...], path, argname: str) -> dict:
    if not isinstance(obj, dict) or obj.get("format") not in expected:
        kind = obj.get("format") if isinstance(obj, dict) else type(obj).__name__
        raise ValueError(f"{argname}: {os.fspath(path)!r} is not a stein_torch {' or '.join(expected)} file (found {kind!r})")
    version = obj.get("version")
    if isinstance(version, int) and version < FORMAT_VERSION:
        raise ValueError(
            f"{argname}: {os.fspath(path)!r} has format version {version}, written by an older stein_torch; "
            f"this one reads version {FORMAT_VERSION} (rerun the sampler)"
        )
    if not isinstance(version, int) or version > FORMAT_VERSION:
        raise ValueError(
            f"{argname}: {os.fspath(path)!r} has format version {version!r}; this stein_torch reads up to "
            f"{FORMAT_VERSION} (upgrade stein_torch)"
        )
    return obj


# ---------------------------------------------------------------------- checkpoints
def save_checkpoint(path, state: Mapping) -> None:
    """Write a sampler state (a sampler's ``state_dict()``) atomically.

    Parameters
    ----------
    path : str or os.PathLike
    state : dict
        Tensors, numbers, strings, lists and dicts only (TypeError otherwise, before writing).
    """
    save_plain(path, {"format": CHECKPOINT_FORMAT, "version": FORMAT_VERSION, **state}, "checkpoint")


def load_checkpoint(path, argname: str = "resume") -> dict:
    """Read a checkpoint safely (``weights_only=True``); ValueError names ``argname`` on any problem."""
    return _check_format(_safe_load(path, argname), (CHECKPOINT_FORMAT,), path, argname)


# ---------------------------------------------------------------------- other plain files
def save_plain(path, obj: Mapping, where: str) -> None:
    """Write a dict of plain data (see :func:`to_plain`) atomically as a torch file."""
    plain = to_plain(dict(obj), where)
    with atomic_write(path, "wb") as f:
        torch.save(plain, f)


def load_plain(path, expected: tuple[str, ...], argname: str) -> dict:
    """Read a file written by :func:`save_plain` or :func:`save_checkpoint` safely, checking that its
    ``format`` is one of ``expected``."""
    return _check_format(_safe_load(path, argname), expected, path, argname)


def save_netcdf(idata, path) -> str:
    """Write an :class:`arviz.InferenceData` to ``path`` as NetCDF (h5netcdf engine), atomically."""
    with atomic_path(path) as tmp:
        idata.to_netcdf(tmp, engine="h5netcdf")
    return str(path)


def save_figure(figure, path, *, dpi: int = 110) -> str:
    """Write a matplotlib figure to ``path`` as PNG, atomically."""
    with atomic_path(path) as tmp:
        figure.savefig(tmp, format="png", dpi=dpi, bbox_inches="tight")
    return str(path)


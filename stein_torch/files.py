"""Writing results to disk atomically: a reader never sees a half-written file.

Each writer puts the bytes into a temporary file in the destination folder, flushes and fsyncs it,
then renames it over the destination with :func:`os.replace` (atomic on POSIX and Windows when both
paths are on one file system), and finally fsyncs the folder so the rename itself survives a crash.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Callable, Iterator

__all__ = ["atomic_path", "save_netcdf", "save_figure"]


@contextlib.contextmanager
def atomic_path(destination: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path next to ``destination``; on success move it there atomically.

    The caller writes the complete file to the yielded path. On an exception the temporary file is
    removed and ``destination`` is left as it was.
    """
    destination = Path(destination)
    folder = destination.parent if str(destination.parent) else Path(".")
    fd, tmp_name = tempfile.mkstemp(prefix=f".{destination.name}.", suffix=".tmp", dir=folder)
    os.close(fd)
    tmp = Path(tmp_name)
    os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual permissions of a new file
    try:
        yield tmp
        with open(tmp, "rb+") as handle:  # the writer may have closed its own handle: sync ours
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, destination)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise
    _fsync_folder(folder)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _fsync_folder(folder: Path) -> None:
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


def _write_with(writer: Callable[[Path], object], destination) -> Path:
    destination = Path(destination)
    with atomic_path(destination) as tmp:
        writer(tmp)
    return destination


def save_netcdf(idata, path: str | os.PathLike) -> Path:
    """Write an :class:`arviz.InferenceData` to ``path`` as NetCDF (h5netcdf engine), atomically.

    Returns
    -------
    Path
        The destination.
    """
    return _write_with(lambda tmp: idata.to_netcdf(str(tmp), engine="h5netcdf"), path)


def save_figure(figure, path: str | os.PathLike, *, dpi: int = 110) -> Path:
    """Write a matplotlib figure to ``path`` as PNG, atomically.

    Returns
    -------
    Path
        The destination.
    """
    return _write_with(lambda tmp: figure.savefig(tmp, format="png", dpi=dpi, bbox_inches="tight"), path)

"""Results on disk: a safe torch file (read back by :func:`stein_torch.load`) or NetCDF for ArviZ."""

from __future__ import annotations

from .. import io

__all__ = ["save_result", "RESULT_FORMAT"]

RESULT_FORMAT = "stein_torch.result"


def save_result(result, path) -> None:
    """Write ``result`` atomically: ``*.nc`` as NetCDF of its InferenceData, anything else as a torch
    file of tensors, numbers, strings, lists and dicts only."""
    path = io.check_output_path(path, "path")
    if path.endswith(".nc"):
        io.save_netcdf(result.to_inference_data(), path)
        return
    io.save_plain(path, {
        "format": RESULT_FORMAT,
        "version": io.FORMAT_VERSION,
        "target": result.target.signature(),
        "particles": result.particles,
        "lp": result.lp,
        "history": result.history,
        "settings": result.settings,
        "stop_reason": result.stop_reason,
        "sample_stats": result.sample_stats,
        "warnings": result.warnings,
    }, "result")

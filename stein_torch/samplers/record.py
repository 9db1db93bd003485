"""What an SVGD run keeps for its warnings: what the set-up found and the particles' moments.

The warnings (:mod:`stein_torch.samplers.diagnostics`) read the mode search's outcome (modes kept,
searches that ran away, evaluations used) and the mean and log sd of every unconstrained coordinate
recorded every few steps. :class:`RunRecord` is a stateful part of the sampler, so checkpoints carry
it and a resumed run warns as the uninterrupted one would.
"""

from __future__ import annotations

from typing import Callable, Mapping

import numpy as np

from ..result import Result
from .diagnostics import run_warnings
from .precondition import Affine

__all__ = ["RunRecord", "svgd_result", "svgd_result_from_state"]


class RunRecord:
    """Set-up outcome and moment records of a run.

    Attributes
    ----------
    setup : dict
        ``setup_evals`` (score evaluations of the mode search), ``modes`` (modes kept), ``runaways``,
        ``starts`` (searches made), ``mode_counts`` (starting particles per kept mode).
    modes : list of (Tensor (d,), Affine)
        The kept modes and their Laplace maps (for the mode-mass check).
    moments : list of (int, Tensor (B, d), Tensor (B, d))
        (step, mean, log sd) of the unconstrained coordinates.
    """

    def __init__(self, particles: int):
        self.setup = {"setup_evals": 0, "modes": 1, "runaways": 0, "starts": 1, "mode_counts": [particles]}
        self.modes: list = []
        self.moments: list = []

    def note_start(self, start, particles: int) -> None:
        """Keep what :func:`stein_torch.samplers.setup.starting_points` found."""
        if start.search is None:
            return
        kept = start.search.kept(particles)
        self.modes = [(m.z, m.affine) for m in kept]
        self.setup = {"setup_evals": start.search.evaluations, "modes": len(kept), "runaways": start.search.runaways,
                      "starts": start.search.starts, "mode_counts": list(start.mode_counts or [])}

    def note_moments(self, step: int, moments: Callable[[], tuple]) -> None:
        """Record the moments of the particles after ``step`` steps (once per step); ``moments()``
        gives their mean and log sd (B, d) (:meth:`stein_torch.samplers.monitor.Watch.moments`), asked
        only when the step is not recorded yet."""
        if not self.moments or self.moments[-1][0] != step:
            self.moments.append((int(step), *moments()))

    def state_dict(self) -> dict:
        return {
            "setup": dict(self.setup),
            "modes": {"z": [z.clone() for z, _ in self.modes], "affine": [a.state_dict() for _, a in self.modes]},
            "moments": {"steps": [s for s, _, _ in self.moments], "mean": [m.clone() for _, m, _ in self.moments],
                        "log_sd": [v.clone() for _, _, v in self.moments]},
        }

    def load_state_dict(self, state: dict) -> None:
        missing = {"setup", "modes", "moments"} - set(state)
        if missing:
            raise ValueError(f"RunRecord.load_state_dict: state is missing keys {sorted(missing)}")
        self.setup = dict(state["setup"])
        modes = state["modes"]
        self.modes = [(z, Affine.from_state_dict(a)) for z, a in zip(modes["z"], modes["affine"])]
        rec = state["moments"]
        self.moments = [(int(s), m, v) for s, m, v in zip(rec["steps"], rec["mean"], rec["log_sd"])]


def svgd_result(sampler) -> Result:
    """The current particles of an SVGD :class:`~stein_torch.samplers.svgd.Sampler` as a Result, with
    its settings, history and warnings."""
    z = sampler.affine.to_z(sampler.u).detach()
    lp = sampler.lp.detach().clone()
    data = sampler.data_stream
    if data is not None and data.batch_size is not None:  # report the full-data log density
        from ..model.data import full_log_prob

        lp = sampler.axis.gather(full_log_prob(sampler.target, z[:, sampler.axis.rows]))
    history = {k: np.asarray(v) for k, v in sampler.history.items()}
    settings = {
        "method": "svgd", "kernel": repr(sampler.kernel), "stepper": repr(sampler.stepper), "steps": sampler.step_count,
        "particles": sampler.n, "ensembles": sampler.ensembles, "precondition": str(sampler.precondition),
        "seed": sampler.seed, "dtype": str(sampler.dtype).replace("torch.", ""), "grad_evals": sampler.grad_evals,
        "anneal": repr(sampler.anneal), "stop_rule": repr(sampler.stop_rule),
        "ksd": sampler.ksd().cpu().tolist(),  # final KSD per ensemble, whitened coordinates
        "threads": str(sampler.threads), **{k: v for k, v in sampler.record.setup.items() if k != "mode_counts"},
    }
    if data is not None:
        settings["batch_size"] = str(data.batch_size)
    return Result(sampler.target, z, lp, history, settings, sampler.stop_reason, warnings=run_warnings(sampler, z))


def svgd_result_from_state(target, state: Mapping) -> Result:
    """The particles of an SVGD checkpoint as a :class:`Result` (no set-up, no step)."""
    affine = Affine.from_state_dict(state["affine"])
    z = affine.to_z(state["u"])
    history = {k: np.asarray(v) for k, v in state["history"].items()}
    settings = {**state["settings"], "method": "svgd", "steps": state["step"], "grad_evals": state["grad_evals"]}
    return Result(target, z, state["lp"], history, settings, state.get("stop_reason", "checkpoint"))

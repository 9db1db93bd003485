"""Stein variational gradient descent: the stateful :class:`Sampler` and the one-call :func:`svgd`.

Data flow: Target -> set-up (whitening, starting particles) -> loop of
[scores -> SVGD direction -> step rule, faults contained] -> Result.
"""

from __future__ import annotations

import math
import warnings
from typing import Callable, Mapping

import numpy as np
import torch

from .. import io
from ..checks import check_int, check_type
from ..kernels import Kernel
from ..result import Result
from ..stein import Scratch, svgd_direction
from ..stein.ksd import default_ksd_kernel, ksd_from_sums, ksd_sums
from .axis import ParticleAxis
from .distributed import sharding
from .faults import CountsEvaluations, Evaluator, StuckEnsembleError, persistent_fault_message, shrink_faulty_steps
from .loop import append_history, check_run_options, run_loop
from .monitor import Watch
from .precondition import Affine, covariance_affine, rewhiten_due
from .record import RunRecord, svgd_result, svgd_result_from_state
from .schedules import as_drive
from .setup import configure, starting_points
from .state import check_common, common_state, plain_repr, read_affine, restore_common, restore_parts, state_tensor
from .steppers import as_stepper
from .stopping import KSDPlateau, StopRule, as_stop_rule
from .svgd_defaults import default_kernel, default_stepper
from .threads import choose_threads, run_threads

__all__ = ["svgd", "Sampler", "default_kernel", "default_stepper"]

FAULT_PATIENCE = 25  # consecutive steps in which faults kept a whole ensemble from moving before the run gives up
DEFAULT_STEPS = 1000  # most steps of a default run (the stop rule ends it when the particles have settled)
KSD_EVERY = 10  # steps between KSD records (and the moment records the warnings read)


class Sampler(CountsEvaluations):
    """Stateful SVGD run: ``step()``, ``run(steps)``, ``state_dict()``, ``result()``.

    Parameters are those of :func:`svgd`; ``state`` (a :meth:`state_dict`) continues a saved run
    without recomputing its set-up; ``axis`` shares the particles between processes (set by
    ``svgd(distributed=...)``, see :mod:`stein_torch.samplers.distributed`).
    """

    name = "svgd"
    finished_reason = "steps"

    def __init__(
        self,
        target,
        particles: int = 200,
        *,
        kernel: Kernel | None = None,
        stepper=None,
        ensembles: int = 1,
        init=None,
        dtype: torch.dtype = torch.float64,
        precondition: str | None = "auto",
        seed: int | None = None,
        device=None,
        state: Mapping | None = None,
        anneal=None,
        stop: StopRule | KSDPlateau | bool | None = None,
        threads: int | None = None,
        axis: ParticleAxis | None = None,
    ):
        setup = configure(target, init=init, dtype=dtype, precondition=precondition, seed=seed, device=device, state=state)
        self.target, self.dtype, self.device = setup.target, setup.dtype, setup.device
        self.seed, self.generator, self.precondition = setup.seed, setup.generator, setup.precondition
        self.precondition_asked = setup.precondition  # the setting; precondition: what the set-up could do
        self.n = check_int(particles, "particles")
        self.ensembles = check_int(ensembles, "ensembles")
        self.threads = choose_threads(self.ensembles, self.n, target.dim, threads)  # torch threads during the run
        defaults = target.defaults
        if kernel is None and defaults.kernel is not None:
            kernel = defaults.kernel()
        if stepper is None and defaults.stepper is not None:
            stepper = defaults.stepper
        self.kernel = default_kernel() if kernel is None else check_type(kernel, "kernel", Kernel, "stein_torch kernel (st.kernels.*)")
        self.stepper = default_stepper() if stepper is None else as_stepper(stepper)
        self.axis = ParticleAxis(self.n) if axis is None else axis  # sharded runs: set by svgd(distributed=)
        self.evaluate = Evaluator(self.target)
        self.scratch = Scratch()  # pairwise buffers reused by every step's direction and KSD
        self.data_stream = target.data  # its state_dict makes checkpoints resume the minibatches
        if self.data_stream is not None:  # minibatch shuffles: their own stream from the seed
            self.data_stream.start(torch.Generator().manual_seed(self.seed + 1))
        self.stop_rule = as_stop_rule(stop)
        self.ksd_every = KSD_EVERY
        self.anneal = anneal
        self.drive: Callable[[int], float] = as_drive(anneal)
        self.stop_reason = self.finished_reason
        self.step_count = 0
        self.history: dict[str, list] = {}
        self._fault_streak, self.last_fault_error = 0, None
        self._last_velocity_eval = None  # (u, lp, score, bad) of the latest velocity call
        self.record = RunRecord(self.n)  # what the warnings read (set-up outcome, moments every KSD_EVERY steps)
        if state is None:
            with run_threads(self.threads):
                evaluate = lambda u, affine, first=False: self._evaluate(u, affine=affine, first=first)  # noqa: E731
                start = starting_points(setup, evaluate, (self.ensembles, self.n))
            self.affine, self.laplace_ok, self.u, self.lp, self.score = start.affine, start.laplace_ok, start.u, start.lp, start.score
            self.precondition = start.precondition
            self.record.note_start(start, self.n)
            self.stepper.bind(self.u)
        else:  # resuming: the set-up (mode, whitening) comes from the checkpoint, not recomputed
            self.load_state_dict(state, argname="resume")

    # ------------------------------------------------------------------ evaluation and direction
    def _evaluate(self, u: torch.Tensor, mask: torch.Tensor | None = None, *, affine=None, first: bool = False):
        """Log density, whitened score and faults of all particles u (B, N, d); this process
        evaluates its own rows, the axis gathers the rest (and the count is that of all rows)."""
        rows, count = self.axis.rows, self.evaluate.count
        local_mask = None if mask is None else mask[:, rows]
        lp, score, bad = self.evaluate(u[:, rows], self.affine if affine is None else affine, mask=local_mask, first=first)
        self.evaluate.count = count + (u.shape[:-1].numel() if mask is None else int(mask.sum()))
        return self.axis.gather_many(lp, score, bad)

    def direction(self, u: torch.Tensor, score: torch.Tensor, lp: torch.Tensor) -> torch.Tensor:
        """The SVGD direction (B, N, d) at particles u with whitened scores."""
        # no generator: the median heuristic uses its fixed pairs (no step-to-step bandwidth jitter)
        local = svgd_direction(
            u, score, self.kernel, drive=self.drive(self.step_count), log_prob=lp, rows=self.axis.rows,
            scratch=self.scratch,
        )
        return self.axis.gather(local)

    def _velocity(self, u):
        lp, score, bad = self._evaluate(u)
        self._last_velocity_eval = (u, lp, score, bad)
        phi = self.direction(u, score, lp)
        return torch.where(bad[..., None], torch.full_like(phi, float("nan")), phi)

    def ksd(self) -> torch.Tensor:
        """KSD (V-statistic, IMQ c = 1, beta = -1/2, h = 1) of each ensemble on the whitened
        coordinates u, shape (ensembles,); see :mod:`stein_torch.samplers.stopping`."""
        pairs, diagonal = ksd_sums(self.u, self.score, default_ksd_kernel(), rows=self.axis.rows, scratch=self.scratch)
        return ksd_from_sums(self.axis.sum(pairs), self.axis.sum(diagonal), self.n)

    # ------------------------------------------------------------------ stepping
    def step(self) -> None:
        """One SVGD step with fault containment (reject and shrink the step of faulty particles)."""
        data = self.data_stream
        if data is None or data.batch_size is None:
            return self._step()
        with data.next_batch():  # scores of this step on the next minibatch (stochastic SVGD)
            self._step()

    def _step(self) -> None:
        drive = self.drive(self.step_count)
        phi = self.direction(self.u, self.score, self.lp)
        # one Watch per step: the moment record and the stop rule share its z and moments (computed on demand)
        watch = Watch(self.u, self.score, phi, self.affine, self.stepper.step_size, self.ksd, self.axis.rows, self.axis.sum)
        if self.step_count % KSD_EVERY == 0:
            self.record.note_moments(self.step_count, watch.moments)
        if self.stop_rule is not None and self.stop_rule.check(self.step_count, watch):  # before moving the particles
            self.stop_reason = self.stop_rule.reason
            return
        self._last_velocity_eval = None
        u_new = self.stepper.step(self.u, phi, self._velocity)
        cached, self._last_velocity_eval = self._last_velocity_eval, None
        if cached is not None and cached[0] is u_new:  # multi-stage steppers end on the new point
            lp, score, bad = (t.clone() for t in cached[1:])
        else:
            lp, score, bad = self._evaluate(u_new)
        faults = int(bad.sum())
        u_new, lp, score, put_back = shrink_faulty_steps(
            self.u, self.lp, self.score, u_new, lp, score, bad, lambda u, mask: self._evaluate(u, mask=mask)
        )
        reverted = int(put_back.sum())
        self._fault_streak = self._fault_streak + 1 if bool(put_back.all(-1).any()) else 0  # a whole ensemble kept in place
        if faults:
            self.last_fault_error = self.evaluate.last_error
        else:
            self.evaluate.last_error = None
        if self._fault_streak >= FAULT_PATIENCE:
            message = persistent_fault_message(self.step_count + 1, FAULT_PATIENCE, faults, reverted, bad.numel(),
                                               self.evaluate.last_error)
            self.stop_reason = "faults"
            raise StuckEnsembleError(message, self.result()) from self.evaluate.last_error
        self.u, self.lp, self.score = u_new, lp, score
        self.step_count += 1
        rewhiten = self.precondition in ("laplace", "covariance") and rewhiten_due(self.step_count)
        self._record(phi=phi, faults=faults, reverted=reverted, drive=drive, rewhitened=rewhiten)
        if rewhiten:
            self.rewhiten()

    def rewhiten(self) -> None:
        """Whiten by the particles' current mean and covariance (per ensemble); positions unchanged.

        The new coordinates make the particle set look standard normal, so the kernel's isotropic
        bandwidth fits the posterior's shape even where the curvature at the mode did not. The step
        rule restarts (its state referred to the old coordinates).
        """
        z = self.affine.to_z(self.u)
        score_z = self.affine.score_z(self.score)
        self.affine = covariance_affine(self.u, self.affine)
        self.u = self.affine.to_u(z)
        self.score = self.affine.score_u(score_z)
        self.stepper.rebind(self.u)
        if hasattr(self.stop_rule, "restart"):
            self.stop_rule.restart(self.step_count)

    def _record(self, **figures):
        row = {
            "lp": float(self.lp.mean()),
            "step_size": self.stepper.step_size,
            "phi_rms": float(torch.linalg.vector_norm(figures["phi"])) / math.sqrt(figures["phi"].numel()),
            "faults": figures["faults"],
            "reverted": figures["reverted"],
            "grad_evals": self.grad_evals,
            "drive": figures["drive"],
            "rewhitened": bool(figures["rewhitened"]),  # re-whitened after this step (result.plot_history marks it)
        }
        row.update({k: v for k, v in self.stepper.info().items() if k not in row})  # e.g. rejections, error
        if self.kernel.last_bandwidth is not None:
            row["bandwidth"] = float(self.kernel.last_bandwidth.mean())
        if self.step_count % self.ksd_every == 0:  # KSD on whitened coordinates, from the scores at hand
            row["ksd"] = self.ksd().cpu().numpy()
        else:
            row["ksd"] = np.full(self.ensembles, np.nan)
        append_history(self.history, row)

    def stop_together(self, requested: bool) -> bool:
        """Whether any process sharing this run asks to stop (see :meth:`ParticleAxis.agree`)."""
        return self.axis.agree(requested, self.u)

    def progress_figures(self) -> dict | None:
        """Figures for the progress bar after a KSD check (else None)."""
        if self.step_count % self.ksd_every:
            return None
        return {"lp": f"{self.history['lp'][-1]:.4g}", "step": f"{self.stepper.step_size:.3g}",
                "ksd": f"{float(np.max(self.history['ksd'][-1])):.3g}"}

    def run(self, steps: int, progress: bool | None = None, *, checkpoint=None, checkpoint_every: int | None = None) -> "Sampler":
        """Take ``steps`` more steps (see :func:`stein_torch.samplers.loop.run_loop`), with the run's
        torch threads (:mod:`stein_torch.samplers.threads`)."""
        with run_threads(self.threads):
            run_loop(self, steps, progress=progress, checkpoint=checkpoint, checkpoint_every=checkpoint_every)
        return self

    # ------------------------------------------------------------------ state
    def settings(self) -> dict:
        """Settings a continued run must share with the saved one."""
        return {
            "particles": self.n, "ensembles": self.ensembles, "dtype": str(self.dtype).replace("torch.", ""),
            "precondition": str(self.precondition_asked), "seed": self.seed, "kernel": plain_repr(self.kernel),
            "stepper": plain_repr(self.stepper),
        }

    def state_dict(self) -> dict:
        """Everything needed to continue this run bit for bit: particles (``u`` (B, N, d) whitened),
        log densities ``lp`` (B, N), whitened scores ``score`` (B, N, d), the whitening ``affine``,
        counters, the generator, the history, and every part's ``state_dict()`` (kernel, stepper,
        stop rule, minibatch stream, ...). Tensors, numbers, strings, lists and dicts only."""
        state = common_state(self, self.settings())
        state.update({
            "u": self.u.detach().clone(), "lp": self.lp.detach().clone(), "score": self.score.detach().clone(),
            "affine": self.affine.state_dict(), "laplace_ok": bool(self.laplace_ok), "fault_streak": self._fault_streak,
            "precondition": str(self.precondition),
        })
        return state

    def load_state_dict(self, state: Mapping, *, argname: str = "state") -> None:
        """Continue from :meth:`state_dict`; the target and run settings must match (ValueError)."""
        parts = check_common(self, state, self.settings(), ("u", "lp", "score", "affine", "laplace_ok", "fault_streak"), argname)
        shape = (self.ensembles, self.n, self.target.dim)
        u, lp, score = (state_tensor(state, k, s, argname, self.dtype, self.device)
                        for k, s in (("u", shape), ("lp", shape[:2]), ("score", shape)))
        affine = read_affine(state["affine"], self.ensembles, self.target.dim, f"{argname}['affine']", self.dtype, self.device)
        restore_common(self, state)
        self.affine, self.laplace_ok = affine, bool(state["laplace_ok"])
        self.u, self.lp, self.score = u, lp, score
        self._fault_streak = int(state["fault_streak"])
        if state.get("precondition") in ("laplace", "covariance", "None"):
            self.precondition = None if state["precondition"] == "None" else state["precondition"]
        self.stepper.bind(self.u)
        restore_parts(state, parts)  # the step rule's own state after bind()

    def save(self, path) -> None:
        """Write :meth:`state_dict` to ``path`` atomically (see :mod:`stein_torch.io`); in a sharded
        run only rank 0 writes (every rank holds the same state)."""
        if self.axis.rank == 0:
            io.save_checkpoint(path, self.state_dict())

    # ------------------------------------------------------------------ output
    def result(self) -> Result:
        """The current particles as a :class:`Result`, with the run's warnings."""
        return svgd_result(self)

    result_from_state = staticmethod(svgd_result_from_state)  # a checkpoint as a Result (no set-up, no step)


def svgd(
    target,
    particles: int = 200,
    steps: int = DEFAULT_STEPS,
    *,
    kernel: Kernel | None = None,
    stepper=None,
    ensembles: int = 1,
    init=None,
    dtype: torch.dtype = torch.float64,
    precondition: str | None = "auto",
    progress: bool | None = None,
    seed: int | None = None,
    device=None,
    checkpoint=None,
    checkpoint_every: int | None = None,
    resume=None,
    anneal=None,
    stop: StopRule | KSDPlateau | bool | None = None,
    threads: int | None = None,
    distributed=None,
) -> Result:
    """Draw posterior particles by Stein variational gradient descent.

    Parameters
    ----------
    target : Target
        The model (see :class:`stein_torch.Target`).
    particles : int, default=200
        Particles per ensemble.
    steps : int, default=1000
        Most SVGD steps; the stop rule usually ends the run much earlier (a warning says when it
        did not).
    kernel : Kernel, optional
        Default ``IMQ() + Linear(radius=2.0)`` (median-heuristic bandwidth, moment-matching
        linear part; see :func:`default_kernel`), or the target's declared default (module
        targets: ``RBF()``).
    stepper : Stepper or callable, optional
        A :mod:`torch.optim` factory such as ``functools.partial(torch.optim.Adam, lr=0.05)``, or a
        :class:`~stein_torch.samplers.steppers.Stepper`. Default: gradient steps of 0.1 in whitened
        coordinates with a per-particle move cap of 0.3 (:func:`default_stepper`).
    ensembles : int, default=1
        Independent particle sets, run batched as one (ensembles, particles, dim) tensor; they become
        the chains of the InferenceData, so ``arviz.rhat`` compares them.
    init : {None, "prior", "laplace"}, Tensor or dict, optional
        Starting particles. None / "laplace": draws from the Laplace approximation at the mode
        (with Laplace preconditioning, L-BFGS runs from several starts and the particles are split
        among the modes kept in proportion to their Laplace masses; a standard normal on the
        unconstrained space without whitening or when no mode is found). "prior": prior draws
        (targets from :meth:`Target.from_priors`). A tensor (flat targets) or dict name -> tensor of
        constrained values, shape (particles, ...) or (ensembles, particles, ...).
    dtype : torch.dtype, default=torch.float64
        float64 or float32.
    precondition : {"auto", "laplace", "covariance", None}, default="auto"
        "laplace": find the mode by L-BFGS, whiten coordinates by the curvature there and start
        from that Laplace approximation; then re-whiten by the particles' own mean and covariance
        (per ensemble) at steps 25, 50, 100, 200 and 400. "covariance": the re-whitening only.
        "auto": "laplace" up to 1000 coordinates, "covariance" above. None: plain coordinates.
        A target's declared default wins under "auto" (module targets: None).
    progress : bool, optional
        Show a tqdm bar (mean log density, step size, KSD); default on when stderr is a terminal.
    seed : int, optional
        Same seed, same draws.
    device : str or torch.device, optional
        "cpu" (default) or an available CUDA device.
    checkpoint : str or os.PathLike, optional
        File to write the sampler state to, atomically (temporary file, fsync, rename): every
        ``checkpoint_every`` steps, when interrupted, and at the end.
    checkpoint_every : int, optional
        Steps between checkpoints (default 100).
    resume : str or os.PathLike, optional
        Continue the run saved in this checkpoint up to ``steps`` steps in total. The set-up (mode,
        whitening) is restored from the file, not recomputed; ``init`` is ignored. Target and
        settings must be those of the saved run; the draws are then bit for bit those of an
        uninterrupted run. Loading never executes code from the file.
    anneal : callable, optional
        Annealing schedule ``step -> drive`` in [0, 1] scaling the score term of the update, e.g.
        ``st.schedules.linear(300)`` (see :mod:`stein_torch.samplers.schedules`).
    stop : StopRule, KSDPlateau or bool, optional
        When to end the run before ``steps``: None or True -> the default
        :class:`~stein_torch.samplers.stopping.StopRule` (the particles have settled), False -> run
        all ``steps``, or a rule. The KSD of each ensemble (whitened coordinates) is recorded every
        10 steps in ``history["ksd"]`` (NaN between checks), the final one in ``settings["ksd"]``;
        ``stop_reason`` says why the run ended.
    threads : int, optional
        Torch intra-op threads during the run (the caller's setting is restored afterwards). Default:
        one below 4e9 pairwise multiply-adds per step (ensembles x particles^2 x coordinates), else
        the caller's setting (:mod:`stein_torch.samplers.threads`).
    distributed : {None, False, True, "particles", "data"} or Sharding, optional
        Share the run between the processes of a torch.distributed group (``torchrun``; see
        docs/distributed.md): "particles" (or True) splits the particles, "data" the observations.
        Results match one process to rounding; rank 0 writes checkpoints and issues the warnings;
        every rank returns the Result.

    Returns
    -------
    Result
        ``draws`` (name -> (ensembles, particles, *shape), constrained), ``history``, ``warnings``,
        ``to_inference_data()``, ``summary()``, ``stop_reason`` ("steps", a stop rule's reason, or
        "interrupted" after Ctrl-C: the first press finishes the current step and returns, a second
        one aborts).

    Warns
    -----
    RuntimeWarning
        Each of ``Result.warnings`` (why the result may be wrong and what to do).

    Raises
    ------
    StuckEnsembleError
        (a FloatingPointError) The log density was NaN/inf (or raised) for every particle of an
        ensemble in 25 consecutive steps; ``.result`` holds the run so far (also in the checkpoint).
        Particles held at such a region while others move are a warning, not an error.
    """
    steps, progress, checkpoint, _ = check_run_options(steps, progress, checkpoint, checkpoint_every)
    state = io.load_checkpoint(resume, "resume") if resume is not None else None
    same = dict(particles=particles, steps=steps, kernel=kernel, stepper=stepper, ensembles=ensembles, init=init,
                dtype=dtype, precondition=precondition, seed=seed, anneal=anneal, stop=stop, threads=threads,
                resume=None if state is None else (state.get("step"), state.get("u")))
    with sharding(distributed, target, particles=particles, seed=seed, resume=resume, device=device, settings=same) as shard:
        sampler = Sampler(
            shard.target, particles, kernel=kernel, stepper=stepper, ensembles=ensembles, init=init, dtype=dtype,
            precondition=precondition, seed=shard.seed, device=device, state=state, anneal=anneal, stop=stop,
            threads=threads, axis=shard.axis,
        )
        if sampler.step_count > steps:
            raise ValueError(f"steps: the checkpoint is already at step {sampler.step_count}, beyond steps={steps}")
        sampler.run(steps - sampler.step_count, progress=progress and shard.lead, checkpoint=checkpoint,
                    checkpoint_every=checkpoint_every)
        with run_threads(sampler.threads):
            result = shard.finish(sampler.result())
    for message in result.warnings if shard.lead else ():
        if message != target.evaluation_warning:  # that one was issued at the user's line already
            warnings.warn(message, RuntimeWarning, stacklevel=2)
    return result

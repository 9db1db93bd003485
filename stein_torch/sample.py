"""The SVGD loop: set-up (mode, whitening, initial particles), steps with fault containment, result.

Data flow: Target -> coordinates (whitening) -> loop of [scores -> SVGD direction -> stepper] -> Result.
"""

from __future__ import annotations

import math
import sys
import warnings
from typing import Callable, Mapping

import numpy as np
import torch

from . import io
from .checks import check_device, check_int
from .interrupts import InterruptGuard
from .kernels import IMQ, Kernel, Linear
from .precondition import LAPLACE_MAX_DIM, Affine, covariance_affine, default_start, laplace_whitening
from .result import Result
from .schedules import as_drive
from .state import capture_state, restore_state
from .stein import Scratch, ksd, svgd_direction
from .steppers import GradientStep, Stepper, as_stepper
from .stopping import StopRule, as_stop_rule
from .target import Target

__all__ = ["sample", "Sampler", "default_kernel", "default_stepper"]

MAX_BACKTRACK = 10  # halvings of a faulty particle's step before it is put back where it was
FAULT_PATIENCE = 25  # consecutive steps with faults before the run gives up
DEFAULT_STEPS = 400  # most steps of a default run (the stop rule usually ends it at 300-400)
REWHITEN_FIRST = 25  # re-whiten by the particles' covariance at steps 25, 50, 100, 200, ...
PRECONDITIONS = ("auto", "laplace", "covariance", None)
CHECKPOINT_EVERY = 100  # steps between checkpoints when a checkpoint file is given


def default_kernel() -> Kernel:
    """IMQ with the median-heuristic bandwidth plus a saturating linear kernel on standardised
    coordinates (radius 2).

    Chosen on the reference posteriors (see the README's accuracy table): the linear part keeps the
    spread in higher dimension (moment matching), the IMQ's long range keeps isolated particles
    coupled to the rest, and the saturation keeps heavy tails from being pushed outwards.
    """
    return IMQ() + Linear(radius=2.0)


def default_stepper() -> Stepper:
    """Plain gradient steps of 0.1 in whitened coordinates, no particle moving more than 0.3 a step.

    Steps proportional to the direction converge to the fixed point; per-coordinate adaptive rules
    (Adam, RMSprop) keep a jitter of the size of their step and, on heavy-tailed posteriors, were
    seen to let tail particles wander (README, "Choosing the defaults").
    """
    return GradientStep(0.1, max_move=0.3)


_check_count = check_int


class Sampler:
    """Stateful SVGD run; :func:`sample` is the one-call interface.

    Parameters are those of :func:`sample`.
    """

    def __init__(
        self,
        target: Target,
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
        stop: StopRule | bool | None = None,
    ):
        if not isinstance(target, Target):
            raise TypeError(f"target must be a stein_torch.Target, got {type(target).__qualname__}")
        self.target = target
        hints = getattr(target, "sampler_hints", {})  # a target's preferred settings (e.g. module targets)
        if init is None:
            init = hints.get("init")
        if kernel is None and "kernel" in hints:
            kernel = hints["kernel"]()
        if stepper is None and "stepper" in hints:
            stepper = hints["stepper"]()
        if precondition == "auto":
            precondition = hints.get("precondition", "auto")
        self.n = _check_count(particles, "particles")
        self.ensembles = _check_count(ensembles, "ensembles")
        if kernel is not None and not isinstance(kernel, Kernel):
            raise TypeError(f"kernel must be a stein_torch kernel (st.kernels.*), got {type(kernel).__qualname__}")
        self.kernel = default_kernel() if kernel is None else kernel
        self.stepper = default_stepper() if stepper is None else as_stepper(stepper)
        if dtype not in (torch.float32, torch.float64):
            raise TypeError(f"dtype must be torch.float64 or torch.float32, got {dtype!r}")
        self.dtype = dtype
        self.device = check_device(device)
        if not (precondition is None or isinstance(precondition, str)) or precondition not in PRECONDITIONS:
            raise ValueError(f"precondition must be one of {PRECONDITIONS}; got {precondition!r}")
        if precondition == "auto":
            precondition = "laplace" if target.dim <= LAPLACE_MAX_DIM else "covariance"
        self.precondition = precondition
        if state is not None and not isinstance(state, Mapping):
            raise TypeError(f"state must be a dict from Sampler.state_dict(), got {type(state).__qualname__}")
        if seed is None and state is not None and isinstance(state.get("settings"), Mapping):
            seed = state["settings"].get("seed")  # resuming without a seed: keep the checkpoint's
        if seed is not None:
            _check_count(seed, "seed", minimum=0)
            if seed >= 2**64:
                raise ValueError(f"seed == {seed}, must be < 2**64")
        self.seed = int(seed) if seed is not None else int(torch.seed() % (2**63))
        self.generator = torch.Generator().manual_seed(self.seed)
        self._scratch = Scratch()  # pairwise buffers reused by every step's direction and KSD
        self.data_stream = getattr(target, "data", None)  # its state_dict makes checkpoints resume the minibatches
        if self.data_stream is not None:  # minibatch shuffles: their own stream from the seed
            self.data_stream.start(torch.Generator().manual_seed(self.seed + 1))
        self.init = init
        self.stop_rule = as_stop_rule(stop)
        self.ksd_every = self.stop_rule.every if self.stop_rule is not None else 10
        self.stop_reason = "steps"
        self.step_count = 0
        self.grad_evals = 0
        self.anneal = anneal
        self.drive: Callable[[int], float] = as_drive(anneal)
        self._last_velocity_eval = None  # (u, lp, score, bad) of the latest velocity call
        self._trace: dict[str, list] = {}
        self._fault_streak = 0
        self._last_error: BaseException | None = None
        if state is None:
            self._setup()
        else:  # resuming: the set-up (mode, whitening) comes from the checkpoint, not recomputed
            self.load_state_dict(state, argname="resume")

    # ------------------------------------------------------------------ set-up
    def _setup(self):
        t, dim = self.target, self.target.dim
        user_init = self._user_init()
        self.affine = Affine.identity(dim, self.dtype, self.device)
        self.laplace_ok = False
        if self.precondition == "laplace":
            start = user_init.reshape(-1, dim).mean(0) if user_init is not None else default_start(t, self.dtype, self.device)
            affine, self.laplace_ok = laplace_whitening(t, start)
            if affine is not None:
                self.affine = affine
        shape = (self.ensembles, self.n, dim)
        if user_init is not None:
            u = self.affine.to_u(user_init)
        elif self.init == "prior":
            draws = t.draw_initial(self.ensembles * self.n, self.generator)
            z = t.unconstrain(draws, "init").to(self.dtype).reshape(shape)
            u = self.affine.to_u(z)
        else:  # draws from the Laplace approximation (or a standard normal around the origin)
            u = torch.randn(shape, generator=self.generator, dtype=self.dtype).to(self.device)
        lp, score, bad = self._evaluate(u, first=True)
        for _ in range(20):
            if not bad.any():
                break
            if user_init is not None or self.init == "prior":
                raise ValueError(
                    f"init: {int(bad.sum())} of {bad.numel()} initial particles have a non-finite log density "
                    "or score; start them inside the region where the model is defined"
                )
            u = torch.where(bad[..., None], 0.5 * u, u)  # pull faulty Laplace draws towards the mode
            lp, score, bad = self._evaluate(u)
        if bad.any():
            raise FloatingPointError(
                "init: the log density is not finite around the mode; check the model for NaN/inf "
                f"({int(bad.sum())} of {bad.numel()} starting points faulty)"
            )
        self.u, self.lp, self.score = u, lp, score
        self.stepper.bind(u)

    def _user_init(self):
        init, t = self.init, self.target
        if init is None or (isinstance(init, str) and init in ("prior", "laplace")):
            if init == "prior" and t.initial is None:
                raise ValueError('init="prior" needs a target built with Target.from_priors')
            return None
        if isinstance(init, str):
            raise ValueError(f"init must be None, 'prior', 'laplace', a tensor or a dict of tensors; got {init!r}")
        z = t.init_to_free(init, self.dtype, self.device)
        if z.dim() == 2 and self.ensembles == 1:
            z = z[None]
        if tuple(z.shape[:-1]) != (self.ensembles, self.n):
            raise ValueError(
                f"init: expected leading shape (particles,) = ({self.n},) or (ensembles, particles) = "
                f"({self.ensembles}, {self.n}); got {tuple(z.shape[:-1])}"
            )
        return z

    # ------------------------------------------------------------------ evaluation
    def _evaluate(self, u: torch.Tensor, mask: torch.Tensor | None = None, first: bool = False):
        """Log density, whitened score and a fault mask for particles u (B, N, d).

        A particle is faulty when its position, log density or score is not finite, or when the
        user's function raises for it. With ``mask`` (B, N) only the masked particles are evaluated
        (the others come back NaN). With ``first`` (the initial particles), an error raised for
        every particle is a bug in the model, not a region fault, and is re-raised.
        """
        z = self.affine.to_z(u)
        zs = z if mask is None else z[mask]
        try:
            lp_s, sz_s = self.target.log_prob_and_score(zs)
        except Exception as err:
            lp_s, sz_s, raised = self._evaluate_one_by_one(zs)
            if first and bool(raised.all()):
                raise
            self._last_error = err
        self.grad_evals += zs.shape[:-1].numel()
        if mask is None:
            lp, sz = lp_s, sz_s
        else:
            lp = torch.full(z.shape[:-1], float("nan"), dtype=z.dtype, device=z.device)
            sz = torch.full_like(z, float("nan"))
            lp[mask], sz[mask] = lp_s, sz_s
        # NaN/inf anywhere in a particle's log density, position or score reaches the sum t, and
        # t - t is then NaN, not 0 (a sum that overflows, |values| near 1e308, counts as faulty too)
        total = lp + sz.sum(-1) + z.sum(-1)
        bad = (total - total) != 0
        return lp, self.affine.score_u(sz), bad

    def _evaluate_one_by_one(self, z):
        """Isolate the particles on which the user's function raises (fault path only)."""
        flat = z.reshape(-1, z.shape[-1])
        lp = torch.full(flat.shape[:-1], float("nan"), dtype=z.dtype, device=z.device)
        score = torch.full_like(flat, float("nan"))
        raised = torch.zeros(flat.shape[:-1], dtype=torch.bool, device=z.device)
        for i in range(flat.shape[0]):
            try:
                lp[i : i + 1], score[i : i + 1] = self.target.log_prob_and_score(flat[i : i + 1])
            except Exception:
                raised[i] = True
        return lp.reshape(z.shape[:-1]), score.reshape(z.shape), raised.reshape(z.shape[:-1])

    def direction(self, u, score, lp) -> torch.Tensor:
        """The SVGD direction at particles u (B, N, d) with whitened scores."""
        # no generator: the median heuristic uses its fixed pairs (no step-to-step bandwidth jitter)
        return svgd_direction(u, score, self.kernel, drive=self.drive(self.step_count), log_prob=lp, scratch=self._scratch)

    def _velocity(self, u):
        lp, score, bad = self._evaluate(u)
        self._last_velocity_eval = (u, lp, score, bad)
        phi = self.direction(u, score, lp)
        return torch.where(bad[..., None], torch.full_like(phi, float("nan")), phi)

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
        self._last_velocity_eval = None
        u_new = self.stepper.step(self.u, phi, self._velocity)
        cached, self._last_velocity_eval = self._last_velocity_eval, None
        if cached is not None and cached[0] is u_new:  # multi-stage steppers end on the new point
            lp, score, bad = (t.clone() for t in cached[1:])
        else:
            lp, score, bad = self._evaluate(u_new)
        faults = int(bad.sum())
        for _ in range(MAX_BACKTRACK if faults else 0):
            if not bad.any():
                break
            u_new = torch.where(bad[..., None], 0.5 * (u_new + self.u), u_new)
            lp_b, score_b, bad_b = self._evaluate(u_new, mask=bad)
            lp = torch.where(bad, lp_b, lp)
            score = torch.where(bad[..., None], score_b, score)
            bad = bad & bad_b
        reverted = int(bad.sum()) if faults else 0
        if reverted:  # give up on this step for these particles: they stay where they were
            u_new = torch.where(bad[..., None], self.u, u_new)
            lp = torch.where(bad, self.lp, lp)
            score = torch.where(bad[..., None], self.score, score)
        self._fault_streak = self._fault_streak + 1 if faults else 0
        if not faults:
            self._last_error = None
        if self._fault_streak >= FAULT_PATIENCE:
            raise FloatingPointError(self._fault_message(faults, reverted, bad.numel())) from self._last_error
        self.u, self.lp, self.score = u_new, lp, score
        self.step_count += 1
        self._record(phi=phi, faults=faults, reverted=reverted, drive=drive)
        if self._rewhiten_due():
            self.rewhiten()

    def _rewhiten_due(self) -> bool:
        if self.precondition not in ("laplace", "covariance") or self.step_count < REWHITEN_FIRST:
            return False
        ratio = self.step_count // REWHITEN_FIRST
        return self.step_count % REWHITEN_FIRST == 0 and ratio & (ratio - 1) == 0

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

    def _fault_message(self, faults: int, reverted: int, total: int) -> str:
        last = self._last_error
        raised = f" Last error raised by the log density: {type(last).__name__}: {last}." if last else ""
        return (
            f"step {self.step_count + 1}: the log density or its score was NaN/inf (or raised) for some "
            f"particles in each of the last {FAULT_PATIENCE} steps; in this step {faults} of {total} "
            f"particles were faulty and {reverted} could not be moved even with a step shrunk "
            f"{2**MAX_BACKTRACK}-fold.{raised} Hint: give parameters with a restricted domain a "
            "constraint (st.Param(constraint=...)) so the sampler never leaves it, make the log density "
            "finite wherever it is called, or lower the step size."
        )

    def _record(self, **figures):
        row = {
            "lp": float(self.lp.mean()),
            "step_size": self.stepper.step_size,
            "phi_rms": float(torch.linalg.vector_norm(figures["phi"])) / math.sqrt(figures["phi"].numel()),
            "faults": figures["faults"],
            "reverted": figures["reverted"],
            "grad_evals": self.grad_evals,
            "drive": figures["drive"],
        }
        info = getattr(self.stepper, "last_info", None)  # e.g. Adaptive: rejections, error
        if isinstance(info, dict):
            row.update({k: v for k, v in info.items() if k not in row})
        h = _bandwidth(self.kernel)
        if h is not None:
            row["bandwidth"] = h
        if self.step_count % self.ksd_every == 0:  # KSD on whitened coordinates, from the scores at hand
            row["ksd"] = self.ksd().cpu().numpy()
            if self.stop_rule is not None and self.stop_rule.update(self.step_count, row["ksd"]):
                self.stop_reason = self.stop_rule.reason
        else:
            row["ksd"] = np.full(self.ensembles, np.nan)
        for k, v in row.items():
            self._trace.setdefault(k, []).append(v)

    def ksd(self) -> torch.Tensor:
        """KSD (V-statistic, IMQ c = 1, beta = -1/2, h = 1) of each ensemble on the whitened
        coordinates u, shape (ensembles,); see :mod:`stein_torch.stopping`."""
        return ksd(self.u, self.score, scratch=self._scratch)

    def run(
        self, steps: int, progress: bool | None = None, *, checkpoint=None, checkpoint_every: int | None = None
    ) -> "Sampler":
        """Take ``steps`` more steps, with a progress bar when ``progress`` (default: on a terminal).

        Ctrl-C stops after the current step with ``stop_reason = "interrupted"``; a second Ctrl-C
        raises KeyboardInterrupt. With ``checkpoint`` the state is written there atomically every
        ``checkpoint_every`` steps (default 100), on interruption and at the end.
        """
        steps = _check_count(steps, "steps", minimum=0)
        if checkpoint is not None:
            checkpoint = io.check_output_path(checkpoint, "checkpoint")
        every = CHECKPOINT_EVERY if checkpoint_every is None else _check_count(checkpoint_every, "checkpoint_every")
        if progress is None:
            progress = sys.stderr.isatty()
        from tqdm.auto import tqdm

        self.stop_reason = "steps"
        saved_at, consistent = None, True
        with InterruptGuard() as interrupt, tqdm(total=steps, desc="svgd", disable=not progress, leave=False) as bar:
            try:
                for _ in range(steps):
                    if interrupt.requested:
                        self.stop_reason = "interrupted"
                        break
                    self.step()
                    bar.update(1)
                    if self.step_count % self.ksd_every == 0:
                        bar.set_postfix(lp=f"{self._trace['lp'][-1]:.4g}", step=f"{self.stepper.step_size:.3g}",
                                        ksd=f"{float(np.max(self._trace['ksd'][-1])):.3g}")
                    if checkpoint is not None and self.step_count % every == 0:
                        self.save(checkpoint)
                        saved_at = self.step_count
                    if self.stop_reason != "steps":  # the stop rule fired
                        break
            except KeyboardInterrupt:  # not through the guard (no handler installed): maybe mid-step
                if interrupt.aborted:
                    raise
                self.stop_reason, consistent = "interrupted", False
            if checkpoint is not None and saved_at != self.step_count:
                if consistent:
                    self.save(checkpoint)
                else:
                    warnings.warn(
                        f"checkpoint: interrupted inside step {self.step_count + 1}; the optimizer state may be "
                        f"ahead of the particles, so {checkpoint!r} keeps the last state saved before it",
                        RuntimeWarning, stacklevel=2,
                    )
        return self

    # ------------------------------------------------------------------ state
    def state_dict(self) -> dict:
        """Everything needed to continue this run bit for bit (see :func:`stein_torch.state.capture_state`).

        Tensors, numbers, strings, lists and dicts only: particles, log densities and scores,
        whitening, step and evaluation counters, the torch.Generator state, the trace, and the
        ``state_dict()`` of every part that has one (kernel, stepper, stop rule, ...).
        """
        return capture_state(self)

    def load_state_dict(self, state_dict: Mapping, *, argname: str = "state") -> None:
        """Continue from :meth:`state_dict`; the target and run settings must match (ValueError)."""
        restore_state(self, state_dict, argname)

    def save(self, path) -> None:
        """Write :meth:`state_dict` to ``path`` atomically (see :mod:`stein_torch.io`)."""
        io.save_checkpoint(path, self.state_dict())

    # ------------------------------------------------------------------ output
    def result(self) -> Result:
        """The current particles as a :class:`Result`."""
        z = self.affine.to_z(self.u).detach()
        lp = self.lp.detach().clone()
        data = self.data_stream
        if data is not None and data.batch_size is not None:  # report the full-data log density
            from .data import full_log_prob

            lp = full_log_prob(self.target, z)
        trace = {k: np.asarray(v) for k, v in self._trace.items()}
        settings = {
            "method": "svgd",
            "kernel": repr(self.kernel),
            "stepper": repr(self.stepper),
            "steps": self.step_count,
            "particles": self.n,
            "ensembles": self.ensembles,
            "precondition": str(self.precondition),
            "seed": self.seed,
            "dtype": str(self.dtype).replace("torch.", ""),
            "grad_evals": self.grad_evals,
            "anneal": repr(self.anneal),
            "ksd": self.ksd().cpu().tolist(),  # final KSD per ensemble, whitened coordinates
            "stop_rule": repr(self.stop_rule),
        }
        if data is not None:
            settings["batch_size"] = str(data.batch_size)
        return Result(self.target, z, lp, trace, settings, getattr(self, "stop_reason", "steps"))


def _bandwidth(kernel) -> float | None:
    parts = getattr(kernel, "parts", (kernel,))
    for part in parts:
        h = getattr(part, "last_bandwidth", None)
        if h is not None:
            return float(h.mean())
    return None


def sample(
    target: Target,
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
    stop: StopRule | bool | None = None,
) -> Result:
    """Draw posterior particles by Stein variational gradient descent.

    Parameters
    ----------
    target : Target
        The model (see :class:`stein_torch.Target`).
    particles : int, default=200
        Particles per ensemble.
    steps : int, default=400
        Most SVGD steps; the stop rule may end the run earlier.
    kernel : Kernel, optional
        Default ``IMQ() + Linear(radius=2.0)`` (median-heuristic bandwidth, moment-matching
        linear part; see :func:`default_kernel`), or the target's preferred kernel (module
        targets: ``RBF()``).
    stepper : Stepper or callable, optional
        A :mod:`torch.optim` factory such as ``functools.partial(torch.optim.Adam, lr=0.05)``, or a
        :class:`~stein_torch.steppers.Stepper`. Default: gradient steps of 0.1 in whitened
        coordinates with a per-particle move cap of 0.3 (:func:`default_stepper`).
    ensembles : int, default=1
        Independent particle sets, run batched as one (ensembles, particles, dim) tensor; they become
        the chains of the InferenceData, so ``arviz.rhat`` compares them.
    init : {None, "prior", "laplace"}, Tensor or dict, optional
        Starting particles. None / "laplace": draws from the Laplace approximation at the mode
        (or a standard normal on the unconstrained space without whitening). "prior": prior draws
        (targets from :meth:`Target.from_priors`). A tensor (flat targets) or dict name -> tensor of
        constrained values, shape (particles, ...) or (ensembles, particles, ...).
    dtype : torch.dtype, default=torch.float64
        float64 or float32.
    precondition : {"auto", "laplace", "covariance", None}, default="auto"
        "laplace": find the mode by L-BFGS, whiten coordinates by the curvature there and start
        from that Laplace approximation; then re-whiten by the particles' own mean and covariance
        (per ensemble) at steps 25, 50, 100, 200, ... "covariance": the re-whitening only.
        "auto": "laplace" up to 1000 coordinates, "covariance" above. None: plain coordinates.
        A target's own preference wins under "auto" (module targets: None); ``init=None`` likewise
        takes the target's preferred start (module targets: "prior", fresh layer initialisations).
    progress : bool, optional
        Show a tqdm bar (step, mean log density, step size); default on when stderr is a terminal.
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
        ``st.schedules.linear(300)`` or ``st.schedules.cyclical(4, 100)``; for multimodal targets
        (see :mod:`stein_torch.schedules`; combine with ``precondition=None`` and a broad ``init``).
    stop : StopRule or bool, optional
        When to end the run before ``steps``: None or True -> the default
        :class:`~stein_torch.stopping.StopRule` (KSD plateau after at least 300 steps), False -> run
        all ``steps``, or a StopRule. The KSD of each ensemble (whitened coordinates) is recorded
        every ``stop.every`` steps (10 without a rule) in ``trace["ksd"]`` (NaN between checks), the
        final one in ``settings["ksd"]`` (InferenceData attrs ``ksd``); ``stop_reason`` says why
        the run ended ("steps", "ksd_plateau", "ksd_tolerance").

    Returns
    -------
    Result
        ``draws`` (name -> (ensembles, particles, *shape), constrained), ``trace``,
        ``to_inference_data()``, ``summary()``, ``stop_reason`` ("steps", or "interrupted" after
        Ctrl-C: the first press finishes the current step and returns, a second one aborts).

    Raises
    ------
    FloatingPointError
        The log density stayed NaN/inf (or raised) for some particles in 25 consecutive steps.
    """
    steps = _check_count(steps, "steps", minimum=0)
    if progress is not None and not isinstance(progress, (bool, np.bool_)):
        raise TypeError(f"progress must be True, False or None, got {type(progress).__qualname__} ({progress!r})")
    if checkpoint is not None:
        checkpoint = io.check_output_path(checkpoint, "checkpoint")
    if checkpoint_every is not None:
        if checkpoint is None:
            raise ValueError("checkpoint_every is set but checkpoint (the file to write) is not")
        _check_count(checkpoint_every, "checkpoint_every")
    state = io.load_checkpoint(resume, "resume") if resume is not None else None
    sampler = Sampler(
        target, particles, kernel=kernel, stepper=stepper, ensembles=ensembles, init=init, dtype=dtype,
        precondition=precondition, seed=seed, device=device, state=state, anneal=anneal, stop=stop,
    )
    if sampler.step_count > steps:
        raise ValueError(f"steps: the checkpoint is already at step {sampler.step_count}, beyond steps={steps}")
    sampler.run(steps - sampler.step_count, progress=progress, checkpoint=checkpoint, checkpoint_every=checkpoint_every)
    return sampler.result()


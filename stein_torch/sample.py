"""The SVGD loop: set-up (mode, whitening, initial particles), steps with fault containment, result.

Data flow: Target -> coordinates (whitening) -> loop of [scores -> SVGD direction -> stepper] -> Result.
"""

from __future__ import annotations

import functools
import math
import numbers
import sys
from typing import Callable, Mapping

import numpy as np
import torch

from .kernels import RBF, Kernel, Linear
from .precondition import Affine, default_start, find_mode, laplace_affine
from .result import Result
from .stein import ksd, svgd_direction
from .steppers import Stepper, as_stepper
from .stopping import StopRule, as_stop_rule
from .target import Target

__all__ = ["sample", "Sampler", "default_kernel", "default_stepper"]

MAX_BACKTRACK = 10  # halvings of a faulty particle's step before it is put back where it was
FAULT_PATIENCE = 25  # consecutive steps with faults before the run gives up
LAPLACE_MAX_DIM = 1000  # dense Hessian whitening up to this many coordinates


def default_kernel() -> Kernel:
    """RBF with the median heuristic plus a linear kernel on standardised coordinates."""
    return RBF() + Linear()


def default_stepper() -> Stepper:
    """Adam with step 0.05 in whitened coordinates (common practice for SVGD)."""
    return as_stepper(functools.partial(torch.optim.Adam, lr=0.05))


def _check_count(value, name: str, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an int, got {type(value).__qualname__} ({value!r})")
    if value < minimum:
        raise ValueError(f"{name} == {value}, must be >= {minimum}")
    return int(value)


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
        stop: StopRule | bool | None = None,
    ):
        if not isinstance(target, Target):
            raise TypeError(f"target must be a stein_torch.Target, got {type(target).__qualname__}")
        self.target = target
        self.n = _check_count(particles, "particles")
        self.ensembles = _check_count(ensembles, "ensembles")
        if kernel is not None and not isinstance(kernel, Kernel):
            raise TypeError(f"kernel must be a stein_torch kernel (st.kernels.*), got {type(kernel).__qualname__}")
        self.kernel = default_kernel() if kernel is None else kernel
        self.stepper = default_stepper() if stepper is None else as_stepper(stepper)
        if dtype not in (torch.float32, torch.float64):
            raise TypeError(f"dtype must be torch.float64 or torch.float32, got {dtype!r}")
        self.dtype = dtype
        self.device = torch.device(device) if device is not None else torch.device("cpu")
        if precondition not in ("auto", "laplace", None):
            raise ValueError(f"precondition must be one of 'auto', 'laplace', None; got {precondition!r}")
        if precondition == "auto":
            precondition = "laplace" if target.dim <= LAPLACE_MAX_DIM else None
        self.precondition = precondition
        if seed is not None:
            _check_count(seed, "seed", minimum=0)
        self.seed = int(seed) if seed is not None else int(torch.seed() % (2**63))
        self.generator = torch.Generator().manual_seed(self.seed)
        self.init = init
        self.stop_rule = as_stop_rule(stop)
        self.ksd_every = self.stop_rule.every if self.stop_rule is not None else 10
        self.stop_reason = "steps"
        self.step_count = 0
        self.grad_evals = 0
        self.drive: Callable[[int], float] = lambda step: 1.0
        self._trace: dict[str, list] = {}
        self._fault_streak = 0
        self._setup()

    # ------------------------------------------------------------------ set-up
    def _setup(self):
        t, dim = self.target, self.target.dim
        user_init = self._user_init()
        self.affine = Affine.identity(dim, self.dtype, self.device)
        self.laplace_ok = False
        if self.precondition == "laplace":
            start = user_init.reshape(-1, dim).mean(0) if user_init is not None else default_start(t, self.dtype, self.device)
            mode, ok = find_mode(t, start)
            if ok:
                self.affine, self.laplace_ok = laplace_affine(t, mode)
                self.affine.shift = mode
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
        if isinstance(init, torch.Tensor):
            if not t.flat:
                raise TypeError("init: a named-parameter target takes a dict name -> tensor of constrained values")
            init = {"x": init}
        if not isinstance(init, Mapping):
            raise TypeError(f"init: expected a tensor or dict of tensors, got {type(init).__qualname__}")
        z = t.unconstrain({k: torch.as_tensor(v, dtype=self.dtype) for k, v in init.items()}, "init")
        if z.dim() == 2 and self.ensembles == 1:
            z = z[None]
        if tuple(z.shape[:-1]) != (self.ensembles, self.n):
            raise ValueError(
                f"init: expected leading shape (particles,) = ({self.n},) or (ensembles, particles) = "
                f"({self.ensembles}, {self.n}); got {tuple(z.shape[:-1])}"
            )
        return z.to(self.dtype).to(self.device)

    # ------------------------------------------------------------------ evaluation
    def _evaluate(self, u: torch.Tensor, first: bool = False):
        """Log density, whitened score and a fault mask for particles u (..., d)."""
        z = self.affine.to_z(u)
        try:
            lp, score = self.target.log_prob_and_score(z)
        except (TypeError, ValueError):
            raise
        except Exception:
            if first:
                raise
            lp, score = self._evaluate_one_by_one(z)
        self.grad_evals += u.shape[:-1].numel()
        bad = ~(torch.isfinite(lp) & torch.isfinite(score).all(-1))
        return lp, self.affine.score_u(score), bad

    def _evaluate_one_by_one(self, z):
        """Isolate the particles on which the user's function raises (fault path only)."""
        flat = z.reshape(-1, z.shape[-1])
        lp = torch.full(flat.shape[:-1], float("nan"), dtype=z.dtype, device=z.device)
        score = torch.full_like(flat, float("nan"))
        for i in range(flat.shape[0]):
            try:
                lp[i : i + 1], score[i : i + 1] = self.target.log_prob_and_score(flat[i : i + 1])
            except Exception:
                pass
        return lp.reshape(z.shape[:-1]), score.reshape(z.shape)

    def direction(self, u, score, lp) -> torch.Tensor:
        """The SVGD direction at particles u (B, N, d) with whitened scores."""
        return svgd_direction(u, score, self.kernel, drive=self.drive(self.step_count), log_prob=lp, generator=self.generator)

    def _velocity(self, u):
        lp, score, bad = self._evaluate(u)
        phi = self.direction(u, score, lp)
        return torch.where(bad[..., None], torch.full_like(phi, float("nan")), phi)

    # ------------------------------------------------------------------ stepping
    def step(self) -> None:
        """One SVGD step with fault containment (reject and shrink the step of faulty particles)."""
        phi = self.direction(self.u, self.score, self.lp)
        u_new = self.stepper.step(self.u, phi, self._velocity)
        lp, score, bad = self._evaluate(u_new)
        faults = int(bad.sum())
        for _ in range(MAX_BACKTRACK):
            if not bad.any():
                break
            idx = bad.nonzero(as_tuple=True)
            u_new[idx] = 0.5 * (u_new[idx] + self.u[idx])
            lp_b, score_b, bad_b = self._evaluate(u_new[idx])
            lp[idx], score[idx] = lp_b, score_b
            bad = torch.zeros_like(bad)
            bad[idx] = bad_b
        if bad.any():  # give up on this step for these particles: they stay where they were
            u_new[bad], lp[bad], score[bad] = self.u[bad], self.lp[bad], self.score[bad]
        self._fault_streak = self._fault_streak + 1 if faults else 0
        if self._fault_streak >= FAULT_PATIENCE:
            raise FloatingPointError(
                f"step {self.step_count}: the log density or its gradient was NaN/inf (or raised) for "
                f"{faults} of {bad.numel()} particles in each of the last {FAULT_PATIENCE} steps. "
                "Hint: constrain parameters that have a restricted domain (st.Param(constraint=...)), "
                "or lower the step size."
            )
        self.u, self.lp, self.score = u_new, lp, score
        self.step_count += 1
        self._record(phi=phi, faults=faults)

    def _record(self, **figures):
        row = {
            "lp": float(self.lp.mean()),
            "step_size": self.stepper.step_size,
            "phi_rms": float(figures["phi"].pow(2).mean().sqrt()),
            "faults": figures["faults"],
            "grad_evals": self.grad_evals,
        }
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
        return ksd(self.u, self.score)

    def run(self, steps: int, progress: bool | None = None) -> "Sampler":
        """Take up to ``steps`` steps (fewer when the stop rule fires), with a progress bar when
        ``progress`` (default: when on a terminal). Sets :attr:`stop_reason`."""
        steps = _check_count(steps, "steps", minimum=0)
        self.stop_reason = "steps"
        if progress is None:
            progress = sys.stderr.isatty()
        from tqdm.auto import tqdm

        with tqdm(total=steps, desc="svgd", disable=not progress, leave=False) as bar:
            for _ in range(steps):
                self.step()
                bar.update(1)
                if self.step_count % self.ksd_every == 0:
                    bar.set_postfix(lp=f"{self._trace['lp'][-1]:.4g}", step=f"{self.stepper.step_size:.3g}",
                                    ksd=f"{float(np.max(self._trace['ksd'][-1])):.3g}")
                if self.stop_reason != "steps":
                    break
        return self

    # ------------------------------------------------------------------ output
    def result(self) -> Result:
        """The current particles as a :class:`Result`."""
        z = self.affine.to_z(self.u).detach()
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
            "ksd": self.ksd().cpu().numpy(),  # final KSD per ensemble, whitened coordinates
            "stop_rule": repr(self.stop_rule),
        }
        return Result(self.target, z, self.lp.detach().clone(), trace, settings, self.stop_reason)


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
    steps: int = 1000,
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
    stop: StopRule | bool | None = None,
) -> Result:
    """Draw posterior particles by Stein variational gradient descent.

    Parameters
    ----------
    target : Target
        The model (see :class:`stein_torch.Target`).
    particles : int, default=200
        Particles per ensemble.
    steps : int, default=1000
        Most SVGD steps; the stop rule may end the run earlier.
    kernel : Kernel, optional
        Default ``RBF() + Linear()`` (median-heuristic bandwidth, moment-matching linear part).
    stepper : Stepper or callable, optional
        A :mod:`torch.optim` factory such as ``functools.partial(torch.optim.Adam, lr=0.05)``, or a
        :class:`~stein_torch.steppers.Stepper`. Default: Adam, lr = 0.05 in whitened coordinates.
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
    precondition : {"auto", "laplace", None}, default="auto"
        "laplace": find the mode by L-BFGS and run SVGD in coordinates whitened by the curvature
        there. "auto": "laplace" up to 1000 coordinates, None above.
    progress : bool, optional
        Show a tqdm bar (step, mean log density, step size); default on when stderr is a terminal.
    seed : int, optional
        Same seed, same draws.
    stop : StopRule or bool, optional
        When to end the run before ``steps``: None or True -> the default
        :class:`~stein_torch.stopping.StopRule` (KSD plateau after at least 500 steps), False -> run
        all ``steps``, or a StopRule. The KSD of each ensemble (whitened coordinates) is recorded
        every ``stop.every`` steps (10 without a rule) in ``trace["ksd"]`` (NaN between checks), the
        final one in ``settings["ksd"]`` (InferenceData attrs ``ksd``); ``stop_reason`` says why
        the run ended ("steps", "ksd_plateau", "ksd_tolerance").

    Returns
    -------
    Result
        ``draws`` (name -> (ensembles, particles, *shape), constrained), ``trace``,
        ``to_inference_data()``, ``summary()``.
    """
    sampler = Sampler(
        target, particles, kernel=kernel, stepper=stepper, ensembles=ensembles, init=init, dtype=dtype,
        precondition=precondition, seed=seed, device=device, stop=stop,
    )
    return sampler.run(steps, progress=progress).result()


_ = math

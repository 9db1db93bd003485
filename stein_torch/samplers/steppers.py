"""Step rules that move particles along the SVGD direction.

A stepper receives the particles u (ensembles, particles, dim), the direction phi at u, and a
``velocity`` callable that evaluates phi at other positions (used by multi-stage integrators), and
returns the new particles.

:class:`GradientStep` moves every particle by lr * phi, with an optional cap on each particle's
move (the default rule; one score evaluation per step);
:class:`Optim` wraps any :mod:`torch.optim` optimizer (one score evaluation per step);
:class:`Adaptive` integrates the particle ODE du/dt = phi(u) with an embedded Runge-Kutta pair and
error control (several score evaluations per step, step size chosen for a given accuracy).
"""

from __future__ import annotations

import functools
import math
from typing import Callable

import torch

from ..checks import check_callable, check_choice, check_int, check_optional_real, check_real

__all__ = ["Stepper", "GradientStep", "Optim", "Adaptive", "as_stepper", "TABLEAUX", "rk_attempt"]


class Stepper:
    """Base class for step rules."""

    def bind(self, particles: torch.Tensor) -> None:
        """Called once with the initial particles (B, N, d) before the first step."""

    def rebind(self, particles: torch.Tensor) -> None:
        """Called when the sampler changes coordinates (re-whitening); by default a fresh start."""
        self.bind(particles)

    def step(self, u: torch.Tensor, phi: torch.Tensor, velocity: Callable) -> torch.Tensor:
        """Return the particles after one step (B, N, d)."""
        raise NotImplementedError

    @property
    def step_size(self) -> float:
        return float("nan")

    def info(self) -> dict:
        """Figures of the last step for the sampler's history (e.g. rejections); none by default."""
        return {}

    def state_dict(self) -> dict:
        return {}

    def load_state_dict(self, state: dict) -> None:
        pass


def _positive(value, name: str, owner: str = "Adaptive") -> float:
    return check_real(value, f"{owner}: {name}", low=0, low_open=True)


def _check_max_move(max_move, owner: str):
    return check_optional_real(max_move, f"{owner}: max_move", low=0, low_open=True)


def _capped(phi: torch.Tensor, lr: float, max_move: float | None) -> torch.Tensor:
    """phi scaled down, per particle, so that lr * |phi| <= max_move (unchanged without a cap)."""
    if max_move is None:
        return phi
    move = lr * torch.linalg.vector_norm(phi, dim=-1, keepdim=True)
    return phi * (max_move / move.clamp_min_(max_move))


class GradientStep(Stepper):
    """Plain steps u <- u + lr * phi, no particle moving more than ``max_move`` in one step.

    The same update as ``torch.optim.SGD(lr=lr)`` ascending along phi, without an optimizer
    object around it (its per-call bookkeeping cost a tenth of a default step).

    Parameters
    ----------
    lr : float, default=0.1
        Step size, in the sampler's (whitened) coordinates.
    max_move : float, optional
        Largest distance a particle moves in one step; a particle whose lr * |phi| is larger moves
        that far along phi.
    """

    def __init__(self, lr: float = 0.1, *, max_move: float | None = None):
        self.lr = _positive(lr, "lr", "GradientStep")
        self.max_move = _check_max_move(max_move, "GradientStep")

    def step(self, u, phi, velocity):
        return torch.add(u, _capped(phi, self.lr, self.max_move), alpha=self.lr)

    @property
    def step_size(self) -> float:
        return self.lr

    def __repr__(self):  # its settings; it keeps no state between steps (state_dict() is {})
        cap = "" if self.max_move is None else f", max_move={self.max_move}"
        return f"GradientStep(lr={self.lr}{cap})"


class Optim(Stepper):
    """Any :mod:`torch.optim` optimizer, ascending along phi (it is given grad = -phi).

    Parameters
    ----------
    optimizer : callable
        ``optimizer(params) -> torch.optim.Optimizer``, e.g. ``functools.partial(torch.optim.Adam,
        lr=0.05)`` or an optimizer class (its default settings).

    Examples
    --------
    >>> import functools, torch, stein_torch as st
    >>> stepper = st.steppers.Optim(functools.partial(torch.optim.SGD, lr=0.1, momentum=0.5))
    """

    def __init__(self, optimizer: Callable, *, max_move: float | None = None):
        self.factory = check_callable(optimizer, "Optim: optimizer", "callable (params -> Optimizer)")
        self.max_move = _check_max_move(max_move, "Optim")
        self.optimizer = None
        self._param = None

    def bind(self, particles):
        self._param = torch.nn.Parameter(particles.detach().clone())
        try:
            opt = self.factory([self._param])
        except (TypeError, ValueError) as err:  # e.g. torch.optim's "Invalid learning rate: -1"
            raise type(err)(f"stepper: the optimizer factory {self!r} failed: {err}") from err
        if not isinstance(opt, torch.optim.Optimizer):
            raise TypeError(f"stepper: the factory must return a torch.optim.Optimizer, got {type(opt).__qualname__}")
        for group in opt.param_groups:  # torch.optim lets NaN through some checks ("lr < 0" is False)
            lr = group.get("lr")
            if isinstance(lr, (int, float)) and not math.isfinite(lr):
                raise ValueError(f"stepper: the learning rate must be finite, got lr={lr}")
        self.optimizer = opt

    def step(self, u, phi, velocity):
        with torch.no_grad():
            self._param.copy_(u)
        self._param.grad = -_capped(phi, self.step_size, self.max_move)  # the cap assumes plain gradient steps
        self.optimizer.step()
        return self._param.detach().clone()

    @property
    def step_size(self) -> float:
        if self.optimizer is None:
            return float("nan")
        return float(self.optimizer.param_groups[0].get("lr", float("nan")))

    def state_dict(self):
        return {} if self.optimizer is None else {"optimizer": self.optimizer.state_dict()}

    def load_state_dict(self, state):
        if state and self.optimizer is not None:
            self.optimizer.load_state_dict(state["optimizer"])

    def __repr__(self):
        f = self.factory
        if isinstance(f, functools.partial):
            args = ", ".join(f"{k}={v}" for k, v in f.keywords.items())
            return f"Optim({getattr(f.func, '__name__', f.func)}({args}))"
        return f"Optim({getattr(f, '__name__', f)})"


# Embedded Runge-Kutta pairs (handbook: "Solving Ordinary Differential Equations I", ch. II.4-II.5,
# from memory; checked in tests by the measured orders on a linear ODE). ``a``: stage coefficients
# (lower triangle, row i for stage i + 1), ``b``: the propagated solution, ``e``: b - b_hat, the
# error weights; ``order``: (propagated, embedded). Both pairs are FSAL: the last stage is evaluated
# at the new point, so ``u_new`` is that stage's input and its velocity is the next step's first.
TABLEAUX = {
    "bs32": {  # Bogacki-Shampine 3(2)
        "a": [[1 / 2], [0.0, 3 / 4], [2 / 9, 1 / 3, 4 / 9]],
        "b": [2 / 9, 1 / 3, 4 / 9, 0.0],
        "b_hat": [7 / 24, 1 / 4, 1 / 3, 1 / 8],
        "order": (3, 2),
    },
    "dp54": {  # Dormand-Prince 5(4)
        "a": [
            [1 / 5],
            [3 / 40, 9 / 40],
            [44 / 45, -56 / 15, 32 / 9],
            [19372 / 6561, -25360 / 2187, 64448 / 6561, -212 / 729],
            [9017 / 3168, -355 / 33, 46732 / 5247, 49 / 176, -5103 / 18656],
            [35 / 384, 0.0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84],
        ],
        "b": [35 / 384, 0.0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84, 0.0],
        "b_hat": [5179 / 57600, 0.0, 7571 / 16695, 393 / 640, -92097 / 339200, 187 / 2100, 1 / 40],
        "order": (5, 4),
    },
}


def rk_attempt(u: torch.Tensor, k1: torch.Tensor, h: float, velocity: Callable, method: str = "bs32"):
    """One attempted step of an embedded Runge-Kutta pair (FSAL), without step-size control.

    Parameters
    ----------
    u, k1 : Tensor of shape (...)
        State and velocity(u).
    h : float
        Step size.
    velocity : callable
        Tensor (...) -> Tensor (...); non-finite entries mark a failed evaluation.
    method : {"bs32", "dp54"}

    Returns
    -------
    u_new : Tensor of shape (...)
        Propagated (higher-order) solution; it is the argument of the last velocity call.
    error : Tensor of shape (...)
        u_new minus the embedded lower-order solution (local error estimate of the latter).
    k_last : Tensor of shape (...)
        velocity(u_new).
    """
    tab = TABLEAUX[method]
    ks = [k1]
    for row in tab["a"]:
        stage = u + h * sum(coef * k for coef, k in zip(row, ks) if coef != 0.0)
        ks.append(velocity(stage))
    u_new = stage  # FSAL: the last row of a equals b
    error = h * sum((b - bh) * k for b, bh, k in zip(tab["b"], tab["b_hat"], ks))
    return u_new, error, ks[-1]


class Adaptive(Stepper):
    """Adaptive integration of the particle ODE du/dt = phi(u) by an embedded Runge-Kutta pair.

    Each accepted step advances the flow by h; the error estimate e = u_high - u_low is measured in
    the norm ||e / (atol + rtol max(|u|, |u_new|))|| (root mean square or max over all particles and
    coordinates) and the standard controller h <- h min(fac_max, max(fac_min, 0.9 err^(-1/(q+1))))
    (q the lower order) proposes the next step; a step with err > 1, or with any non-finite stage,
    is rejected and retried with the smaller h (handbook: "Solving Ordinary Differential Equations
    I", ch. II.4, from memory). Non-smooth kernels make the flow stiff near coincident particles;
    here the step size follows.

    Cost: "bs32" makes 3 velocity calls per attempt, "dp54" 6 (the first stage reuses the previous
    step's last); each velocity call evaluates the score of every particle. Rejected attempts cost
    the same. The sampler records ``step_size`` (the h just taken), ``rejections`` (this step's),
    ``error`` and ``next_step_size`` in its trace.

    Parameters
    ----------
    rtol, atol : float, default=1e-3, 1e-3
        Relative and absolute tolerance of the local error, in the sampler's (whitened) coordinates.
    method : {"bs32", "dp54"}, default="bs32"
        Bogacki-Shampine 3(2) or Dormand-Prince 5(4).
    first_step : float, optional
        Initial h; by default chosen from the first velocity (the starting-step rule of "Solving
        Ordinary Differential Equations I", sec. II.4; one extra evaluation).
    max_step : float, default=inf
        Upper bound on h.
    norm : {"rms", "max"}, default="rms"
        How the scaled errors of all particles are combined; "max" controls the worst particle.
    max_rejections : int, default=50
        Consecutive rejections after which a FloatingPointError is raised.

    Examples
    --------
    >>> import stein_torch as st
    >>> stepper = st.steppers.Adaptive(rtol=1e-3, atol=1e-3, method="bs32")
    """

    SAFETY, FAC_MIN, FAC_MAX = 0.9, 0.2, 5.0

    def __init__(self, rtol=1e-3, atol=1e-3, *, method="bs32", first_step=None, max_step=math.inf,
                 norm="rms", max_rejections=50):
        self.rtol = _positive(rtol, "rtol")
        self.atol = _positive(atol, "atol")
        self.method = check_choice(method, "Adaptive: method", TABLEAUX)
        self.first_step = None if first_step is None else _positive(first_step, "first_step")
        self.max_step = math.inf if max_step == math.inf else _positive(max_step, "max_step")
        self.norm = check_choice(norm, "Adaptive: norm", ("rms", "max"))
        self.max_rejections = check_int(max_rejections, "Adaptive: max_rejections")
        self.order = TABLEAUX[method]["order"]
        self._reset()

    def _reset(self):
        self.h = self.first_step  # next step to try
        self.h_taken = float("nan")
        self.time = 0.0
        self.evaluations = 0  # velocity calls
        self.rejections = 0  # total
        self.last_info = {"rejections": 0, "error": float("nan"), "next_step_size": float("nan")}

    def bind(self, particles):
        self._reset()

    def rebind(self, particles):
        """New coordinates (re-whitening): keep the step size and the counters; the whitened
        coordinates before and after have the same scale."""

    def _error_norm(self, error, u, u_new):
        scale = self.atol + self.rtol * torch.maximum(u.abs(), u_new.abs())
        ratio = error / scale
        value = ratio.abs().max() if self.norm == "max" else ratio.pow(2).mean().sqrt()
        return float(value)

    def _initial_step(self, u, phi, velocity) -> float:
        """Starting step from the size of u, phi and a finite-difference estimate of phi's change."""
        scale = self.atol + self.rtol * u.abs()
        d0 = float((u / scale).pow(2).mean().sqrt())
        d1 = float((phi / scale).pow(2).mean().sqrt())
        h0 = 1e-6 if d0 < 1e-5 or d1 < 1e-5 else 0.01 * d0 / d1
        phi1 = velocity(u + h0 * phi)
        self.evaluations += 1
        d2 = float(((phi1 - phi) / scale).pow(2).mean().sqrt()) / h0
        if not math.isfinite(d2):
            return h0
        p = self.order[0]
        h1 = max(1e-6, h0 * 1e-3) if max(d1, d2) <= 1e-15 else (0.01 / max(d1, d2)) ** (1 / (p + 1))
        return min(100 * h0, h1, self.max_step)

    def step(self, u, phi, velocity):
        if not torch.isfinite(phi).all():
            raise FloatingPointError("Adaptive: the direction at the current particles is not finite")
        if self.h is None:
            self.h = self._initial_step(u, phi, velocity)
        stages = len(TABLEAUX[self.method]["a"])
        exponent = -1.0 / (self.order[1] + 1)
        fac_max = self.FAC_MAX
        for rejected in range(self.max_rejections + 1):
            h = min(self.h, self.max_step)
            u_new, error, k_last = rk_attempt(u, phi, h, velocity, self.method)
            self.evaluations += stages
            finite = bool(torch.isfinite(u_new).all() and torch.isfinite(k_last).all())
            err = self._error_norm(error, u, u_new) if finite else math.inf
            if not math.isfinite(err):
                err = math.inf
            fac = self.FAC_MIN if err == math.inf else min(fac_max, max(self.FAC_MIN, self.SAFETY * err**exponent if err > 0 else fac_max))
            if err <= 1.0:
                self.h_taken, self.h = h, h * fac
                self.time += h
                self.last_info = {"rejections": rejected, "error": err, "next_step_size": self.h}
                return u_new
            self.rejections += 1
            self.h = h * min(1.0, fac)
            fac_max = 1.0  # no growth right after a rejection
        raise FloatingPointError(
            f"Adaptive: {self.max_rejections} consecutive rejected steps (last h = {h:.3g}, error {err:.3g}); "
            "the flow is too stiff or the log density is not finite along the way. Loosen rtol/atol or "
            "check the model."
        )

    @property
    def step_size(self) -> float:
        return self.h_taken

    def info(self) -> dict:
        return dict(self.last_info)

    def state_dict(self):
        return {"h": self.h, "time": self.time, "evaluations": self.evaluations, "rejections": self.rejections}

    def load_state_dict(self, state):
        self.h, self.time = state["h"], state["time"]
        self.evaluations, self.rejections = state["evaluations"], state["rejections"]

    def __repr__(self):
        return f"Adaptive(rtol={self.rtol}, atol={self.atol}, method={self.method!r})"


def as_stepper(stepper) -> Stepper:
    """Accept a Stepper, an optimizer class or a factory ``params -> Optimizer``."""
    if isinstance(stepper, Stepper):
        return stepper
    if isinstance(stepper, torch.optim.Optimizer):
        raise TypeError(
            "stepper: pass an optimizer factory, e.g. functools.partial(torch.optim.Adam, lr=0.05), "
            "not an optimizer instance (the sampler owns the particle tensor)"
        )
    if callable(stepper):
        return Optim(stepper)
    raise TypeError(f"stepper: expected a Stepper or a torch.optim factory, got {type(stepper).__qualname__}")

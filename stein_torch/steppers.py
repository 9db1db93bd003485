"""Step rules that move particles along the SVGD direction.

A stepper receives the particles u (ensembles, particles, dim), the direction phi at u, and a
``velocity`` callable that evaluates phi at other positions (used by multi-stage integrators), and
returns the new particles.
"""

from __future__ import annotations

import functools
import math
from typing import Callable

import torch

__all__ = ["Stepper", "Optim", "as_stepper"]


class Stepper:
    """Base class for step rules."""

    def bind(self, particles: torch.Tensor) -> None:
        """Called once with the initial particles (B, N, d) before the first step."""

    def step(self, u: torch.Tensor, phi: torch.Tensor, velocity: Callable) -> torch.Tensor:
        """Return the particles after one step (B, N, d)."""
        raise NotImplementedError

    @property
    def step_size(self) -> float:
        return float("nan")

    def state_dict(self) -> dict:
        return {}

    def load_state_dict(self, state: dict) -> None:
        pass


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
        if not callable(optimizer):
            raise TypeError(f"Optim: optimizer must be callable (params -> Optimizer), got {type(optimizer).__qualname__}")
        if max_move is not None and not (isinstance(max_move, (int, float)) and math.isfinite(max_move) and max_move > 0):
            raise ValueError(f"Optim: max_move must be a positive number or None, got {max_move!r}")
        self.factory = optimizer
        self.max_move = max_move
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
        if self.max_move is not None:  # for plain gradient steps: no particle moves more than max_move
            move = self.step_size * phi.norm(dim=-1, keepdim=True)
            phi = phi * (self.max_move / move.clamp_min(self.max_move))
        self._param.grad = -phi
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

"""Calling a user's function on a batch of parameter values, however it was written.

A log density may be written for a batch (leading dimensions, the fast way), or for one value
(returning a scalar). :class:`Batched` decides once, on the first call, which it is: batched as is;
vectorised by :func:`torch.func.vmap`; or, when vmap cannot trace it (``.item()``, data-dependent
control flow), called once per value in a Python loop, with a one-time warning that says so. The
warning is reported at the user's line that vmap could not trace (file:line), not at a line of the
library.

A ``KeyError`` or ``IndexError`` raised by the user's function on that first call is almost always a
typo in a latent name or an index past the end; it is raised again (as a subclass of the same type)
with the names and shapes the function was given, and the nearest known name.
"""

from __future__ import annotations

import difflib
import inspect
import math
import os
import traceback
import warnings
from typing import Callable, Sequence

import torch

__all__ = ["Batched", "ModelKeyError", "ModelIndexError", "user_location"]

_TORCH_DIR = os.path.dirname(torch.__file__)
_PACKAGE_DIR = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


class ModelKeyError(KeyError):
    """A KeyError raised inside the user's function, explained (still caught by ``except KeyError``)."""

    def __str__(self) -> str:  # KeyError would show the message quoted, as a key
        return str(self.args[0])


class ModelIndexError(IndexError):
    """An IndexError raised inside the user's function, explained."""


def _own_frame(filename: str) -> bool:
    path = os.path.abspath(filename)
    return path.startswith(_TORCH_DIR) or path.startswith(_PACKAGE_DIR + os.sep)


def user_location(error: BaseException | None, functions: Sequence[Callable]) -> tuple[str, int]:
    """(file, line) of the user's code: the deepest frame of ``error`` outside torch and this package,
    else where the first of ``functions`` is defined."""
    if error is not None:
        frames = [f for f in traceback.extract_tb(error.__traceback__) if not _own_frame(f.filename)]
        if frames:
            return frames[-1].filename, frames[-1].lineno or 0
    for fn in functions:
        fn = inspect.unwrap(getattr(fn, "func", fn))  # functools.partial, decorators
        code = getattr(fn, "__code__", None) or getattr(getattr(type(fn), "__call__", None), "__code__", None)
        if code is not None:
            return code.co_filename, code.co_firstlineno
    return "<unknown>", 0


class Batched:
    """A user function ``fn(arg) -> (...)`` made batched over leading dimensions.

    Parameters
    ----------
    fn : callable
        ``fn(x)`` for a tensor (flat targets) or ``fn(p)`` for a dict of tensors.
    flat : bool
        Whether ``arg`` is a tensor (``x``, last axis the coordinates) or a dict name -> (..., *shape).
    name : str
        What the function is called in messages.
    describe : callable, optional
        ``describe() -> (text, names)``: what the function receives (latent names and shapes, data
        keys) and the names among them, for the message of a KeyError or IndexError raised on the
        first call.
    origin : sequence of callables, optional
        The user's own functions behind ``fn`` (where a warning points when no frame says more).

    Attributes
    ----------
    mode : {None, "batched", "vmap", "loop"}
        How the function is called; decided on the first call with more than one value (a batch of
        one cannot tell a batched function from one written for a single value).
    """

    def __init__(self, fn: Callable, flat: bool, name: str = "log_prob", describe: Callable[[], tuple] | None = None,
                 origin: Sequence[Callable] = ()):
        self.fn = fn
        self.flat = flat
        self.name = name
        self.describe = describe
        self.origin = tuple(origin) or (fn,)
        self.mode: str | None = None
        self._warned = False
        self.warning: str | None = None  # the loop warning, once issued (at the user's line)

    def __call__(self, arg, batch_shape: torch.Size) -> torch.Tensor:
        """Values of the function, shape ``batch_shape``, for ``arg`` with those leading dimensions."""
        if len(batch_shape) == 0:  # always call the user with a batch dimension
            arg = arg.unsqueeze(0) if self.flat else {k: v.unsqueeze(0) for k, v in arg.items()}
            return self(arg, torch.Size([1])).squeeze(0)
        mode, out = self.mode, None
        if mode is None:
            try:
                mode, out = self._probe(arg, batch_shape)
            except (KeyError, IndexError) as err:
                raise self._explained(err) from err
            if math.prod(batch_shape) > 1:  # one value cannot tell a batched function from a single-value one
                self.mode = mode
        if out is None:
            out = self.fn(arg) if mode == "batched" else self._lifted(arg, batch_shape, mode)
        if not isinstance(out, torch.Tensor):
            raise TypeError(f"{self.name} must return a torch.Tensor, got {type(out).__qualname__}")
        if out.is_complex() or not out.is_floating_point():
            raise TypeError(f"{self.name} must return a real floating-point tensor, got dtype {out.dtype}")
        if out.shape != batch_shape:
            raise ValueError(
                f"{self.name} returned shape {tuple(out.shape)} for a batch of shape {tuple(batch_shape)}; "
                "it must return one log density per batch element"
            )
        return out

    def _flatten(self, arg, batch_shape):
        n = math.prod(batch_shape)
        if self.flat:
            return arg.reshape(n, *arg.shape[len(batch_shape) :])
        return {k: v.reshape(n, *v.shape[len(batch_shape) :]) for k, v in arg.items()}

    def _first(self, flat):
        return flat[0] if self.flat else {k: v[0] for k, v in flat.items()}

    def _lifted(self, arg, batch_shape, mode):
        flat = self._flatten(arg, batch_shape)
        if mode == "vmap":
            out = torch.func.vmap(self.fn)(flat)
        else:
            n = math.prod(batch_shape)
            pick = (lambda i: flat[i]) if self.flat else (lambda i: {k: v[i] for k, v in flat.items()})
            out = torch.stack([torch.as_tensor(self.fn(pick(i))) for i in range(n)])
        return out.reshape(batch_shape)

    def _probe(self, arg, batch_shape) -> tuple[str, torch.Tensor | None]:
        """Whether the function is batched, vmappable, or needs a loop; with the batched output when
        the function is batched (so that call is not repeated)."""
        try:
            out = self.fn(arg)
            batched_error = None
        except Exception as err:  # a function written for one value may fail on a batch
            out, batched_error = None, err
        if out is not None and not isinstance(out, torch.Tensor):
            raise TypeError(f"{self.name} must return a torch.Tensor, got {type(out).__qualname__}")
        if out is not None and out.shape == batch_shape:
            return "batched", out
        if out is not None and out.dim() != 0:
            raise ValueError(
                f"{self.name} returned shape {tuple(out.shape)} for a batch of shape {tuple(batch_shape)}; "
                "it must return one log density per batch element (shape (...)), or a scalar for one value"
            )
        flat = self._flatten(arg, batch_shape)
        try:
            torch.func.vmap(self.fn)(flat)
            return "vmap", None
        except Exception as vmap_error:  # vmap cannot trace every function (.item(), data-dependent flow)
            try:
                single = self.fn(self._first(flat))
            except Exception:
                if batched_error is not None:
                    raise batched_error
                raise
            if not isinstance(single, torch.Tensor) or single.dim() != 0:
                raise ValueError(
                    f"{self.name} must return a tensor of shape (...) for a batch, or a scalar for one value; "
                    f"got {type(single).__qualname__} {tuple(getattr(single, 'shape', ()))} for one value"
                ) from None
            if self._warned:
                return "loop", None
            self._warned = True
            filename, line = user_location(vmap_error, self.origin)
            self.warning = (
                f"{self.name} is written for one value and torch.func.vmap could not vectorise it "
                f"({type(vmap_error).__name__} at {filename}:{line}); calling it once per particle in a Python "
                "loop, which is slow. Write it for a batch of values (leading dimensions) to make it fast."
            )
            warnings.warn_explicit(
                self.warning, RuntimeWarning, filename, line, module=os.path.splitext(os.path.basename(filename))[0],
            )
            return "loop", None

    def _explained(self, err: BaseException) -> BaseException:
        """``err`` (a KeyError or IndexError of the user's function) with what the function was given."""
        if isinstance(err, (ModelKeyError, ModelIndexError)):
            return err
        filename, line = user_location(err, self.origin)
        given, known = self.describe() if self.describe is not None else ("its arguments", [])
        if isinstance(err, KeyError):
            key = err.args[0] if err.args else None
            near = difflib.get_close_matches(str(key), list(known), n=1)
            hint = f"; did you mean {near[0]!r}?" if near else ""
            return ModelKeyError(
                f"{self.name} raised KeyError {key!r} at {filename}:{line} on its first call: no such name. It was "
                f"given {given}{hint}"
            )
        return ModelIndexError(
            f"{self.name} raised IndexError ({err}) at {filename}:{line} on its first call: an index past the end "
            f"of an axis. It was given {given}"
        )

"""The user's model as a differentiable log density on an unconstrained flat space.

A :class:`Target` wraps a torch log density and gives the sampler what it needs: the number of
unconstrained coordinates, the map from a flat unconstrained vector to named constrained values (via
:func:`torch.distributions.biject_to`, log-Jacobian included), and the log density with its score
by autograd, batched over any leading dimensions.

Examples
--------
>>> import torch, stein_torch as st
>>> from torch.distributions import constraints
>>> t = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=3)       # (..., 3) -> (...)
>>> t = st.Target(lambda p: -p["tau"] - 0.5 * p["mu"] ** 2,
...               params={"mu": st.Param(), "tau": st.Param(constraint=constraints.positive)})
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Callable, Mapping

import torch
from torch.distributions import Distribution, biject_to, constraints, transforms

__all__ = ["Param", "Target"]


@dataclass(frozen=True)
class Param:
    """Specification of one named model parameter.

    Parameters
    ----------
    shape : tuple of int, default=()
        Shape of one value of the parameter (``()`` for a scalar).
    constraint : torch.distributions.constraints.Constraint, default=constraints.real
        Support of the parameter; sampling happens on ``biject_to(constraint)``'s unconstrained side.
    """

    shape: tuple = ()
    constraint: constraints.Constraint = field(default=constraints.real)

    def __post_init__(self):
        shape = (self.shape,) if isinstance(self.shape, int) else self.shape
        if not isinstance(shape, (tuple, list, torch.Size)) or not all(
            isinstance(n, int) and not isinstance(n, bool) and n >= 1 for n in shape
        ):
            raise ValueError(f"Param: shape must be a tuple of positive ints, got {self.shape!r}")
        object.__setattr__(self, "shape", tuple(shape))
        if not isinstance(self.constraint, constraints.Constraint):
            raise TypeError(
                "Param: constraint must be a torch.distributions.constraints.Constraint, "
                f"got {type(self.constraint).__qualname__}"
            )
        lower = getattr(self.constraint, "lower_bound", None)
        upper = getattr(self.constraint, "upper_bound", None)
        for bound in (lower, upper):
            if bound is not None and bool(torch.isnan(torch.as_tensor(bound)).any()):
                raise ValueError(f"Param: constraint {self.constraint!r} has a NaN bound")
        if lower is not None and upper is not None and not bool((torch.as_tensor(lower) < torch.as_tensor(upper)).all()):
            raise ValueError(f"Param: constraint {self.constraint!r} is empty (lower_bound must be < upper_bound)")
        try:
            biject_to(self.constraint)
        except NotImplementedError:
            raise ValueError(
                f"Param: no bijection to the constraint {self.constraint!r}; "
                "use one that torch.distributions.biject_to supports"
            ) from None


class _Block:
    """Where one named parameter sits in the flat unconstrained vector."""

    def __init__(self, name: str, spec: Param, start: int):
        self.name = name
        self.shape = torch.Size(spec.shape)
        self.constraint = spec.constraint
        self.transform = biject_to(spec.constraint)
        inner = self.transform
        while isinstance(inner, transforms.IndependentTransform):
            inner = inner.base_transform
        self.identity = inner == transforms.identity_transform  # real line: no transform, no Jacobian
        self.free_shape = torch.Size(self.transform.inverse_shape(self.shape))
        self.start = start
        self.size = math.prod(self.free_shape)


class Target:
    """A log density over named (or flat) parameters, ready for particle samplers.

    Parameters
    ----------
    log_prob : callable
        With ``dim``: ``log_prob(x)`` for ``x`` of shape ``(..., dim)`` returns ``(...)``.
        With ``params``: ``log_prob(p)`` for a dict ``p[name]`` of shape ``(..., *shape)``, on the
        constrained scale, returns ``(...)``. Log densities up to an additive constant. A function
        written for a single value (returning a scalar) is vectorised with :func:`torch.func.vmap`,
        or, when vmap cannot trace it, called in a loop (with a one-time warning).
    dim : int, optional
        Number of coordinates of a flat target. Exactly one of ``dim`` and ``params`` is given.
    params : dict of str to Param, optional
        Named parameters with shapes and constraints.
    constraint : Constraint, default=constraints.real
        Support of a flat target (only with ``dim``).
    initial : callable, optional
        ``initial(n, generator) -> dict`` drawing ``n`` constrained starting values per name;
        enables ``init="prior"`` in :func:`stein_torch.sample`.
    log_likelihood : callable, optional
        ``log_likelihood(p, data) -> (*batch, n_obs)``: one log-likelihood term per observation
        (``p`` as for ``log_prob``, ``data`` a dict of tensors (n_obs, ...) or a minibatch of them).
        Then ``log_prob`` is the log prior and the target is ``log_prob(p) + sum of the terms``;
        the terms fill the ``log_likelihood`` group of the InferenceData (for :func:`arviz.loo`).
    data : dict of str to Tensor, optional
        The observations and covariates, each of shape (n_obs, ...); needed with ``log_likelihood``.
    batch_size : int, optional
        Score the likelihood on random minibatches of this size, scaled by n_obs / batch_size
        (stochastic SVGD, reshuffled each epoch, shuffles from the sampler's seed). Default: full data.
    observed : str or list of str, optional
        Keys of ``data`` that are observations (``observed_data`` group); the others are covariates
        (``constant_data``).
    predictive : callable, optional
        ``predictive(p, inputs) -> (*batch, n, ...)``, used by :meth:`Result.predict`.

    See Also
    --------
    Target.from_priors : build a target from prior distributions and a log likelihood.
    Target.from_module : a Bayesian neural network from a :class:`torch.nn.Module`.
    """

    def __init__(
        self,
        log_prob: Callable,
        dim: int | None = None,
        params: Mapping[str, Param] | None = None,
        *,
        constraint: constraints.Constraint = constraints.real,
        initial: Callable | None = None,
        log_likelihood: Callable | None = None,
        data: Mapping | None = None,
        batch_size: int | None = None,
        observed=None,
        predictive: Callable | None = None,
    ):
        if not callable(log_prob):
            raise TypeError(f"Target: log_prob must be callable, got {type(log_prob).__qualname__}")
        if (dim is None) == (params is None):
            raise ValueError("Target: give exactly one of dim= (flat target) or params= (named parameters)")
        self.flat = dim is not None
        if self.flat:
            if isinstance(dim, bool) or not isinstance(dim, int) or dim < 1:
                raise ValueError(f"Target: dim must be a positive int, got {dim!r}")
            params = {"x": Param((dim,), constraint)}
        elif not isinstance(params, Mapping) or not params:
            raise TypeError(f"Target: params must be a non-empty dict of name -> Param, got {params!r}")
        blocks, start = [], 0
        for name, spec in params.items():
            if not isinstance(name, str) or not name.isidentifier():
                raise ValueError(f"Target: parameter names must be identifiers, got {name!r}")
            if not isinstance(spec, Param):
                raise TypeError(f"Target: params[{name!r}] must be a st.Param, got {type(spec).__qualname__}")
            blocks.append(_Block(name, spec, start))
            start += blocks[-1].size
        self.blocks = blocks
        self.dim = start
        self.initial = initial
        self._user_fn = log_prob
        self._fn = log_prob
        self._mode = None  # "batched" | "vmap" | "loop", decided on first use
        self.data, self.log_likelihood = None, log_likelihood
        self.predictive = predictive
        self.sampler_hints: dict = {}  # preferred sampler settings, e.g. {"init": ..., "precondition": ...}
        if predictive is not None and not callable(predictive):
            raise TypeError(f"Target: predictive must be callable, got {type(predictive).__qualname__}")
        if log_likelihood is not None or data is not None:
            from .data import ObservedData, with_likelihood

            if log_likelihood is None or data is None:
                raise ValueError("Target: log_likelihood= and data= go together; got only one of them")
            if not callable(log_likelihood):
                raise TypeError(f"Target: log_likelihood must be callable, got {type(log_likelihood).__qualname__}")
            self.data = ObservedData(data, batch_size, observed)
            self._user_fn = with_likelihood(log_prob, log_likelihood, self.data)
        elif batch_size is not None or observed is not None:
            raise ValueError("Target: batch_size= and observed= need log_likelihood= and data=")

    # ------------------------------------------------------------------ construction helpers
    @classmethod
    def from_priors(
        cls,
        priors: Mapping[str, Distribution],
        log_likelihood: Callable | None = None,
        *,
        data: Mapping | None = None,
        batch_size: int | None = None,
        observed=None,
    ) -> "Target":
        """Build a target from prior distributions and a log likelihood.

        Parameters
        ----------
        priors : dict of str to torch.distributions.Distribution
            One prior per parameter. Its ``support`` gives the constraint and
            ``batch_shape + event_shape`` the parameter's shape; its samples can start the particles
            (``init="prior"``).
        log_likelihood : callable, optional
            ``log_likelihood(p) -> (...)`` for a dict of constrained values with leading batch dims;
            with ``data``, ``log_likelihood(p, data) -> (..., n_obs)`` per observation.
        data, batch_size, observed
            As in :class:`Target`.
        """
        if not isinstance(priors, Mapping) or not priors:
            raise TypeError("Target.from_priors: priors must be a non-empty dict of name -> Distribution")
        for name, prior in priors.items():
            if not isinstance(prior, Distribution):
                raise TypeError(
                    f"Target.from_priors: priors[{name!r}] must be a torch Distribution, "
                    f"got {type(prior).__qualname__}"
                )
        if log_likelihood is not None and not callable(log_likelihood):
            raise TypeError("Target.from_priors: log_likelihood must be callable")
        params = {
            name: Param(tuple(d.batch_shape + d.event_shape), d.support) for name, d in priors.items()
        }

        def log_joint(p):
            total = 0.0
            for name, d in priors.items():
                lp = d.log_prob(p[name])
                if d.batch_shape:
                    lp = lp.flatten(lp.dim() - len(d.batch_shape)).sum(-1)
                total = total + lp
            return total if log_likelihood is None or data is not None else total + log_likelihood(p)

        def initial(n, generator):
            with torch.random.fork_rng():
                torch.manual_seed(int(torch.randint(2**62, (), generator=generator)))
                return {name: d.sample((n,)) for name, d in priors.items()}

        if data is None:
            return cls(log_joint, params=params, initial=initial)
        return cls(
            log_joint, params=params, initial=initial, log_likelihood=log_likelihood, data=data,
            batch_size=batch_size, observed=observed,
        )

    @classmethod
    def from_module(cls, module, *, prior, likelihood: Callable, data, batch_size: int | None = None, **options):
        """A Bayesian neural network: particles are stacked copies of ``module``'s parameters.

        Evaluated with :func:`torch.func.functional_call` under :func:`torch.func.vmap` (no loop
        over particles). See :func:`stein_torch.module.module_target` for the parameters.
        """
        from .module import module_target

        return module_target(cls, module, prior=prior, likelihood=likelihood, data=data, batch_size=batch_size, **options)

    # ------------------------------------------------------------------ coordinates
    @property
    def names(self) -> list[str]:
        return [b.name for b in self.blocks]

    @property
    def shapes(self) -> dict[str, torch.Size]:
        return {b.name: b.shape for b in self.blocks}

    def constrain(self, z: torch.Tensor) -> tuple[dict, torch.Tensor]:
        """Map flat unconstrained ``z`` (..., dim) to constrained values and the log-Jacobian (...)."""
        values, log_jac = self._constrain(z)
        return values, torch.zeros(z.shape[:-1], dtype=z.dtype, device=z.device) if log_jac is None else log_jac

    def _constrain(self, z: torch.Tensor) -> tuple[dict, torch.Tensor | None]:
        """:meth:`constrain`, with log-Jacobian None when every block is on the real line."""
        values, log_jac = {}, None
        for b in self.blocks:
            if b.size == z.shape[-1] and len(b.free_shape) == 1:  # one flat block: z itself, no view
                free = z
            else:
                free = z[..., b.start : b.start + b.size].reshape(*z.shape[:-1], *b.free_shape)
            if b.identity:
                values[b.name] = free
                continue
            value = b.transform(free)
            ladj = b.transform.log_abs_det_jacobian(free, value)
            if ladj.dim() > z.dim() - 1:
                ladj = ladj.flatten(z.dim() - 1).sum(-1)
            log_jac = ladj if log_jac is None else log_jac + ladj
            values[b.name] = value
        return values, log_jac

    def unconstrain(self, values: Mapping[str, torch.Tensor], argname: str = "values") -> torch.Tensor:
        """Map constrained values (name -> (..., *shape)) to flat unconstrained ``z`` (..., dim)."""
        if self.flat and isinstance(values, torch.Tensor):
            values = {"x": values}
        if not isinstance(values, Mapping):
            raise TypeError(f"{argname}: expected a dict of name -> tensor, got {type(values).__qualname__}")
        unknown = set(values) - set(self.names)
        missing = set(self.names) - set(values)
        if unknown or missing:
            raise ValueError(
                f"{argname}: names must be {self.names}; unknown {sorted(unknown)}, missing {sorted(missing)}"
            )
        parts, batch = [], None
        for b in self.blocks:
            v = torch.as_tensor(values[b.name])
            if v.is_complex() or not v.is_floating_point():
                v = v.to(torch.get_default_dtype()) if not v.is_complex() else v
            if v.is_complex():
                raise TypeError(f"{argname}[{b.name!r}]: complex values are not supported")
            if v.shape[v.dim() - len(b.shape) :] != b.shape or v.dim() < len(b.shape):
                raise ValueError(
                    f"{argname}[{b.name!r}]: expected shape (..., {', '.join(map(str, b.shape))}), "
                    f"got {tuple(v.shape)}"
                )
            vb = v.shape[: v.dim() - len(b.shape)]
            if batch is not None and vb != batch:
                raise ValueError(f"{argname}: batch shapes differ between parameters: {tuple(batch)} vs {tuple(vb)}")
            batch = vb
            inside = b.constraint.check(v)
            inside = inside.flatten(len(vb)).all(-1) if inside.dim() > len(vb) else inside
            if not bool(inside.all()):
                raise ValueError(
                    f"{argname}[{b.name!r}]: {int((~inside).sum())} of {inside.numel()} values lie outside "
                    f"the support {b.constraint}"
                )
            free = b.transform.inv(v)
            parts.append(free.reshape(*vb, b.size))
        return torch.cat(parts, -1)

    # ------------------------------------------------------------------ evaluation
    def _call_user(self, values: dict, batch_shape: torch.Size) -> torch.Tensor:
        if len(batch_shape) == 0:  # always call the user with a batch dimension
            values = {k: v.unsqueeze(0) for k, v in values.items()}
            return self._call_user(values, torch.Size([1])).squeeze(0)
        arg = values["x"] if self.flat else values
        if self._mode is None:
            self._mode = self._probe(arg, batch_shape)
        out = self._user_fn(arg) if self._mode == "batched" else self._lifted(arg, batch_shape)
        if not isinstance(out, torch.Tensor):
            raise TypeError(f"log_prob must return a torch.Tensor, got {type(out).__qualname__}")
        if out.is_complex() or not out.is_floating_point():
            raise TypeError(f"log_prob must return a real floating-point tensor, got dtype {out.dtype}")
        if out.shape != batch_shape:
            raise ValueError(
                f"log_prob returned shape {tuple(out.shape)} for a batch of shape {tuple(batch_shape)}; "
                "it must return one log density per batch element"
            )
        return out

    def _flatten_batch(self, arg, batch_shape):
        n = math.prod(batch_shape)
        if self.flat:
            return arg.reshape(n, *arg.shape[len(batch_shape) :])
        return {k: v.reshape(n, *v.shape[len(batch_shape) :]) for k, v in arg.items()}

    def _lifted(self, arg, batch_shape):
        flat = self._flatten_batch(arg, batch_shape)
        if self._mode == "vmap":
            out = torch.func.vmap(self._user_fn)(flat)
        else:
            n = math.prod(batch_shape)
            pick = (lambda i: flat[i]) if self.flat else (lambda i: {k: v[i] for k, v in flat.items()})
            out = torch.stack([torch.as_tensor(self._user_fn(pick(i))) for i in range(n)])
        return out.reshape(batch_shape)

    def _probe(self, arg, batch_shape) -> str:
        """Decide once whether the user's function is batched, vmappable, or needs a loop."""
        try:
            out = self._user_fn(arg)
            batched_error = None
        except Exception as err:  # a function written for one value may fail on a batch
            out, batched_error = None, err
        if out is not None and not isinstance(out, torch.Tensor):
            raise TypeError(f"log_prob must return a torch.Tensor, got {type(out).__qualname__}")
        if out is not None and out.shape == batch_shape:
            return "batched"
        if out is not None and out.dim() != 0:
            raise ValueError(
                f"log_prob returned shape {tuple(out.shape)} for a batch of shape {tuple(batch_shape)}; "
                "it must return one log density per batch element (shape (...)), or a scalar for one value"
            )
        flat = self._flatten_batch(arg, batch_shape)
        try:
            torch.func.vmap(self._user_fn)(flat)
            return "vmap"
        except Exception as vmap_error:  # vmap cannot trace every function (.item(), data-dependent flow)
            first = flat[0] if self.flat else {k: v[0] for k, v in flat.items()}
            try:
                single = self._user_fn(first)
            except Exception:
                if batched_error is not None:
                    raise batched_error
                raise
            if not isinstance(single, torch.Tensor) or single.dim() != 0:
                raise ValueError(
                    "log_prob must return a tensor of shape (...) for a batch, or a scalar for one value; "
                    f"got {type(single).__qualname__} {tuple(getattr(single, 'shape', ()))} for one value"
                ) from None
            warnings.warn(
                f"log_prob is written for one value and torch.func.vmap could not vectorise it "
                f"({type(vmap_error).__name__}); calling it once per particle in a Python loop, which is "
                "slow. Write it for a batch of values (leading dimensions) to make it fast.",
                RuntimeWarning,
                stacklevel=5,
            )
            return "loop"

    def log_prob(self, z: torch.Tensor) -> torch.Tensor:
        """Log density on the unconstrained space (log-Jacobian included).

        Parameters
        ----------
        z : Tensor of shape (..., dim)

        Returns
        -------
        Tensor of shape (...)
        """
        values, log_jac = self._constrain(z)
        out = self._call_user(values, z.shape[:-1])
        if log_jac is None or not (self.data is None or self.data.with_prior):
            return out
        return out + log_jac

    def log_prob_and_score(self, z: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Log density and its gradient (the score) on the unconstrained space.

        Parameters
        ----------
        z : Tensor of shape (..., dim)

        Returns
        -------
        lp : Tensor of shape (...)
        score : Tensor of shape (..., dim)

        Notes
        -----
        With data, a score over many particle-observation pairs is summed over chunks of the
        observations (:meth:`ObservedData.score_chunks`), one autograd pass each.
        """
        chunks = [] if self.data is None else self.data.score_chunks(z.shape[:-1].numel())
        if len(chunks) <= 1:
            return self._log_prob_and_score(z)
        lp = score = 0
        for start, stop in chunks:
            with self.data.chunk(start, stop):
                lp_chunk, score_chunk = self._log_prob_and_score(z)
            lp, score = lp + lp_chunk, score + score_chunk
        return lp, score

    def _log_prob_and_score(self, z: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        with torch.enable_grad():
            z = z.detach().requires_grad_(True)
            try:
                lp = self.log_prob(z)
            except RuntimeError as err:
                if "dtype" not in str(err) and "Double" not in str(err) and "Float" not in str(err):
                    raise
                raise TypeError(
                    f"log_prob failed on {z.dtype} parameters ({err}). Hint: tensors captured by the model "
                    f"(data, constants) must share the sampler's dtype: convert them with .to({z.dtype}) or "
                    "pass dtype= to st.sample"
                ) from err
            if not lp.requires_grad:
                raise ValueError(
                    "log_prob is not differentiable: its output does not depend on the parameters through "
                    "torch operations (avoid .item(), numpy and torch.no_grad inside it)"
                )
            (score,) = torch.autograd.grad(lp.sum(), z, allow_unused=True)
        if score is None:
            score = torch.zeros_like(z)
        return lp.detach(), score

    def init_to_free(self, init, dtype: torch.dtype, device=None, argname: str = "init") -> torch.Tensor:
        """Starting values given by a user as unconstrained coordinates.

        Parameters
        ----------
        init : Tensor or dict of str to Tensor
            Constrained values: a tensor of shape (..., dim) for a flat target, else name -> (..., *shape).

        Returns
        -------
        Tensor of shape (..., dim), in ``dtype`` on ``device``.
        """
        if isinstance(init, torch.Tensor):
            if not self.flat:
                raise TypeError(f"{argname}: a named-parameter target takes a dict name -> tensor of constrained values")
            init = {"x": init}
        if not isinstance(init, Mapping):
            raise TypeError(f"{argname}: expected a tensor or dict of tensors, got {type(init).__qualname__}")
        values = {}
        for name, value in init.items():
            try:
                v = torch.as_tensor(value)
            except (TypeError, ValueError, RuntimeError):
                raise TypeError(
                    f"{argname}[{name!r}]: expected a tensor or array of numbers, got {type(value).__qualname__}"
                ) from None
            if v.device.type == "meta":
                raise ValueError(f"{argname}[{name!r}]: a 'meta' tensor holds no values")
            if v.is_complex() or v.dtype == torch.bool:
                raise TypeError(f"{argname}[{name!r}]: expected real numbers, got dtype {v.dtype}")
            values[name] = v.to(dtype=dtype, device=device)
        return self.unconstrain(values, argname).to(dtype=dtype, device=device)

    def draw_initial(self, n: int, generator: torch.Generator) -> dict:
        """Draw ``n`` constrained starting values from ``initial`` (for ``init="prior"``)."""
        if self.initial is None:
            raise ValueError('init="prior" needs a target built by Target.from_priors (or with initial=)')
        return self.initial(n, generator)

    def __repr__(self) -> str:
        if self.flat:
            return f"Target(dim={self.dim})"
        inner = ", ".join(f"{b.name}: {tuple(b.shape)} {b.constraint}" for b in self.blocks)
        return f"Target({inner})"

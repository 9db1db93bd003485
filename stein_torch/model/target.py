"""The user's model as a differentiable log density on one flat unconstrained space.

A :class:`Target` gives every sampler what it needs: the number of unconstrained coordinates, the
map from a flat unconstrained vector to named values on their supports (via
:func:`torch.distributions.biject_to`, log-Jacobian included), and the log density with its score
by autograd, batched over any leading dimensions.

Examples
--------
>>> import torch, stein_torch as st
>>> from torch.distributions import constraints
>>> t = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=3)       # (..., 3) -> (...)
>>> t = st.Target(lambda p: -p["tau"] - 0.5 * p["mu"] ** 2,
...               latents={"mu": st.Latent(), "tau": st.Latent(support=constraints.positive)})
"""

from __future__ import annotations

from typing import Callable, Mapping

import torch
from torch.distributions import constraints

from ..checks import check_callable, check_int
from .builders import from_priors
from .data import ObservedData, with_likelihood
from .defaults import SamplerDefaults
from .latent import Latent, layout
from .lift import Batched
from .module import module_target

__all__ = ["Target"]


class Target:
    """A log density over named (or flat) latents, ready for every sampler of the package.

    Parameters
    ----------
    log_prob : callable
        With ``dim``: ``log_prob(x)`` for ``x`` of shape ``(..., dim)`` returns ``(...)``.
        With ``latents``: ``log_prob(p)`` for a dict ``p[name]`` of shape ``(..., *shape)``, on the
        constrained scale, returns ``(...)``. Log densities up to an additive constant. A function
        written for a single value (returning a scalar) is vectorised with :func:`torch.func.vmap`,
        or, when vmap cannot trace it, called in a loop (with a one-time warning).
    dim : int, optional
        Number of coordinates of a flat target (one latent named ``x``). Exactly one of ``dim``
        and ``latents`` is given.
    latents : dict of str to Latent, optional
        Named unknowns with shapes and supports.
    support : Constraint, default=constraints.real
        Support of a flat target (only with ``dim``).
    initial : callable, optional
        ``initial(n, generator) -> dict`` drawing ``n`` constrained starting values per name;
        enables ``init="prior"``.
    log_likelihood : callable, optional
        ``log_likelihood(p, data) -> (*batch, n_obs)``: one log-likelihood term per observation
        (``p`` as for ``log_prob``, ``data`` a dict of tensors (n_obs, ...) or a minibatch of them);
        or a :class:`torch.distributions.Distribution` over ``data[observed]`` (batch shape
        (*batch, n_obs), or broadcasting to it), whose ``log_prob`` gives the terms and whose
        ``sample()`` simulates data (``posterior_predictive``, :func:`stein_torch.prior_predictive`).
        Then ``log_prob`` is the log prior and the target is ``log_prob(p) + sum of the terms``;
        the terms fill the ``log_likelihood`` group of the InferenceData (for :func:`arviz.loo`).
    data : dict of str to Tensor, optional
        The observations and covariates, each of shape (n_obs, ...); needed with ``log_likelihood``.
    batch_size : int, optional
        Score the likelihood on random minibatches of this size, scaled by n_obs / batch_size
        (stochastic SVGD, reshuffled each epoch, shuffles from the sampler's seed). Default: full data.
    observed : str or list of str, optional
        Keys of ``data`` that are observations (``observed_data`` group); the others are covariates
        (``constant_data``). One key when ``log_likelihood`` returns a Distribution.
    predictive : callable, optional
        ``predictive(p, inputs) -> (*batch, n, ...)``, used by :meth:`Result.predict`.
    defaults : SamplerDefaults, optional
        Sampler settings this target prefers where the user gives none (module targets set them).

    See Also
    --------
    Target.from_priors : a target from prior distributions and a log likelihood.
    Target.from_module : a Bayesian neural network from a :class:`torch.nn.Module`.
    """

    def __init__(
        self,
        log_prob: Callable,
        dim: int | None = None,
        latents: Mapping[str, Latent] | None = None,
        *,
        support: constraints.Constraint = constraints.real,
        initial: Callable | None = None,
        log_likelihood: Callable | None = None,
        data: Mapping | None = None,
        batch_size: int | None = None,
        observed=None,
        predictive: Callable | None = None,
        defaults: SamplerDefaults | None = None,
    ):
        check_callable(log_prob, "Target: log_prob")
        if (dim is None) == (latents is None):
            raise ValueError("Target: give exactly one of dim= (flat target) or latents= (named latents)")
        self.flat = dim is not None
        if self.flat:
            check_int(dim, "Target: dim")
            latents = {"x": Latent((dim,), support)}
        self.blocks = layout(latents)
        self.dim = sum(b.size for b in self.blocks)
        self.initial = initial
        self.predictive = None if predictive is None else check_callable(predictive, "Target: predictive")
        if defaults is not None and not isinstance(defaults, SamplerDefaults):
            raise TypeError(f"Target: defaults must be a SamplerDefaults, got {type(defaults).__qualname__}")
        self.defaults = defaults or SamplerDefaults()
        self.data, self.log_likelihood = None, log_likelihood
        joint = log_prob
        if log_likelihood is not None or data is not None:
            if log_likelihood is None or data is None:
                raise ValueError("Target: log_likelihood= and data= go together; got only one of them")
            check_callable(log_likelihood, "Target: log_likelihood")
            self.data = ObservedData(data, batch_size, observed)
            joint = with_likelihood(log_prob, log_likelihood, self.data)
        elif batch_size is not None or observed is not None:
            raise ValueError("Target: batch_size= and observed= need log_likelihood= and data=")
        origin = (log_likelihood, log_prob) if log_likelihood is not None else (log_prob,)
        self._user = Batched(joint, self.flat, "log_prob", describe=self._describe_inputs, origin=origin)

    # ------------------------------------------------------------------ construction helpers
    @classmethod
    def from_priors(cls, priors, log_likelihood=None, *, data=None, batch_size=None, observed=None, dims=None) -> "Target":
        """A target from prior distributions and a log likelihood; see
        :func:`stein_torch.model.builders.from_priors`."""
        return from_priors(cls, priors, log_likelihood, data=data, batch_size=batch_size, observed=observed, dims=dims)

    @classmethod
    def from_module(cls, module, *, prior, likelihood: Callable, data, batch_size: int | None = None, **options):
        """A Bayesian neural network whose particles are stacked copies of ``module``'s parameters;
        see :func:`stein_torch.model.module.module_target`."""
        return module_target(cls, module, prior=prior, likelihood=likelihood, data=data, batch_size=batch_size, **options)

    def _describe_inputs(self) -> tuple[str, list[str]]:
        """What the user's functions receive, for messages: (text, names)."""
        if self.flat:
            n = self.dim
            text = f"x of shape (..., {n}) (dim={n}), so x[..., i] takes i in 0..{n - 1}"
            names = ["x"]
        else:
            parts = [f"{b.name}: (...{''.join(f', {n}' for n in b.shape)})" for b in self.blocks]
            text = "p with the latents " + ", ".join(parts) + " (... = batch)"
            names = list(self.names)
        if self.data is not None:
            shapes = ", ".join(f"{k}: {tuple(v.shape)}" for k, v in self.data.tensors.items())
            text += f"; data with the keys {shapes}"
            names += list(self.data.tensors)
        return text, names

    # ------------------------------------------------------------------ coordinates
    @property
    def names(self) -> list[str]:
        return [b.name for b in self.blocks]

    @property
    def shapes(self) -> dict[str, torch.Size]:
        return {b.name: b.shape for b in self.blocks}

    @property
    def dims(self) -> dict[str, tuple]:
        """ArviZ dimension names of every latent's axes (see :class:`Latent`)."""
        return {b.name: b.dims for b in self.blocks}

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
            if v.is_complex():
                raise TypeError(f"{argname}[{b.name!r}]: complex values are not supported")
            if not v.is_floating_point():
                v = v.to(torch.get_default_dtype())
            if v.dim() < len(b.shape) or v.shape[v.dim() - len(b.shape) :] != b.shape:
                raise ValueError(
                    f"{argname}[{b.name!r}]: expected shape (..., {', '.join(map(str, b.shape))}), "
                    f"got {tuple(v.shape)}"
                )
            vb = v.shape[: v.dim() - len(b.shape)]
            if batch is not None and vb != batch:
                raise ValueError(f"{argname}: batch shapes differ between latents: {tuple(batch)} vs {tuple(vb)}")
            batch = vb
            inside = b.support.check(v)
            inside = inside.flatten(len(vb)).all(-1) if inside.dim() > len(vb) else inside
            if not bool(inside.all()):
                raise ValueError(
                    f"{argname}[{b.name!r}]: {int((~inside).sum())} of {inside.numel()} values lie outside "
                    f"the support {b.support}"
                )
            parts.append(b.transform.inv(v).reshape(*vb, b.size))
        return torch.cat(parts, -1)

    # ------------------------------------------------------------------ evaluation
    @property
    def evaluation_mode(self) -> str | None:
        """How the user's function is called: "batched", "vmap", "loop" (one value at a time), or None
        before the first call."""
        return self._user.mode

    @property
    def evaluation_warning(self) -> str | None:
        """The warning issued (once, at the user's line) when the log density is called in a loop."""
        return self._user.warning

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
        out = self._user(values["x"] if self.flat else values, z.shape[:-1])
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
                    "pass dtype= to the sampler"
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

    # ------------------------------------------------------------------ starting values
    def init_to_free(self, init, dtype: torch.dtype, device=None, argname: str = "init") -> torch.Tensor:
        """Starting values given by a user, as unconstrained coordinates.

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
                raise TypeError(f"{argname}: a target with named latents takes a dict name -> tensor of constrained values")
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

    # ------------------------------------------------------------------ identity in files
    def signature(self) -> dict:
        """What a file must agree on with the target it is used with: names, shapes, supports."""
        return {
            "dim": int(self.dim),
            "flat": bool(self.flat),
            "latents": [
                {"name": b.name, "shape": [int(n) for n in b.shape], "support": str(b.support)} for b in self.blocks
            ],
        }

    def check_signature(self, stored, argname: str) -> None:
        """Raise ValueError when a file was written for a target of another shape."""
        current = self.signature()
        if stored != current:
            raise ValueError(
                f"{argname}: the file was written for a different target: {_describe(stored)}; this target has "
                f"{_describe(current)}. Use the same model (latent names, shapes and supports)."
            )

    def __repr__(self) -> str:
        if self.flat:
            return f"Target(dim={self.dim})"
        inner = ", ".join(f"{b.name}: {tuple(b.shape)} {b.support}" for b in self.blocks)
        return f"Target({inner})"


def _describe(signature) -> str:
    if not isinstance(signature, Mapping) or not isinstance(signature.get("latents"), list):
        return f"an unreadable signature ({type(signature).__qualname__})"
    parts = ", ".join(f"{p.get('name')}{tuple(p.get('shape', ()))} {p.get('support')}" for p in signature["latents"])
    return f"dim {signature.get('dim')} [{parts}]"

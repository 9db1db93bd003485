"""Observed data on a target: per-observation log-likelihood terms, minibatches, pointwise values.

A target with data has the log density

    log p(theta | data) = log prior(theta) + sum_i l_i(theta),   i = 1..n_obs,

where the user's ``log_likelihood(p, data)`` returns the terms l_i with shape (*batch, n_obs). With a
``batch_size`` the sampler scores a random minibatch B and scales its sum by n_obs / |B|, an unbiased
estimate of the full sum (minibatch score, "Stein Variational Gradient Descent: A General Purpose
Bayesian Inference Algorithm", arXiv:1608.04471). Minibatches are consecutive slices of a random
permutation of the observations, reshuffled at every epoch (the short tail of an epoch is dropped, so
every minibatch is a uniform random subset and the estimate stays unbiased); the shuffles come from
the sampler's generator, so a seeded run repeats its minibatches.

The same terms, evaluated on the full data in chunks at the end of a run, fill the ``log_likelihood``
group of the InferenceData (what :func:`arviz.loo` and :func:`arviz.compare` read).
"""

from __future__ import annotations

import contextlib
from typing import Callable, Mapping

import numpy as np
import torch

from ..checks import check_int
from .likelihood import check_terms, observation_terms

__all__ = ["ObservedData", "with_likelihood", "pointwise_log_likelihood", "full_log_prob", "likelihood_groups", "data_dims"]

POINTWISE_ELEMENTS = 2**20  # particles x observations per chunk of the pointwise log-likelihood
SCORE_PAIRS = 2**15  # particles x observations per autograd pass of a score (larger: in observation chunks)


class ObservedData:
    """Data tensors that share their first axis (the observations), with an optional minibatch stream.

    Parameters
    ----------
    data : dict of str to Tensor or array
        Each value has shape (n_obs, ...); all share the same ``n_obs``. Floating data are cast to
        the particles' dtype when used; integer data (class labels, counts) are kept as they are.
    batch_size : int, optional
        Minibatch size for stochastic scores; None (default) uses the full data at every step.
    observed : str or sequence of str, optional
        Keys that are observations (``observed_data`` group); the other keys are covariates
        (``constant_data`` group). Default: none are marked, all go to ``constant_data``.

    Attributes
    ----------
    n_obs : int
    indices : Tensor of shape (batch_size,) or None
        The current minibatch, None when the full data are in use.
    """

    def __init__(self, data: Mapping, batch_size: int | None = None, observed=None):
        if not isinstance(data, Mapping) or not data:
            raise TypeError(
                f"data must be a non-empty dict of name -> tensor of shape (n_obs, ...), got {type(data).__qualname__}"
            )
        tensors = {}
        for key, value in data.items():
            if not isinstance(key, str) or not key.isidentifier():
                raise ValueError(f"data: keys must be identifiers (they become ArviZ variable names), got {key!r}")
            try:
                tensor = torch.as_tensor(value)
            except Exception:
                raise TypeError(
                    f"data[{key!r}]: expected a tensor or array of shape (n_obs, ...), got {type(value).__qualname__}"
                ) from None
            if tensor.dim() == 0:
                raise ValueError(f"data[{key!r}]: expected shape (n_obs, ...), got a scalar; wrap it as shape (1,)")
            if tensor.is_complex():
                raise TypeError(f"data[{key!r}]: complex data are not supported")
            tensors[key] = tensor.detach()
        lengths = {key: t.shape[0] for key, t in tensors.items()}
        if len(set(lengths.values())) != 1:
            listed = ", ".join(f"{k!r}: {n}" for k, n in lengths.items())
            raise ValueError(
                f"data: every tensor needs the same length along the observation axis (axis 0); got {listed}"
            )
        self.tensors = tensors
        self.n_obs = next(iter(lengths.values()))
        if self.n_obs < 1:
            raise ValueError("data: the observation axis is empty (n_obs == 0)")
        if batch_size is not None:
            batch_size = check_int(batch_size, "batch_size", minimum=1, maximum=self.n_obs)
        self.batch_size = batch_size
        observed = [observed] if isinstance(observed, str) else list(observed or [])
        unknown = [k for k in observed if k not in tensors]
        if unknown:
            raise ValueError(f"observed: {unknown} are not keys of data (keys: {list(tensors)})")
        self.observed = observed
        self.simulates: bool | None = None  # whether the likelihood returns a Distribution (known after a call)
        self.indices: torch.Tensor | None = None
        self.window: tuple[int, int] | None = None  # rows of the data in use that a score chunk sees
        self.shard: tuple[int, int] | None = None  # data sharding: the observations this process scores
        self.counts_prior = True  # data sharding: whether this process's log density includes the prior
        self._generator: torch.Generator | None = None
        self._order: torch.Tensor | None = None
        self._position = 0
        self.epoch = 0
        self._cast: dict = {}

    # ------------------------------------------------------------------ minibatch stream
    def start(self, generator: torch.Generator) -> None:
        """Begin a fresh minibatch stream whose shuffles come from ``generator``."""
        self._generator = generator
        self._order, self._position, self.epoch = None, 0, 0
        self.indices = None

    def advance(self) -> None:
        """Move to the next minibatch (no-op without ``batch_size``); reshuffle at each epoch end."""
        if self.batch_size is None:
            return
        if self._generator is None:
            self._generator = torch.Generator().manual_seed(0)
        if self._order is None or self._position + self.batch_size > self.n_obs:
            self._order = torch.randperm(self.n_obs, generator=self._generator)
            self._position = 0
            self.epoch += 1
        self.indices = self._order[self._position : self._position + self.batch_size]
        self._position += self.batch_size

    def state_dict(self) -> dict:
        """Position in the minibatch stream (shuffle generator, current order, epoch), for checkpoints."""
        if self.batch_size is None:
            return {}
        return {
            "generator": None if self._generator is None else self._generator.get_state(),
            "order": None if self._order is None else self._order.clone(),
            "position": self._position,
            "epoch": self.epoch,
        }

    def load_state_dict(self, state: dict) -> None:
        """Continue the minibatch stream where :meth:`state_dict` left it."""
        if self.batch_size is None or not state:
            return
        if state["generator"] is not None:
            self._generator = torch.Generator()
            self._generator.set_state(state["generator"])
        self._order = state["order"]
        self._position, self.epoch = int(state["position"]), int(state["epoch"])

    @contextlib.contextmanager
    def next_batch(self):
        """Context of one sampler step: the next minibatch in use, the full data again on exit."""
        self.advance()
        try:
            yield self
        finally:
            self.indices = None

    @contextlib.contextmanager
    def full(self):
        """Context in which the full data are used (mode finding, final log density, LOO)."""
        saved, self.indices = self.indices, None
        try:
            yield self
        finally:
            self.indices = saved

    # ------------------------------------------------------------------ score chunks
    @property
    def in_use(self) -> int:
        """Number of observations in use (the minibatch size, or n_obs)."""
        if self.shard is None:
            return self.n_obs if self.indices is None else self.indices.numel()
        return self.shard[1] - self.shard[0] if self.indices is None else self._shard_indices().numel()

    def _shard_indices(self) -> torch.Tensor:
        """The current minibatch's observations inside this process's shard, relative to its start."""
        lo, hi = self.shard
        inside = self.indices[(self.indices >= lo) & (self.indices < hi)]
        return inside - lo

    def score_chunks(self, n_particles: int) -> list[tuple[int, int]]:
        """Row ranges of the data in use, each with at most ``SCORE_PAIRS`` particle-observation pairs.

        A score over many observations is taken chunk by chunk (one autograd pass each, summed):
        the network's intermediates stay a few MiB instead of particles x n_obs x width numbers,
        which keeps memory bounded and the arithmetic in cache.
        """
        n = self.in_use
        rows = max(1, SCORE_PAIRS // max(1, n_particles))
        return [(a, min(n, a + rows)) for a in range(0, n, rows)]

    @contextlib.contextmanager
    def chunk(self, start: int, stop: int):
        """Context in which the log density sees rows start..stop-1 of the data in use, and the
        prior and log-Jacobian only in the chunk that starts at 0 (so chunk sums give the whole)."""
        saved, self.window = self.window, (start, stop)
        try:
            yield self
        finally:
            self.window = saved

    @property
    def with_prior(self) -> bool:
        """Whether the log density in use includes the prior (not in later score chunks)."""
        return self.counts_prior and (self.window is None or self.window[0] == 0)

    # ------------------------------------------------------------------ access
    def current(self, dtype: torch.dtype, device=None) -> tuple[dict, float]:
        """The data in use (current minibatch or all, restricted to the chunk window) cast to
        ``dtype``, and the scale n_obs / |batch|."""
        full = self.cast(dtype, device)
        scale = 1.0 if self.indices is None else self.n_obs / self.indices.numel()
        indices = self.indices
        if self.shard is not None:  # data sharding: this process's slice (and its part of the minibatch)
            full = {k: v[self.shard[0] : self.shard[1]] for k, v in full.items()}
            indices = None if indices is None else self._shard_indices()
        if indices is None:
            batch = full
        else:
            idx = indices.to(next(iter(full.values())).device)
            batch = {k: v[idx] for k, v in full.items()}
        if self.window is not None:
            start, stop = self.window
            batch = {k: v[start:stop] for k, v in batch.items()}
        return batch, scale

    def cast(self, dtype: torch.dtype, device=None) -> dict:
        """All data with floating tensors in ``dtype`` (cached per dtype and device)."""
        key = (dtype, str(device))
        if key not in self._cast:
            self._cast[key] = {
                k: (v.to(dtype) if v.is_floating_point() else v).to(device if device is not None else v.device)
                for k, v in self.tensors.items()
            }
        return self._cast[key]

    def slice(self, start: int, stop: int, dtype: torch.dtype, device=None) -> dict:
        """Observations start..stop-1 of every tensor, floating ones in ``dtype``."""
        return {k: v[start:stop] for k, v in self.cast(dtype, device).items()}

    def groups(self) -> tuple[dict, dict]:
        """``observed_data`` and ``constant_data`` as numpy arrays, keyed by name."""
        observed = {k: v.cpu().numpy() for k, v in self.tensors.items() if k in self.observed}
        constant = {k: v.cpu().numpy() for k, v in self.tensors.items() if k not in self.observed}
        return observed, constant

    def __repr__(self) -> str:
        shapes = ", ".join(f"{k}: {tuple(v.shape)}" for k, v in self.tensors.items())
        return f"ObservedData({shapes}, batch_size={self.batch_size})"


def _dtype_of(arg) -> tuple[torch.dtype, torch.device]:
    first = arg if isinstance(arg, torch.Tensor) else next(iter(arg.values()))
    return first.dtype, first.device


def with_likelihood(log_prior: Callable, log_likelihood: Callable, data: ObservedData) -> Callable:
    """The joint log density ``log_prior(p) + scale * log_likelihood(p, batch).sum(-1)``.

    Written so that it is batched when both user functions are, and vmappable when they are written
    for one parameter value (then ``log_likelihood`` returns shape (n_obs,)). ``log_likelihood`` may
    return a torch Distribution over the observed key instead (:mod:`stein_torch.model.likelihood`).
    """

    def log_joint(arg):
        dtype, device = _dtype_of(arg)
        batch, scale = data.current(dtype, device)
        terms = observation_terms(log_likelihood(arg, batch), batch, data)
        likelihood = scale * terms.sum(-1)
        return log_prior(arg) + likelihood if data.with_prior else likelihood

    return log_joint


def _pointwise_chunk(log_likelihood: Callable, arg, batch: dict, n_particles: int, n: int, data) -> torch.Tensor:
    """Terms (n_particles, n) for a flat batch of particles, batched call first, vmap if needed."""
    try:
        terms = observation_terms(log_likelihood(arg, batch), batch, data)
        if tuple(terms.shape) == (n_particles, n):
            return terms
    except Exception:
        pass
    terms = torch.func.vmap(lambda a: observation_terms(log_likelihood(a, batch), batch, data))(arg)
    return check_terms(terms, n)


def pointwise_log_likelihood(
    target, z: torch.Tensor, max_elements: int = POINTWISE_ELEMENTS, observations: tuple[int, int] | None = None
) -> np.ndarray:
    """Per-observation log-likelihood on the full data for particles ``z`` (..., dim), in chunks.

    Parameters
    ----------
    target : Target
        A target built with ``log_likelihood=`` and ``data=``.
    z : Tensor of shape (..., dim)
        Unconstrained particles.
    max_elements : int
        Particles x observations evaluated at once (bounds the memory).
    observations : (int, int), optional
        Only observations start..stop-1 (default: all).

    Returns
    -------
    ndarray of shape (..., n_obs) (or (..., stop - start))
    """
    data: ObservedData = target.data
    batch_shape = z.shape[:-1]
    flat = z.reshape(-1, z.shape[-1])
    first, last = observations or (0, data.n_obs)
    n_particles, n_obs = flat.shape[0], last - first
    obs_chunk = max(1, min(n_obs, max_elements))
    particle_chunk = max(1, max_elements // obs_chunk)
    out = torch.empty(n_particles, n_obs, dtype=z.dtype)
    with torch.no_grad():
        for p0 in range(0, n_particles, particle_chunk):
            values, _ = target.constrain(flat[p0 : p0 + particle_chunk])
            arg = values["x"] if target.flat else values
            m = next(iter(values.values())).shape[0]
            for o0 in range(0, n_obs, obs_chunk):
                o1 = min(n_obs, o0 + obs_chunk)
                batch = data.slice(first + o0, first + o1, z.dtype, z.device)
                out[p0 : p0 + m, o0:o1] = _pointwise_chunk(target.log_likelihood, arg, batch, m, o1 - o0, data).cpu()
    return out.reshape(*batch_shape, n_obs).numpy()


def full_log_prob(target, z: torch.Tensor, max_elements: int = POINTWISE_ELEMENTS) -> torch.Tensor:
    """Log density (...) of particles z (..., dim) on the full data, in chunks of particles."""
    flat = z.reshape(-1, z.shape[-1])
    chunk = max(1, max_elements // target.data.n_obs)
    with torch.no_grad(), target.data.full():
        parts = [target.log_prob(flat[i : i + chunk]) for i in range(0, flat.shape[0], chunk)]
    return torch.cat(parts).reshape(z.shape[:-1])


def data_dims(name: str, ndim: int) -> list[str]:
    """ArviZ dims of a data variable of ``ndim`` axes, (obs, ...): the observation axis is ``obs``."""
    return ["obs"] + [f"{name}_dim_{i}" for i in range(1, ndim)]


def likelihood_groups(target, z: torch.Tensor, values: np.ndarray | None = None) -> dict:
    """The ``log_likelihood``, ``observed_data`` and ``constant_data`` groups and their dims
    (``values``: the pointwise terms when already computed, shape (..., n_obs))."""
    data: ObservedData = target.data
    observed, constant = data.groups()
    if len(observed) == 1 and next(iter(observed.values())).ndim == 1:
        name = next(iter(observed))  # same name as the observation: what arviz.loo_pit and plots expect
    else:
        name = "log_lik" if "log_lik" not in data.tensors else "log_lik_"
    values = pointwise_log_likelihood(target, z) if values is None else values
    dims = {name: ["obs"]}
    for group in (observed, constant):
        for k, v in group.items():
            dims[k] = data_dims(k, v.ndim)
    groups = {"log_likelihood": {name: values}}
    if observed:
        groups["observed_data"] = observed
    if constant:
        groups["constant_data"] = constant
    return {"groups": groups, "dims": dims}

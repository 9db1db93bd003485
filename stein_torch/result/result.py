"""What a run returns: draws on the constrained scale, the per-step history, warnings, and the
bridge to ArviZ."""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

__all__ = ["Result"]


class Result:
    """Draws of a sampler run, organised as (chain, draw).

    For SVGD a chain is an ensemble (an independent particle set) and a draw is a particle; for
    MCMC samplers they are the usual chains and iterations.

    Attributes
    ----------
    target : Target
    particles : Tensor of shape (chains, draws, dim)
        Final positions on the unconstrained scale.
    lp : Tensor of shape (chains, draws)
        Log density (unconstrained scale, log-Jacobian included) of each particle.
    history : dict of str to ndarray
        Per-step figures of the run (KSD, mean log density, step size, faults, ...), each of shape
        (steps,) or (steps, chains).
    settings : dict
        Method, kernel, step rule and other settings (stored as InferenceData attrs).
    stop_reason : str
        Why the run ended ("steps", "draws", "interrupted", a stop rule's reason).
    sample_stats : dict of str to ndarray
        Extra per-draw statistics of shape (chains, draws) for the ``sample_stats`` group.
    warnings : list of str
        Why the result may be wrong; empty when nothing was seen.
    """

    def __init__(
        self,
        target,
        particles: torch.Tensor,
        lp: torch.Tensor,
        history: dict[str, np.ndarray],
        settings: dict[str, Any],
        stop_reason: str = "steps",
        sample_stats: dict[str, np.ndarray] | None = None,
        warnings: list[str] | None = None,
    ):
        self.target = target
        self.particles = particles
        self.lp = lp
        self.history = history
        self.settings = settings
        self.stop_reason = stop_reason
        self.sample_stats = dict(sample_stats or {})
        self.warnings = list(warnings or [])
        self._draws = None
        self._likelihood = None
        self._simulated: dict = {}  # posterior predictive data sets by seed

    @property
    def draws(self) -> dict[str, torch.Tensor]:
        """Name -> tensor of shape (chains, draws, *shape) on the constrained scale."""
        if self._draws is None:
            with torch.no_grad():
                values, _ = self.target.constrain(self.particles)
            self._draws = {k: v.detach() for k, v in values.items()}
        return self._draws

    @property
    def method(self) -> str:
        return str(self.settings.get("method", "svgd"))

    def to_inference_data(self, *, coords=None, dims=None, predictive_seed=None, **groups):
        """Convert to :class:`arviz.InferenceData`.

        Groups: ``posterior`` (one variable per latent, dims chain, draw, *shape; for SVGD
        chain = ensemble, draw = particle), ``sample_stats`` (``lp`` per draw and any statistics of
        the sampler), attrs with the library name, version, settings and warnings. For targets with
        data: ``log_likelihood`` (per-observation terms on the full data, dims chain, draw, obs: what
        :func:`arviz.loo` reads), ``observed_data`` and ``constant_data``; and when the likelihood
        returns a torch Distribution, ``posterior_predictive`` (one simulated data set per draw,
        seeded by ``predictive_seed``, default the run's seed). ``predictions=`` takes
        :meth:`predict` outputs (chains, draws, n, ...) or a dict of them. Other groups may be
        passed as keyword arguments of :func:`arviz.from_dict`.

        Parameters
        ----------
        coords : dict of str to array-like, optional
            Labels of dimensions, e.g. ``{"school": names}``; passed to :func:`arviz.from_dict`.
        dims : dict of str to list of str, optional
            Dimension names per variable, replacing ours (latents: ``Latent(dims=...)`` or
            ``<name>_dim_<i>``; data, log-likelihood and simulated data: ``obs``, ...).
        predictive_seed : int, optional
            Seed of the simulated data sets.

        Notes
        -----
        Particles are not a Markov chain: ``ess`` computed on them is not an effective sample size
        in the MCMC sense, and only ``r_hat`` across independent ensembles is meaningful.
        """
        from .inference_data import to_inference_data

        return to_inference_data(self, coords=coords, dims=dims, predictive_seed=predictive_seed, **groups)

    def predict(self, inputs, *, predictive=None) -> torch.Tensor:
        """Outputs of every particle on ``inputs``, shape (chains, draws, n, ...).

        Module targets predict with the network; other targets need ``predictive=fn`` (on the
        target or here), ``fn(p, inputs) -> (*batch, n, ...)``. See
        :func:`stein_torch.predictive_interval` for the posterior predictive mean and bands.
        """
        from .predictive import predict

        return predict(self, inputs, predictive)

    def plot_history(self, figsize=None):
        """Per-step figures as a matplotlib Figure: for SVGD the KSD of each ensemble, the mean log
        density, the step size and the direction size, with re-whitening steps marked and annealing
        shaded; for Langevin the step size and acceptance rate per chain. Axes are labelled."""
        from .plots import plot_history

        return plot_history(self, figsize=figsize)

    def summary(self, **kwargs):
        """Posterior summary by :func:`arviz.summary` (a pandas DataFrame).

        For SVGD results the default is ``kind="stats"`` (mean, sd, HDI) since MCMC diagnostics
        do not apply to particles; pass ``kind="all"`` to get them anyway (r_hat across ensembles).
        """
        import arviz as az

        if self.method == "svgd":
            kwargs.setdefault("kind", "stats")
        return az.summary(self.to_inference_data(), **kwargs)

    def save(self, path) -> None:
        """Write the result to ``path`` atomically (temporary file, fsync, rename).

        ``*.nc``: NetCDF of :meth:`to_inference_data` (read with ``arviz.from_netcdf``). Any other
        name: a torch file of tensors, numbers and strings only, read back without running code by
        ``stein_torch.load(path, target)``.
        """
        from .files import save_result

        save_result(self, path)

    def __repr__(self) -> str:
        chains, draws = self.particles.shape[:2]
        return f"Result(method={self.method!r}, chains={chains}, draws={draws}, stop_reason={self.stop_reason!r})"

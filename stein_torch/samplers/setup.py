"""What every sampler does before its first step: settings, whitening and starting points.

:func:`configure` checks the settings shared by all samplers once (dtype, device, seed,
preconditioning, the start) and merges in the target's declared :class:`SamplerDefaults`.
:func:`starting_points` finds the whitening (L-BFGS to the mode, curvature there) and draws the
starting points in whitened coordinates, pulling faulty default draws toward the mode.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import torch

from ..checks import check_choice, check_device, check_dtype, check_int, check_type
from ..model import Target
from .faults import Evaluator
from .modes import STARTS, ModeSearch, allocate, search_modes
from .precondition import LAPLACE_MAX_DIM, Affine, laplace_whitening

__all__ = ["Setup", "Start", "configure", "starting_points", "PRECONDITIONS"]

PRECONDITIONS = ("auto", "laplace", "covariance", None)
PULL_IN = 20  # halvings toward the mode for default starting draws where the model is not finite
SEARCH_BUDGET_PER_PARTICLE = 25  # the mode search starts no new search after 25 x particles evaluations


@dataclass
class Setup:
    """Settings shared by every sampler, checked and resolved.

    Attributes
    ----------
    target : Target
    dtype : torch.dtype
    device : torch.device
    seed : int
    generator : torch.Generator
        The run's random stream (starting draws, proposals, momenta).
    precondition : {"laplace", "covariance", None}
        "auto" resolved: "laplace" up to ``LAPLACE_MAX_DIM`` coordinates, "covariance" above.
    init : None, "prior", Tensor or dict
        The start: None for draws around the mode (or a standard normal without whitening).
    """

    target: Target
    dtype: torch.dtype
    device: torch.device
    seed: int
    generator: torch.Generator
    precondition: str | None
    init: object


@dataclass
class Start:
    """The set-up's outcome: whitening, starting points and what the mode search saw.

    Attributes
    ----------
    affine : Affine
    laplace_ok : bool
        Whether the curvature at the mode was negative definite.
    u, lp, score : Tensors of shape (*lead, d), (*lead,), (*lead, d)
        Starting points (whitened), their log densities and whitened scores.
    search : ModeSearch or None
        The modes found (None when no mode search ran).
    precondition : str or None
        "covariance" when the mode search found no mode (a density unbounded or undefined at every
        end point), else the setting asked for.
    mode_counts : list of int
        Starting particles per kept mode (per ensemble), best mode first.
    """

    affine: Affine
    laplace_ok: bool
    u: torch.Tensor
    lp: torch.Tensor
    score: torch.Tensor
    search: ModeSearch | None = None
    precondition: str | None = None
    mode_counts: list | None = None


def configure(
    target,
    *,
    init=None,
    dtype=torch.float64,
    precondition="auto",
    seed=None,
    device=None,
    state: Mapping | None = None,
) -> Setup:
    """Check and resolve the shared settings (the target's defaults fill what the user left open).

    With ``state`` (resuming) and no ``seed``, the seed of the saved run is used.
    """
    check_type(target, "target", Target, "stein_torch.Target")
    defaults = target.defaults
    if init is None:
        init = defaults.init
    check_choice(precondition, "precondition", PRECONDITIONS)
    if precondition == "auto":
        precondition = defaults.precondition
    if precondition == "auto":
        precondition = "laplace" if target.dim <= LAPLACE_MAX_DIM else "covariance"
    if isinstance(init, str) and init not in ("prior", "laplace"):
        raise ValueError(f"init must be None, 'prior', 'laplace', a tensor or a dict of tensors; got {init!r}")
    if init == "laplace":
        init = None
    if init == "prior" and target.initial is None:
        raise ValueError('init="prior" needs a target built with Target.from_priors')
    if state is not None and not isinstance(state, Mapping):
        raise TypeError(f"state must be a dict from state_dict(), got {type(state).__qualname__}")
    if seed is None and state is not None and isinstance(state.get("settings"), Mapping):
        seed = state["settings"].get("seed")  # resuming without a seed: keep the checkpoint's
    if seed is not None:
        check_int(seed, "seed", minimum=0, maximum=2**64 - 1)
    seed = int(seed) if seed is not None else int(torch.seed() % (2**63))
    return Setup(
        target=target, dtype=check_dtype(dtype), device=check_device(device), seed=seed,
        generator=torch.Generator().manual_seed(seed), precondition=precondition, init=init,
    )


def user_start(setup: Setup, lead: tuple[int, ...]) -> torch.Tensor | None:
    """The user's starting values as unconstrained z of shape (*lead, dim), or None.

    A leading shape that drops a first axis of size 1 is accepted ((particles,) for one ensemble).
    """
    init = setup.init
    if init is None or isinstance(init, str):
        return None
    z = setup.target.init_to_free(init, setup.dtype, setup.device)
    if len(lead) > 1 and lead[0] == 1 and tuple(z.shape[:-1]) == lead[1:]:
        z = z[None]
    if tuple(z.shape[:-1]) != lead:
        accepted = f"{lead[1:]} or {lead}" if len(lead) > 1 and lead[0] == 1 else f"{lead}"
        raise ValueError(f"init: expected leading shape {accepted}; got {tuple(z.shape[:-1])}")
    return z


def starting_points(setup: Setup, evaluate: Evaluator, lead: tuple[int, ...], starts: int = STARTS) -> Start:
    """Whitening and starting points of shape (*lead, dim).

    With the default start (no ``init``) and Laplace preconditioning, the mode search runs from
    ``starts`` points (:mod:`stein_torch.samplers.modes`); the particles are split among the modes
    kept in proportion to their Laplace masses, and the coordinates are whitened by the highest
    mode's Laplace map. The best mode's particles are the draws a single search would give, so a
    posterior with one mode starts exactly as before. When no mode is found the run falls back to
    covariance whitening from standard normal draws.

    Raises
    ------
    ValueError
        User-given starting values (or prior draws) where the model is not finite.
    FloatingPointError
        Not finite even around the mode.
    """
    target, dim = setup.target, setup.target.dim
    user_z = user_start(setup, lead)
    affine = Affine.identity(dim, setup.dtype, setup.device)
    laplace_ok, search, precondition, counts = False, None, setup.precondition, None
    own_start = user_z is None and setup.init != "prior"
    if setup.precondition == "laplace" and own_start and starts > 1:
        origin = torch.zeros(dim, dtype=setup.dtype, device=setup.device)
        extra = torch.Generator().manual_seed((setup.seed + 2) % 2**63)  # not the run's stream
        search = search_modes(target, origin, starts, extra, SEARCH_BUDGET_PER_PARTICLE * lead[-1])
        kept = search.kept(lead[-1])
        if kept:
            affine, laplace_ok = kept[0].affine, kept[0].curvature_ok
            counts = allocate([m.log_mass for m in kept], lead[-1])
        else:
            precondition = "covariance"
    elif setup.precondition == "laplace":
        start = user_z.reshape(-1, dim).mean(0) if user_z is not None else torch.zeros(dim, dtype=setup.dtype, device=setup.device)
        found, laplace_ok = laplace_whitening(target, start)
        if found is not None:
            affine = found
    if user_z is not None:
        u = affine.to_u(user_z)
    elif setup.init == "prior":
        count = 1
        for n in lead:
            count *= n
        draws = target.draw_initial(count, setup.generator)
        z = target.unconstrain(draws, "init").to(dtype=setup.dtype, device=setup.device).reshape(*lead, dim)
        u = affine.to_u(z)
    else:  # draws from the Laplace approximation (or a standard normal around the origin)
        u = torch.randn((*lead, dim), generator=setup.generator, dtype=setup.dtype).to(setup.device)
        if counts is not None and len(counts) > 1:
            u = _place_on_modes(u, kept, counts, affine, extra)
    lp, score, bad = evaluate(u, affine, first=True)
    for _ in range(PULL_IN):
        if not bad.any():
            break
        if user_z is not None or setup.init == "prior":
            raise ValueError(
                f"init: {int(bad.sum())} of {bad.numel()} initial points have a non-finite log density "
                "or score; start them inside the region where the model is defined"
            )
        u = torch.where(bad[..., None], 0.5 * u, u)  # pull faulty Laplace draws toward the mode
        lp, score, bad = evaluate(u, affine)
    if bad.any():
        raise FloatingPointError(
            "init: the log density is not finite around the mode; check the model for NaN/inf "
            f"({int(bad.sum())} of {bad.numel()} starting points faulty)"
        )
    return Start(affine, laplace_ok, u, lp, score, search, precondition, counts)


def _place_on_modes(u: torch.Tensor, kept: list, counts: list[int], affine: Affine, generator) -> torch.Tensor:
    """Move the last particles of each ensemble to the other kept modes: ``counts[k]`` draws from
    mode k's Laplace approximation (k >= 1), in the coordinates of ``affine``."""
    u = u.clone()
    end = u.shape[-2]
    for mode, count in zip(kept[1:], counts[1:]):
        if count == 0:
            continue
        eps = torch.randn((*u.shape[:-2], count, u.shape[-1]), generator=generator, dtype=u.dtype).to(u.device)
        u[..., end - count:end, :] = affine.to_u(mode.affine.to_z(eps))
        end -= count
    return u

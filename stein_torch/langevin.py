"""Langevin baselines on the same Target: Metropolis-adjusted (MALA) and unadjusted (ULA).

One step from u with score s(u) = grad log p(u):

    u' = u + eps s(u) + sqrt(2 eps) xi,   xi ~ N(0, I)

(the Euler step of the Langevin diffusion). MALA accepts u' with probability
min(1, p(u') q(u | u') / (p(u) q(u' | u))), q(b | a) = N(b; a + eps s(a), 2 eps I), so its draws
have the exact target as stationary law; ULA always moves and carries an O(eps) bias.

All chains move together as one (chains, dim) tensor: one batched score evaluation per step. The
chains run on the same whitened coordinates as the SVGD sampler, z = mode + L u with L L^T the
inverse curvature at the mode (:mod:`stein_torch.precondition`); this is MALA with a constant
preconditioning (mass) matrix, common practice for badly scaled posteriors, where MALA with an
identity matrix would need a step size set by the narrowest direction.

During warmup the step size is tuned by dual averaging ("The No-U-Turn Sampler", arXiv:1111.4246,
section 3.2, constants from there: gamma = 0.05, t0 = 10, kappa = 0.75) towards the acceptance
probability 0.574, the optimal-scaling value for MALA ("Optimal scaling of discrete approximations
to Langevin diffusions", DOI 10.1111/1467-9868.00123, from memory), then held fixed. Each chain tunes
its own step size: a chain that starts in a region of high curvature (the neck of a funnel) takes
small steps there instead of being stuck. ULA is tuned the same way on the acceptance probability
MALA *would* have (it is not applied), which keeps its discretisation bias moderate.
"""

from __future__ import annotations

import math
import numbers
import sys
import time

import numpy as np
import torch

from .checks import check_int
from .precondition import LAPLACE_MAX_DIM, Affine, default_start, laplace_whitening
from .result import Result
from .target import Target

__all__ = ["langevin", "TARGET_ACCEPT"]

# optimal MALA acceptance ("Optimal scaling of discrete approximations to Langevin diffusions",
# DOI 10.1111/1467-9868.00123, from memory)
TARGET_ACCEPT = 0.574


def _count(value, name: str, minimum: int) -> int:
    return check_int(value, f"langevin: {name}", minimum)


class _DualAveraging:
    """Step-size adaptation of arXiv:1111.4246, section 3.2 (log step size, iterate averaging),
    one step size per chain: arrays of shape (chains,)."""

    def __init__(self, step_size: np.ndarray, target: float, gamma=0.05, t0=10.0, kappa=0.75):
        self.mu = np.log(10 * step_size)
        self.target, self.gamma, self.t0, self.kappa = target, gamma, t0, kappa
        self.count = 0
        self.error_sum = np.zeros_like(step_size)
        self.log_avg = np.zeros_like(step_size)

    def update(self, accept: np.ndarray) -> np.ndarray:
        self.count += 1
        m = self.count
        self.error_sum += self.target - accept
        log_step = self.mu - math.sqrt(m) / self.gamma * self.error_sum / (m + self.t0)
        weight = m ** (-self.kappa)
        self.log_avg = weight * log_step + (1 - weight) * self.log_avg
        return np.exp(log_step)

    @property
    def final(self) -> np.ndarray:
        return np.exp(self.log_avg)


def langevin(
    target: Target,
    chains: int = 4,
    draws: int = 1000,
    warmup: int = 1000,
    adjusted: bool = True,
    seed: int | None = 0,
    step_size: float | None = None,
    init=None,
    progress: bool | None = None,
    *,
    precondition: str | None = "auto",
    dtype: torch.dtype = torch.float64,
) -> Result:
    """Sample by Metropolis-adjusted (or unadjusted) Langevin dynamics, all chains batched.

    Parameters
    ----------
    target : Target
    chains : int, default=4
        Independent chains, moved together as one (chains, dim) tensor.
    draws : int, default=1000
        Kept draws per chain, after warmup.
    warmup : int, default=1000
        Steps per chain for step-size adaptation; discarded.
    adjusted : bool, default=True
        True: MALA (Metropolis correction, exact stationary law). False: ULA (biased by the step).
    seed : int or None, default=0
        Same seed, same draws.
    step_size : float, optional
        Fixed step size eps in whitened coordinates; no adaptation then. Default: adapted during
        warmup towards acceptance 0.574 starting from ``0.5 * dim ** (-1/3)``.
    init : None, Tensor or dict, optional
        Starting points: None draws them from the Laplace approximation at the mode; a tensor (flat
        targets) or dict name -> tensor of constrained values with leading shape (chains,).
    progress : bool, optional
        Progress bar; default on when stderr is a terminal.
    precondition : {"auto", "laplace", None}, default="auto"
        Whitening by the curvature at the mode ("auto": up to 1000 coordinates), as in
        :func:`stein_torch.sample`.
    dtype : torch.dtype, default=torch.float64

    Returns
    -------
    Result
        ``draws`` name -> (chains, draws, *shape); ``sample_stats`` ``accept_prob`` and
        ``step_size`` (chains, draws); ``trace`` per step (warmup included): ``step_size`` and
        ``accept_prob`` (steps, chains), ``seconds`` (since the first step); ``settings["grad_evals"]`` counts score evaluations
        (one per chain per step). ``to_inference_data()`` has chain = chain, draw = draw, so
        ``arviz.rhat`` and ``arviz.ess`` apply as for any MCMC output.

    Examples
    --------
    >>> import stein_torch as st
    >>> t = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=2)
    >>> run = st.langevin(t, chains=2, draws=200, warmup=200)
    >>> run.draws["x"].shape
    torch.Size([2, 200, 2])
    """
    if not isinstance(target, Target):
        raise TypeError(f"langevin: target must be a stein_torch.Target, got {type(target).__qualname__}")
    chains = _count(chains, "chains", 1)
    draws = _count(draws, "draws", 1)
    warmup = _count(warmup, "warmup", 0)
    if not isinstance(adjusted, bool):
        raise TypeError(f"langevin: adjusted must be a bool, got {type(adjusted).__qualname__}")
    if seed is not None:
        seed = _count(seed, "seed", 0)
    if step_size is not None:
        if isinstance(step_size, bool) or not isinstance(step_size, numbers.Real):
            raise TypeError(f"langevin: step_size must be a positive number or None, got {type(step_size).__qualname__}")
        if not (math.isfinite(step_size) and step_size > 0):
            raise ValueError(f"langevin: step_size == {step_size!r}, must be a positive finite number")
    if precondition not in ("auto", "laplace", None):
        raise ValueError(f"langevin: precondition must be one of 'auto', 'laplace', None; got {precondition!r}")
    if dtype not in (torch.float32, torch.float64):
        raise TypeError(f"langevin: dtype must be torch.float64 or torch.float32, got {dtype!r}")
    if precondition == "auto":
        precondition = "laplace" if target.dim <= LAPLACE_MAX_DIM else None
    generator = torch.Generator().manual_seed(seed if seed is not None else int(torch.seed() % (2**63)))
    dim = target.dim

    z0 = _initial_z(init, target, chains, dtype)
    affine = Affine.identity(dim, dtype)
    if precondition == "laplace":
        start = z0.mean(0) if z0 is not None else default_start(target, dtype)
        affine = laplace_whitening(target, start)[0] or affine
    u = affine.to_u(z0) if z0 is not None else torch.randn(chains, dim, generator=generator, dtype=dtype)

    grad_evals = 0

    def evaluate(points):
        nonlocal grad_evals
        lp, score = target.log_prob_and_score(affine.to_z(points))
        grad_evals += points.shape[0]
        lp = torch.where(torch.isfinite(lp) & torch.isfinite(score).all(-1), lp, torch.full_like(lp, -math.inf))
        return lp, torch.nan_to_num(affine.score_u(score), nan=0.0, posinf=0.0, neginf=0.0)

    lp, score = evaluate(u)
    if not torch.isfinite(lp).all():
        if z0 is not None:
            raise ValueError(f"init: {int((~torch.isfinite(lp)).sum())} of {chains} starting points have a "
                             "non-finite log density or score")
        for _ in range(20):  # pull faulty Laplace draws towards the mode
            bad = ~torch.isfinite(lp)
            if not bad.any():
                break
            u = torch.where(bad[:, None], 0.5 * u, u)
            lp, score = evaluate(u)
        if not torch.isfinite(lp).all():
            raise FloatingPointError("langevin: the log density is not finite around the mode; check the model")

    eps = np.full(chains, float(step_size) if step_size is not None else 0.5 * dim ** (-1 / 3))
    tuner = _DualAveraging(eps, TARGET_ACCEPT) if step_size is None and warmup > 0 else None
    kept = torch.empty(chains, draws, dim, dtype=dtype)
    kept_lp = torch.empty(chains, draws, dtype=dtype)
    accept_kept = np.empty((chains, draws))
    trace_step, trace_accept, trace_seconds = [], [], []
    if progress is None:
        progress = sys.stderr.isatty()
    from tqdm.auto import tqdm

    name = "mala" if adjusted else "ula"
    started = time.perf_counter()
    with tqdm(total=warmup + draws, desc=name, disable=not progress, leave=False) as bar:
        for it in range(warmup + draws):
            e = torch.as_tensor(eps, dtype=dtype)
            noise = torch.randn(u.shape, generator=generator, dtype=dtype)
            proposal = u + e[:, None] * score + (2 * e[:, None]).sqrt() * noise
            lp_new, score_new = evaluate(proposal)
            forward = -((proposal - u - e[:, None] * score) ** 2).sum(-1) / (4 * e)
            backward = -((u - proposal - e[:, None] * score_new) ** 2).sum(-1) / (4 * e)
            log_ratio = lp_new - lp + backward - forward
            accept_prob = torch.where(torch.isfinite(log_ratio), log_ratio.clamp_max(0).exp(), torch.zeros_like(lp))
            if adjusted:
                move = torch.rand(chains, generator=generator, dtype=dtype) < accept_prob
            else:
                move = torch.isfinite(lp_new)  # ULA moves unless the density is not finite there
            u = torch.where(move[:, None], proposal, u)
            lp = torch.where(move, lp_new, lp)
            score = torch.where(move[:, None], score_new, score)
            accept_np = accept_prob.numpy()
            trace_step.append(eps.copy())
            trace_accept.append(accept_np)
            trace_seconds.append(time.perf_counter() - started)
            if it < warmup:
                if tuner is not None:
                    eps = tuner.update(accept_np)
                    if it == warmup - 1:
                        eps = tuner.final
            else:
                kept[:, it - warmup] = u
                kept_lp[:, it - warmup] = lp
                accept_kept[:, it - warmup] = accept_np
            bar.update(1)
            if (it + 1) % 50 == 0:
                bar.set_postfix(accept=f"{np.mean(trace_accept[-50:]):.2f}", step=f"{np.median(eps):.3g}")

    z = affine.to_z(kept)
    settings = {
        "method": name,
        "chains": chains,
        "draws": draws,
        "warmup": warmup,
        "step_size": eps,  # per chain
        "target_accept": TARGET_ACCEPT,
        "precondition": str(precondition),
        "seed": seed if seed is not None else "none",
        "dtype": str(dtype).replace("torch.", ""),
        "grad_evals": grad_evals,
    }
    trace = {"step_size": np.asarray(trace_step), "accept_prob": np.asarray(trace_accept),
             "seconds": np.asarray(trace_seconds)}
    stats = {"accept_prob": accept_kept, "step_size": np.repeat(eps[:, None], draws, axis=1)}
    return Result(target, z, kept_lp, trace, settings, "draws", stats)


def _initial_z(init, target: Target, chains: int, dtype) -> torch.Tensor | None:
    if init is None or (isinstance(init, str) and init == "laplace"):
        return None
    z = target.init_to_free(init, dtype)
    if tuple(z.shape[:-1]) != (chains,):
        raise ValueError(f"init: expected leading shape (chains,) = ({chains},); got {tuple(z.shape[:-1])}")
    return z

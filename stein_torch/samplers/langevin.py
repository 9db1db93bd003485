"""Langevin baselines on the same Target: Metropolis-adjusted (MALA) and unadjusted (ULA).

One step from u with score s(u) = grad log p(u):

    u' = u + eps s(u) + sqrt(2 eps) xi,   xi ~ N(0, I)

(the Euler step of the Langevin diffusion). MALA accepts u' with probability
min(1, p(u') q(u | u') / (p(u) q(u' | u))), q(b | a) = N(b; a + eps s(a), 2 eps I), so its draws
have the exact target as stationary law; ULA always moves and carries an O(eps) bias. A proposal
where the model is not finite (or raises) is rejected and counted (``history["faults"]``).

All chains move together as one (chains, dim) tensor: one batched score evaluation per step. The
chains run on the same whitened coordinates as SVGD, z = mode + L u with L L^T the inverse
curvature at the mode (:mod:`stein_torch.samplers.precondition`); this is MALA with a constant
preconditioning (mass) matrix, common practice for badly scaled posteriors.

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
import time
from typing import Mapping

import numpy as np
import torch

from .. import io
from ..checks import check_bool, check_int, check_optional_real
from ..result import Result
from .adaptation import DualAveraging
from .faults import CountsEvaluations, Evaluator
from .loop import append_history, check_run_options, run_loop
from .setup import configure, starting_points
from .precondition import Affine
from .state import CHAIN_KEYS, chain_state, check_common, common_state, read_chain_state, restore_common, restore_parts

__all__ = ["langevin", "Langevin", "TARGET_ACCEPT"]

# optimal MALA acceptance ("Optimal scaling of discrete approximations to Langevin diffusions",
# DOI 10.1111/1467-9868.00123, from memory)
TARGET_ACCEPT = 0.574


class Langevin(CountsEvaluations):
    """Stateful MALA / ULA run over a batch of chains: ``step()``, ``state_dict()``, ``result()``.

    Parameters are those of :func:`langevin`; ``state`` continues a saved run.
    """

    finished_reason = "draws"

    def __init__(
        self,
        target,
        chains: int = 4,
        draws: int = 1000,
        warmup: int = 1000,
        *,
        adjusted: bool = True,
        step_size: float | None = None,
        init=None,
        precondition: str | None = "auto",
        dtype: torch.dtype = torch.float64,
        seed: int | None = None,
        device=None,
        state: Mapping | None = None,
    ):
        setup = configure(target, init=init, dtype=dtype, precondition=precondition, seed=seed, device=device, state=state)
        self.target, self.dtype, self.device = setup.target, setup.dtype, setup.device
        self.seed, self.generator, self.precondition = setup.seed, setup.generator, setup.precondition
        self.chains = check_int(chains, "langevin: chains")
        self.draws = check_int(draws, "langevin: draws")
        self.warmup = check_int(warmup, "langevin: warmup", minimum=0)
        self.adjusted = check_bool(adjusted, "langevin: adjusted")
        self.fixed_step = check_optional_real(step_size, "langevin: step_size", low=0, low_open=True)
        self.name = "mala" if self.adjusted else "ula"
        self.evaluate = Evaluator(self.target)
        self.stop_reason = self.finished_reason
        self.step_count = 0
        self.history: dict[str, list] = {}
        self.elapsed = 0.0
        dim = self.target.dim
        first = self.fixed_step if self.fixed_step is not None else 0.5 * dim ** (-1 / 3)
        self.eps = np.full(self.chains, float(first))
        self.tuner = DualAveraging(self.eps, TARGET_ACCEPT) if self.fixed_step is None and self.warmup > 0 else None
        self.kept = torch.zeros(self.chains, self.draws, dim, dtype=self.dtype, device=self.device)
        self.kept_lp = torch.zeros(self.chains, self.draws, dtype=self.dtype, device=self.device)
        self.kept_accept = np.zeros((self.chains, self.draws))
        if state is None:
            # one whitening for every run: the Laplace map at the mode ("covariance" has no particle
            # set to estimate from here, so it means no whitening, as None does)
            if self.precondition == "covariance":
                setup.precondition = None
            start = starting_points(setup, self.evaluate, (self.chains,), starts=1)  # one search
            self.affine, self.laplace_ok, self.u, self.lp, self.score = start.affine, start.laplace_ok, start.u, start.lp, start.score
        else:
            self.load_state_dict(state, argname="resume")

    def step(self) -> None:
        """One Langevin step of every chain; warmup steps adapt the step size, later ones are kept."""
        started = time.perf_counter()
        u, score, dtype = self.u, self.score, self.dtype
        e = torch.as_tensor(self.eps, dtype=dtype, device=self.device)[:, None]
        noise = torch.randn(u.shape, generator=self.generator, dtype=dtype).to(self.device)
        proposal = u + e * score + (2 * e).sqrt() * noise
        lp_new, score_new, bad = self.evaluate(proposal, self.affine)
        lp_new = torch.where(bad, torch.full_like(lp_new, -math.inf), lp_new)
        score_new = torch.where(bad[:, None], torch.zeros_like(score_new), score_new)
        forward = -((proposal - u - e * score) ** 2).sum(-1) / (4 * e[:, 0])
        backward = -((u - proposal - e * score_new) ** 2).sum(-1) / (4 * e[:, 0])
        log_ratio = lp_new - self.lp + backward - forward
        accept = torch.where(torch.isfinite(log_ratio), log_ratio.clamp_max(0).exp(), torch.zeros_like(self.lp))
        if self.adjusted:
            move = torch.rand(self.chains, generator=self.generator, dtype=dtype).to(self.device) < accept
        else:
            move = ~bad  # ULA moves unless the model is not finite there
        self.u = torch.where(move[:, None], proposal, u)
        self.lp = torch.where(move, lp_new, self.lp)
        self.score = torch.where(move[:, None], score_new, score)
        accept_np = accept.cpu().numpy()
        it = self.step_count
        self.elapsed += time.perf_counter() - started
        append_history(self.history, {"step_size": self.eps.copy(), "acceptance_rate": accept_np,
                                      "faults": int(bad.sum()), "seconds": self.elapsed})
        if it < self.warmup:
            if self.tuner is not None:
                self.eps = self.tuner.update(accept_np)
                if it == self.warmup - 1:
                    self.eps = self.tuner.final
        else:
            self.kept[:, it - self.warmup] = self.u
            self.kept_lp[:, it - self.warmup] = self.lp
            self.kept_accept[:, it - self.warmup] = accept_np
        self.step_count += 1

    def progress_figures(self) -> dict | None:
        if self.step_count % 50:
            return None
        recent = np.mean(self.history["acceptance_rate"][-50:])
        return {"accept": f"{recent:.2f}", "step": f"{np.median(self.eps):.3g}"}

    def run(self, steps: int | None = None, progress: bool | None = None, *, checkpoint=None, checkpoint_every=None) -> "Langevin":
        """Take the remaining warmup and draw steps (or ``steps`` of them) through the shared loop."""
        remaining = self.warmup + self.draws - self.step_count
        run_loop(self, remaining if steps is None else min(steps, remaining), progress=progress,
                 checkpoint=checkpoint, checkpoint_every=checkpoint_every)
        return self

    # ------------------------------------------------------------------ state
    def settings(self) -> dict:
        return {"chains": self.chains, "draws": self.draws, "warmup": self.warmup, "adjusted": self.adjusted,
                "step_size": self.fixed_step, "dtype": str(self.dtype).replace("torch.", ""),
                "precondition": str(self.precondition), "seed": self.seed}

    def state_dict(self) -> dict:
        """Chains (``u`` (C, d) whitened, ``lp``, ``score``), whitening, step sizes, the draws kept so
        far, counters, generator, history, and the step-size adaptation (a stateful part)."""
        state = common_state(self, self.settings())
        state.update(chain_state(self))
        state["kept_accept"] = torch.as_tensor(self.kept_accept)
        return state

    def load_state_dict(self, state: Mapping, *, argname: str = "state") -> None:
        parts = check_common(self, state, self.settings(), CHAIN_KEYS + ("kept_accept",), argname)
        chains = read_chain_state(self, state, argname)
        restore_common(self, state)
        for name, value in chains.items():
            setattr(self, name, value)
        self.kept_accept = np.asarray(state["kept_accept"], dtype=np.float64)
        restore_parts(state, parts)  # the step-size adaptation among them

    def save(self, path) -> None:
        io.save_checkpoint(path, self.state_dict())

    def result(self) -> Result:
        """The draws kept so far as a :class:`Result` (chain = chain, draw = iteration)."""
        kept = max(0, self.step_count - self.warmup)
        z = self.affine.to_z(self.kept[:, :kept])
        settings = {
            "method": self.name, "chains": self.chains, "draws": kept, "warmup": self.warmup,
            "step_size": self.eps, "acceptance_goal": TARGET_ACCEPT, "precondition": str(self.precondition),
            "seed": self.seed, "dtype": str(self.dtype).replace("torch.", ""), "grad_evals": self.grad_evals,
        }
        history = {k: np.asarray(v) for k, v in self.history.items()}
        stats = {"acceptance_rate": self.kept_accept[:, :kept], "step_size": np.repeat(self.eps[:, None], kept, axis=1)}
        return Result(self.target, z, self.kept_lp[:, :kept].clone(), history, settings, self.stop_reason, stats)

    @staticmethod
    def result_from_state(target, state: Mapping) -> Result:
        """The draws of a checkpoint as a :class:`Result`."""
        settings = state["settings"]
        kept = max(0, int(state["step"]) - int(settings["warmup"]))
        z = Affine.from_state_dict(state["affine"]).to_z(state["kept"][:, :kept])
        history = {k: np.asarray(v) for k, v in state["history"].items()}
        info = {**settings, "method": state["method"], "draws": kept, "grad_evals": state["grad_evals"]}
        stats = {"acceptance_rate": np.asarray(state["kept_accept"])[:, :kept]}
        return Result(target, z, state["kept_lp"][:, :kept], history, info, state.get("stop_reason", "checkpoint"), stats)


def langevin(
    target,
    chains: int = 4,
    draws: int = 1000,
    warmup: int = 1000,
    adjusted: bool = True,
    seed: int | None = None,
    step_size: float | None = None,
    init=None,
    progress: bool | None = None,
    *,
    precondition: str | None = "auto",
    dtype: torch.dtype = torch.float64,
    device=None,
    checkpoint=None,
    checkpoint_every: int | None = None,
    resume=None,
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
    seed : int, optional
        Same seed, same draws.
    step_size : float, optional
        Fixed step size eps in whitened coordinates; no adaptation then. Default: adapted during
        warmup towards acceptance 0.574 starting from ``0.5 * dim ** (-1/3)``.
    init : None, Tensor or dict, optional
        Starting points: None draws them from the Laplace approximation at the mode; a tensor (flat
        targets) or dict name -> tensor of constrained values with leading shape (chains,).
    progress : bool, optional
        Progress bar; default on when stderr is a terminal.
    precondition : {"auto", "laplace", "covariance", None}, default="auto"
        Whitening by the curvature at the mode ("auto": up to 1000 coordinates), as in
        :func:`stein_torch.svgd`; "covariance" and None: no whitening.
    dtype : torch.dtype, default=torch.float64
    device : str or torch.device, optional
    checkpoint, checkpoint_every, resume
        As in :func:`stein_torch.svgd`: atomic checkpoints and a bit-identical resume.

    Returns
    -------
    Result
        ``draws`` name -> (chains, draws, *shape); ``sample_stats`` ``acceptance_rate`` and
        ``step_size`` (chains, draws); ``history`` per step (warmup included): ``step_size`` and
        ``acceptance_rate`` (steps, chains), ``faults``, ``seconds`` (sampling time so far);
        ``settings["grad_evals"]`` counts score evaluations (one per chain per step).
        ``to_inference_data()`` has chain = chain, draw = draw, so ``arviz.rhat`` and
        ``arviz.ess`` apply as for any MCMC output.

    Examples
    --------
    >>> import stein_torch as st
    >>> t = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=2)
    >>> run = st.langevin(t, chains=2, draws=200, warmup=200, seed=0)
    >>> run.draws["x"].shape
    torch.Size([2, 200, 2])
    """
    _, progress, checkpoint, _ = check_run_options(0, progress, checkpoint, checkpoint_every)
    state = io.load_checkpoint(resume, "resume") if resume is not None else None
    sampler = Langevin(
        target, chains, draws, warmup, adjusted=adjusted, step_size=step_size, init=init, precondition=precondition,
        dtype=dtype, seed=seed, device=device, state=state,
    )
    sampler.run(progress=progress, checkpoint=checkpoint, checkpoint_every=checkpoint_every)
    return sampler.result()

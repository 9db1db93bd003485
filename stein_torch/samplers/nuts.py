"""The no-U-turn sampler on the same Target, set-up, fault containment and run loop as SVGD.

All chains advance as one (chains, dim) tensor, one batched score evaluation per leapfrog step
(:mod:`.trajectory`: multinomial sampling of the trajectory and the generalised no-U-turn criterion,
"The No-U-Turn Sampler", arXiv:1111.4246, and "A Conceptual Introduction to Hamiltonian Monte Carlo",
arXiv:1701.02434). The chains run on the coordinates of :func:`.setup.starting_points` (the
unconstrained space by default; whitened by the Laplace map at the mode on request), where warm-up
(:mod:`.warmup`) adapts a per-chain step size by dual averaging and a diagonal or dense metric
shared by the chains. A point where the model is not finite (or raises) ends its trajectory as a
divergence. One ``step()`` is one transition of every chain; the shared loop (:func:`.loop.run_loop`)
gives the progress bar, Ctrl-C and checkpoints.
"""

from __future__ import annotations

import time
import warnings
from typing import Mapping

import numpy as np
import torch

from .. import io
from ..checks import check_choice, check_int, check_real
from ..result import Result
from .mcmc_health import mcmc_warnings
from .faults import CountsEvaluations, Evaluator
from .loop import append_history, check_run_options, run_loop
from .metric import METRICS, make_metric
from .precondition import Affine
from .setup import configure, starting_points
from .state import CHAIN_KEYS, chain_state, check_common, common_state, read_chain_state, restore_common, restore_parts
from .trajectory import DEFAULT_DEPTH_LIMIT, DEFAULT_MAX_ENERGY_ERROR, NoUTurnTransition
from .warmup import Warmup, WarmupSchedule, initial_step_size

__all__ = ["nuts", "NUTS", "DEFAULT_CHAINS", "DEFAULT_DRAWS", "DEFAULT_WARMUP", "TARGET_ACCEPT",
           "DENSE_MAX_DIM", "STAT_NAMES"]

DEFAULT_CHAINS = 4
# measured (docs/defaults.md): on the 100-D condition-1000 Gaussian a dense metric from 500 warm-up
# iterations costs 15.0 leapfrog steps per draw afterwards, from 1000 iterations 14.4-14.9, from 250
# up to 22.9; 4 x 1000 draws gave a bulk ESS of at least 2391 for every coordinate of every test target.
DEFAULT_WARMUP = 500
DEFAULT_DRAWS = 1000
TARGET_ACCEPT = 0.8        # target mean acceptance statistic (common practice)
DENSE_MAX_DIM = 200        # default metric: dense up to this many coordinates, diagonal above
STAT_NAMES = ("acceptance_rate", "step_size", "tree_depth", "n_steps", "diverging", "energy")
_DTYPES = {"acceptance_rate": np.float64, "step_size": np.float64, "tree_depth": np.int64, "n_steps": np.int64,
           "diverging": np.bool_, "energy": np.float64}


class NUTS(CountsEvaluations):
    """Stateful NUTS run over a batch of chains: ``step()``, ``state_dict()``, ``result()``.

    Parameters are those of :func:`nuts`; ``state`` continues a saved run.
    """

    name = "nuts"
    finished_reason = "draws"

    def __init__(self, target, chains: int = DEFAULT_CHAINS, draws: int = DEFAULT_DRAWS, warmup: int = DEFAULT_WARMUP,
                 *, metric: str | None = None, depth_limit: int = DEFAULT_DEPTH_LIMIT,
                 acceptance_goal: float = TARGET_ACCEPT, init=None, precondition: str | None = None, dtype: torch.dtype = torch.float64,
                 seed: int | None = None, device=None, state: Mapping | None = None):
        self.chains = check_int(chains, "nuts: chains")
        self.draws = check_int(draws, "nuts: draws")
        self.schedule = WarmupSchedule(warmup)
        self.warmup = self.schedule.warmup
        self.depth_limit = check_int(depth_limit, "nuts: depth_limit", maximum=30)
        self.acceptance_goal = check_real(acceptance_goal, "nuts: acceptance_goal", low=0, high=1, low_open=True,
                                        high_open=True)
        setup = configure(target, init=init, dtype=dtype, precondition=precondition, seed=seed, device=device,
                          state=state)
        self.target, self.dtype, self.device = setup.target, setup.dtype, setup.device
        self.seed, self.generator = setup.seed, setup.generator
        if metric is None:
            metric = "dense" if self.target.dim <= DENSE_MAX_DIM else "diag"
        self.metric_kind = check_choice(metric, "nuts: metric", METRICS)
        # the metric adaptation is the covariance whitening here: "covariance" means no fixed map
        self.precondition = None if setup.precondition == "covariance" else setup.precondition
        setup.precondition = self.precondition
        self.transition = NoUTurnTransition(self.depth_limit, DEFAULT_MAX_ENERGY_ERROR)
        self.evaluate = Evaluator(self.target)
        self.metric = make_metric(self.metric_kind, self.target.dim, self.dtype, self.device)
        self.stop_reason, self.step_count, self.elapsed = self.finished_reason, 0, 0.0
        self.history: dict[str, list] = {}
        c, d = self.chains, self.target.dim
        self.kept = torch.zeros(c, self.draws, d, dtype=self.dtype, device=self.device)
        self.kept_lp = torch.zeros(c, self.draws, dtype=self.dtype, device=self.device)
        self.kept_stats = {k: np.zeros((c, self.draws), dtype=t) for k, t in _DTYPES.items()}
        started = time.perf_counter()
        if state is None:
            self.affine, self.laplace_ok, self.u, self.lp, self.score = _start(setup, self.evaluate, c)
            self.eps = initial_step_size(self.u, self.lp, self.score, self.metric, self._evaluate, self.generator)
        else:
            self.eps = np.ones(c)
        self.adaptation = (Warmup(self.eps, d, self.schedule, self.metric_kind, self.acceptance_goal)
                           if self.warmup else None)
        self.setup_seconds = time.perf_counter() - started
        if state is not None:
            self.load_state_dict(state, argname="resume")

    def _evaluate(self, u: torch.Tensor):
        """Contained evaluation for the tree: finite junk (0) where a point is faulty."""
        lp, score, bad = self.evaluate(u, self.affine)
        if bool(bad.any()):
            lp = lp.masked_fill(bad, 0.0)
            score = score.masked_fill(bad[:, None], 0.0)
        return lp, score, bad

    # ------------------------------------------------------------------ the step
    def step(self) -> None:
        """One transition of every chain; warm-up transitions adapt, later ones are kept."""
        started = time.perf_counter()
        eps = torch.as_tensor(self.eps, dtype=self.dtype, device=self.device)
        self.u, self.lp, self.score, info = self.transition(self.u, self.lp, self.score, eps, self.metric,
                                                            self._evaluate, self.generator)
        stats = {k: v.cpu().numpy() for k, v in info.items() if k != "lp"}
        stats["step_size"] = self.eps
        it = self.step_count
        if it < self.warmup:
            self.eps, metric = self.adaptation.observe(self.u, stats["acceptance_rate"])
            if metric is not None:
                self.metric = metric
                self.eps = initial_step_size(self.u, self.lp, self.score, self.metric, self._evaluate, self.generator,
                                             start=self.eps)
                self.adaptation.restart(self.eps)
        else:
            k = it - self.warmup
            self.kept[:, k], self.kept_lp[:, k] = self.u, self.lp
            for name in STAT_NAMES:
                self.kept_stats[name][:, k] = stats[name]
        self.step_count += 1
        self.elapsed += time.perf_counter() - started
        append_history(self.history, {**{k: stats[k] for k in ("step_size", "acceptance_rate", "tree_depth",
                                                               "n_steps", "diverging")},
                                      "grad_evals": self.grad_evals, "seconds": self.elapsed})

    def progress_figures(self) -> dict | None:
        """Draws so far, divergences among them, median step size, mean tree depth of the last step."""
        if self.step_count % 10 and self.step_count != self.warmup + self.draws:
            return None
        kept = max(0, self.step_count - self.warmup)
        return {"draws": f"{kept}/{self.draws}" if kept else "warm-up",
                "div": int(self.kept_stats["diverging"][:, :kept].sum()),
                "step": f"{np.median(self.history['step_size'][-1]):.3g}",
                "depth": f"{np.mean(self.history['tree_depth'][-1]):.1f}"}

    def run(self, steps: int | None = None, progress: bool | None = None, *, checkpoint=None,
            checkpoint_every: int | None = None, hooks=()) -> "NUTS":
        """Take the remaining warm-up and draw transitions (or ``steps`` of them) through the shared loop."""
        remaining = self.warmup + self.draws - self.step_count
        run_loop(self, remaining if steps is None else min(steps, remaining), progress=progress,
                 checkpoint=checkpoint, checkpoint_every=checkpoint_every, hooks=hooks)
        return self

    # ------------------------------------------------------------------ state
    def settings(self) -> dict:
        """Settings a continued run must share with the saved one."""
        return {"chains": self.chains, "draws": self.draws, "warmup": self.warmup, "metric": self.metric_kind,
                "depth_limit": self.depth_limit, "acceptance_goal": self.acceptance_goal,
                "dtype": str(self.dtype).replace("torch.", ""), "precondition": str(self.precondition),
                "seed": self.seed}

    def state_dict(self) -> dict:
        """Chains (``u`` (C, d) whitened, ``lp``, ``score``), whitening, step sizes, the draws and
        statistics kept so far, counters, generator, history, and the metric and warm-up state."""
        state = common_state(self, self.settings())
        state.update(chain_state(self))
        state["kept_stats"] = {k: torch.as_tensor(v.copy()) for k, v in self.kept_stats.items()}
        return state

    def load_state_dict(self, state: Mapping, *, argname: str = "state") -> None:
        """Continue from :meth:`state_dict`; the target and run settings must match (ValueError)."""
        parts = check_common(self, state, self.settings(), CHAIN_KEYS + ("kept_stats",), argname)
        chains = read_chain_state(self, state, argname)
        stats = state["kept_stats"]
        if not isinstance(stats, Mapping) or set(stats) != set(STAT_NAMES):
            raise ValueError(f"{argname}['kept_stats']: expected the statistics {list(STAT_NAMES)}")
        restore_common(self, state)
        for name, value in chains.items():
            setattr(self, name, value)
        self.kept_stats = {k: np.asarray(stats[k]).astype(t).reshape(self.chains, self.draws) for k, t in _DTYPES.items()}
        restore_parts(state, parts)  # the metric and the warm-up state

    def save(self, path) -> None:
        """Write :meth:`state_dict` to ``path`` atomically (see :mod:`stein_torch.io`)."""
        io.save_checkpoint(path, self.state_dict())

    # ------------------------------------------------------------------ output
    def result(self) -> Result:
        """The draws kept so far as a :class:`Result` (chain = chain, draw = iteration after warm-up)."""
        kept = max(0, self.step_count - self.warmup)
        z = self.affine.to_z(self.kept[:, :kept])
        history = {k: np.asarray(v) for k, v in self.history.items()}
        settings = {**self.settings(), "method": self.name, "draws": kept, "grad_evals": self.grad_evals,
                    "step_size": [float(e) for e in self.eps]}
        return _result(self.target, z, self.kept_lp[:, :kept].clone(), self.kept_stats, kept, history, settings,
                       self.stop_reason)

    @staticmethod
    def result_from_state(target, state: Mapping) -> Result:
        """The draws of a checkpoint as a :class:`Result` (no set-up, no step)."""
        settings = dict(state["settings"])
        kept = max(0, int(state["step"]) - int(settings["warmup"]))
        z = Affine.from_state_dict(state["affine"]).to_z(state["kept"][:, :kept])
        history = {k: np.asarray(v) for k, v in state["history"].items()}
        stats = {k: np.asarray(v).astype(_DTYPES[k]) for k, v in state["kept_stats"].items()}
        settings.update({"method": state["method"], "draws": kept, "grad_evals": int(state["grad_evals"]),
                         "step_size": [float(e) for e in np.asarray(state["eps"])]})
        return _result(target, z, state["kept_lp"][:, :kept].clone(), stats, kept, history, settings,
                       state.get("stop_reason", "checkpoint"))


def _result(target, z, lp, kept_stats, kept, history, settings, stop_reason) -> Result:
    settings["warmup_divergences"] = int(history["diverging"][: int(settings["warmup"])].sum()) if history else 0
    stats = {k: v[:, :kept].copy() for k, v in kept_stats.items()}
    result = Result(target, z, lp, history, settings, stop_reason, stats)
    result.warnings = mcmc_warnings(result.draws, stats, int(settings["depth_limit"]))
    return result


def _start(setup, evaluate, chains: int):
    """Whitening and starting points; a model that is not finite at any start names ``target``."""
    try:
        start = starting_points(setup, evaluate, (chains,), starts=1)  # chains find their modes themselves
    except FloatingPointError as err:
        raise ValueError(f"target: the log density or its score is NaN/inf (or raised) at the starting points, "
                         f"even pulled toward the mode ({err})") from err
    return start.affine, start.laplace_ok, start.u, start.lp, start.score


def nuts(target, chains: int = DEFAULT_CHAINS, draws: int = DEFAULT_DRAWS, warmup: int = DEFAULT_WARMUP,
         seed: int | None = None, metric: str | None = None, init=None, progress: bool | None = None, *,
         depth_limit: int = DEFAULT_DEPTH_LIMIT, acceptance_goal: float = TARGET_ACCEPT,
         precondition: str | None = None, dtype: torch.dtype = torch.float64, device=None, checkpoint=None, checkpoint_every: int | None = None,
         resume=None) -> Result:
    """Sample by the no-U-turn sampler, all chains batched.

    Parameters
    ----------
    target : Target
    chains : int, default=4
        Independent chains, moved together as one (chains, dim) tensor.
    draws : int, default=1000
        Kept draws per chain, after warm-up.
    warmup : int, default=500
        Warm-up transitions per chain (discarded): 0 (no adaptation: identity metric, step size from
        the doubling heuristic) or at least 175 (step-size phase 50, first metric window 25, final
        step-size phase 100).
    seed : int, optional
        Same seed, same draws, bit for bit.
    metric : {"diag", "dense"}, optional
        Metric adapted in warm-up; default "dense" up to 200 coordinates, "diag" above.
    init : None, "prior", Tensor or dict, optional
        Starting points: None draws them from a standard normal on the unconstrained space (from the
        Laplace approximation with ``precondition="laplace"``); "prior" (targets from
        :meth:`Target.from_priors`); a tensor (flat targets) or dict name -> tensor of constrained
        values with leading shape (chains,).
    progress : bool, optional
        Progress bar (draws, divergences so far, step size, tree depth); default on when stderr is a
        terminal.
    depth_limit : int, default=10
        Most tree doublings per transition (at most 2**depth_limit - 1 leapfrog steps).
    acceptance_goal : float, default=0.8
        Mean acceptance statistic that dual averaging aims the step size at; raise it (0.9, 0.95)
        when divergences are reported.
    precondition : {None, "laplace", "auto", "covariance"}, default=None
        None: no fixed whitening; warm-up adapts the metric from the identity. "laplace" (and "auto"
        up to 1000 coordinates, as in :func:`stein_torch.svgd`): run on coordinates whitened by the
        curvature at the mode, starting from that Laplace approximation. It saves warm-up on badly
        scaled models but traps the chains where the mode is a poor guide (at the neck of a funnel:
        docs/defaults.md). "covariance": the same as None (the metric adaptation does that work).
    dtype : torch.dtype, default=torch.float64
    device : str or torch.device, optional
    checkpoint, checkpoint_every, resume
        As in :func:`stein_torch.svgd`: atomic checkpoints and a bit-identical resume.

    Returns
    -------
    Result
        ``draws`` name -> (chains, draws, *shape); ``sample_stats`` ``acceptance_rate``, ``step_size``,
        ``tree_depth``, ``n_steps``, ``diverging``, ``energy`` (chains, draws), and ``lp`` in the
        InferenceData, so :func:`arviz.rhat`, :func:`arviz.ess`, :func:`arviz.bfmi` and
        :func:`arviz.plot_energy` apply; ``history`` per transition (warm-up included);
        ``warnings`` (also issued as RuntimeWarning): divergences above 1% of the draws, trajectories
        cut at depth_limit, low E-BFMI, R-hat above 1.01, low bulk ESS.

    Raises
    ------
    ValueError
        Bad arguments (named), or a target that is not finite at any starting point (``target``).

    Examples
    --------
    >>> import stein_torch as st
    >>> t = st.Target(lambda x: -0.5 * (x ** 2).sum(-1), dim=2)
    >>> run = st.nuts(t, draws=200, warmup=200, seed=0)
    >>> run.draws["x"].shape
    torch.Size([4, 200, 2])
    """
    _, progress, checkpoint, _ = check_run_options(0, progress, checkpoint, checkpoint_every)
    state = io.load_checkpoint(resume, "resume") if resume is not None else None
    sampler = NUTS(target, chains, draws, warmup, metric=metric, depth_limit=depth_limit,
                   acceptance_goal=acceptance_goal, init=init, precondition=precondition, dtype=dtype, seed=seed, device=device, state=state)
    sampler.run(progress=progress, checkpoint=checkpoint, checkpoint_every=checkpoint_every)
    result = sampler.result()
    for message in result.warnings:
        warnings.warn(f"nuts: {message}", RuntimeWarning, stacklevel=2)
    return result

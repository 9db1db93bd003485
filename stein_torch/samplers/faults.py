"""Fault-contained evaluation: a model that is NaN/inf or raises for some points never stops a run.

Every sampler evaluates its points through :class:`Evaluator`, which returns the log density, the
score in the sampler's whitened coordinates and a mask of faulty points. A point is faulty when its
position, log density or score is not finite, or when the user's function raises for it; the
sampler decides what a fault means (SVGD shrinks the particle's step, MCMC rejects the proposal).

A density that is NaN or -inf beyond a boundary the user did not declare is a *wall*: SVGD particles
that try to cross it are put back, and the run goes on (a warning says so, :func:`wall_message`).
Only when faults keep a whole ensemble from moving (every particle put back) for ``patience``
consecutive steps does the run stop, with :class:`StuckEnsembleError` carrying the result so far.
"""

from __future__ import annotations

import torch

__all__ = ["Evaluator", "CountsEvaluations", "shrink_faulty_steps", "persistent_fault_message", "wall_message", "StuckEnsembleError",
           "MAX_BACKTRACK"]

MAX_BACKTRACK = 10  # halvings of a faulty particle's step before it is put back where it was


class Evaluator:
    """Log density, whitened score and fault mask of batches of points.

    Parameters
    ----------
    target : Target

    Attributes
    ----------
    count : int
        Points evaluated so far (score evaluations).
    last_error : BaseException or None
        The latest error raised by the user's function.
    """

    def __init__(self, target):
        self.target = target
        self.count = 0
        self.last_error: BaseException | None = None

    def __call__(self, u: torch.Tensor, affine, mask: torch.Tensor | None = None, first: bool = False):
        """Evaluate points u (..., d) given in the coordinates of ``affine`` (z = affine.to_z(u)).

        Parameters
        ----------
        u : Tensor of shape (..., d)
        affine : Affine
            The sampler's whitening.
        mask : Tensor of shape (...), optional
            Evaluate only these points; the others come back NaN (and not faulty).
        first : bool
            The starting points: an error raised for every point is a bug in the model, not a region
            fault, and is re-raised.

        Returns
        -------
        lp : Tensor of shape (...)
        score : Tensor of shape (..., d)
            Gradient of the log density in the coordinates u.
        bad : Tensor of shape (...), bool
        """
        z = affine.to_z(u)
        zs = z if mask is None else z[mask]
        try:
            lp_s, sz_s = self.target.log_prob_and_score(zs)
        except Exception as err:
            lp_s, sz_s, raised = self._one_by_one(zs)
            if first and bool(raised.all()):
                raise
            self.last_error = err
        self.count += zs.shape[:-1].numel()
        if mask is None:
            lp, sz = lp_s, sz_s
        else:
            lp = torch.full(z.shape[:-1], float("nan"), dtype=z.dtype, device=z.device)
            sz = torch.full_like(z, float("nan"))
            lp[mask], sz[mask] = lp_s, sz_s
        # NaN/inf anywhere in a point's log density, position or score reaches the sum t, and t - t
        # is then NaN, not 0 (a sum that overflows, |values| near 1e308, counts as faulty too)
        total = lp + sz.sum(-1) + z.sum(-1)
        bad = (total - total) != 0
        if mask is not None:
            bad &= mask
        return lp, affine.score_u(sz), bad

    def _one_by_one(self, z):
        """Isolate the points on which the user's function raises (fault path only)."""
        flat = z.reshape(-1, z.shape[-1])
        lp = torch.full(flat.shape[:-1], float("nan"), dtype=z.dtype, device=z.device)
        score = torch.full_like(flat, float("nan"))
        raised = torch.zeros(flat.shape[:-1], dtype=torch.bool, device=z.device)
        for i in range(flat.shape[0]):
            try:
                lp[i : i + 1], score[i : i + 1] = self.target.log_prob_and_score(flat[i : i + 1])
            except Exception:
                raised[i] = True
        return lp.reshape(z.shape[:-1]), score.reshape(z.shape), raised.reshape(z.shape[:-1])


def shrink_faulty_steps(u_old, lp_old, score_old, u_new, lp, score, bad, evaluate_masked):
    """Halve the steps of faulty particles (up to ``MAX_BACKTRACK`` times); put back those that stay faulty.

    Parameters
    ----------
    u_old, lp_old, score_old : Tensors of shape (B, N, d), (B, N), (B, N, d)
        Before the step.
    u_new, lp, score, bad : Tensors of shape (B, N, d), (B, N), (B, N, d), (B, N)
        After the step, with the fault mask.
    evaluate_masked : callable
        ``(u, mask) -> (lp, score, bad)`` evaluating only the masked particles.

    Returns
    -------
    u_new, lp, score
        The particles after containment: faulty ones moved back along their own step by a power of
        two, or left where they were; the others untouched, bit for bit.
    reverted : Tensor of shape (B, N), bool
        Particles put back where they were.
    """
    if not bool(bad.any()):
        return u_new, lp, score, torch.zeros_like(bad)
    for _ in range(MAX_BACKTRACK):
        if not bad.any():
            break
        u_new = torch.where(bad[..., None], 0.5 * (u_new + u_old), u_new)
        lp_b, score_b, bad_b = evaluate_masked(u_new, bad)
        lp = torch.where(bad, lp_b, lp)
        score = torch.where(bad[..., None], score_b, score)
        bad = bad & bad_b
    if bool(bad.any()):  # give up on this step for these particles: they stay where they were
        u_new = torch.where(bad[..., None], u_old, u_new)
        lp = torch.where(bad, lp_old, lp)
        score = torch.where(bad[..., None], score_old, score)
    return u_new, lp, score, bad


HINT = (
    "Hint: give latents with a restricted domain a support (st.Latent(support=...)) so the sampler "
    "never leaves it, make the log density finite wherever it is called, or lower the step size."
)


def _raised(last_error) -> str:
    return f" Last error raised by the log density: {type(last_error).__name__}: {last_error}." if last_error else ""


def persistent_fault_message(step: int, patience: int, faults: int, reverted: int, total: int, last_error) -> str:
    """The error of a run whose faults kept a whole ensemble from moving for ``patience`` steps."""
    return (
        f"step {step}: the log density or its score was NaN/inf (or raised) for every particle of an "
        f"ensemble in each of the last {patience} steps, so the ensemble could not move; in this step "
        f"{faults} of {total} particles were faulty and {reverted} could not be moved even with a step "
        f"shrunk {2**MAX_BACKTRACK}-fold.{_raised(last_error)} The result so far is attached to this "
        f"error as .result (and written to the checkpoint when one is set). {HINT}"
    )


def wall_message(step: int, faulty_steps: int, window: int, faults: int, reverted: int, total: int, last_error) -> str:
    """The warning of a run whose particles kept running into a region where the density is not finite."""
    return (
        f"particles are held at a region where the log density is NaN/inf (or raises): in {faulty_steps} of "
        f"the last {window} steps up to step {step} some of {total} particles stepped into it ({faults} "
        f"steps shrunk, {reverted} undone), so particles may be piled against that boundary and the spread "
        f"there is not the posterior's.{_raised(last_error)} {HINT}"
    )


class CountsEvaluations:
    """For samplers: ``grad_evals``, the score evaluations so far (set-up included), is the count
    kept by the sampler's :class:`Evaluator` ``self.evaluate`` (checkpoints restore it)."""

    evaluate: Evaluator

    @property
    def grad_evals(self) -> int:
        """Score evaluations so far (points x evaluations, set-up included)."""
        return self.evaluate.count

    @grad_evals.setter
    def grad_evals(self, value: int) -> None:
        self.evaluate.count = int(value)


class StuckEnsembleError(FloatingPointError):
    """Faults kept a whole ensemble from moving; ``result`` holds the particles before the failing step.

    Attributes
    ----------
    result : Result or None
        The run so far (the particles after the last completed step, with its warnings).
    """

    def __init__(self, message: str, result=None):
        super().__init__(message)
        self.result = result

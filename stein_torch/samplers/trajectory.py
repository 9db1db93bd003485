"""One no-U-turn transition for a batch of chains, the tree built iteratively.

Method: the tree doubling of "The No-U-Turn Sampler" (arXiv:1111.4246), with multinomial sampling of
the trajectory and the generalised no-U-turn criterion of "A Conceptual Introduction to Hamiltonian
Monte Carlo" (arXiv:1701.02434): a segment with momentum sum ``rho`` and end velocities
``p#_a = M^{-1} p_a``, ``p#_b`` has turned back when ``p#_a . rho <= 0`` or ``p#_b . rho <= 0``.

Batching. All C chains advance as one (C, d) tensor. Doubling ``j`` adds a sub-tree of ``2^j``
leapfrog steps in a random direction per chain; the working tensors hold only the k chains still
building (no indexing at all while every chain builds; rows gathered once per doubling after some
stopped, and dropped at once when a chain stops inside a doubling), so each leapfrog step is exactly
one call of ``evaluate`` on (k, d) and a chain that stopped costs nothing. Since every building chain
is at the same step ``n`` of the same doubling, the bookkeeping indices are plain Python integers.

Iterative tree. The recursive algorithm checks, whenever two sibling sub-trees E (built first) and F
merge, the whole ``E+F`` and -- the extra checks across the two halves -- ``E + first(F)`` and
``last(E) + F``. Step ``n`` of the sub-tree closes every block of size ``2^l`` with ``2^l | n+1``.
With ``S_n`` the running momentum sum, block ``[a, n]`` with right half starting at ``m`` needs

    E+F:       S_n - S_{a-1},     ends p#_a,     p#_n
    E+first F: S_m - S_{a-1},     ends p#_a,     p#_m
    last E+F:  S_n - S_{m-2},     ends p#_{m-1}, p#_n

so a checkpoint slot ``l`` written at each block start ``s`` (``2^l | s``) holds
``(S_{s-1}, p#_s, S_{s-2}, S_s, p#_{s-1})``; all checks of one step are one gather and one batched
dot product. The merge of the new sub-tree with the old trajectory is the same check with a virtual
slot holding ``-rho_old`` and the velocity at the old far end.

Sampling: within a sub-tree the candidate is a draw proportional to the weights, taken
progressively as the largest ``log w_i - log E_i`` with ``E_i ~ Exp(1)`` (``-log E`` is standard
Gumbel, so this is the Gumbel-max rule, equal in law to uniform progressive sampling, common
practice); a valid sub-tree's candidate replaces the draw with probability
``min(1, W_new / W_old)`` (biased progressive sampling). Weights are
``w = exp(H0 - H)``. A sub-tree containing a U-turn, a divergence (``H - H0`` above
``max_energy_error``) or a point ``evaluate`` flagged bad is discarded and the chain stops.
"""

from __future__ import annotations

from typing import Callable

import torch

__all__ = ["NoUTurnTransition", "Evaluate", "DEFAULT_DEPTH_LIMIT", "DEFAULT_MAX_ENERGY_ERROR"]

Evaluate = Callable[[torch.Tensor], "tuple[torch.Tensor, torch.Tensor, torch.Tensor]"]

# 10 doublings = at most 1023 leapfrog steps per draw; measured (README, measure_warmup.py): after the
# default warm-up the test targets used depth <= 5, and the hardest case measured, the 100-D
# condition-1000 Gaussian with a diagonal metric, mean 6.7 and max 8: 10 leaves a factor of 4 in
# trajectory length over the longest seen before a draw is truncated (and then flagged).
DEFAULT_DEPTH_LIMIT = 10
# energy error at which a trajectory counts as diverging (common practice)
DEFAULT_MAX_ENERGY_ERROR = 1000.0


def _trailing_zeros(n: int) -> int:
    return (n & -n).bit_length() - 1


class NoUTurnTransition:
    """The no-U-turn transition kernel for a batch of chains.

    Parameters
    ----------
    depth_limit : int
        Maximum number of tree doublings (at most ``2**depth_limit - 1`` leapfrog steps per draw).
    max_energy_error : float
        A point with ``H - H0`` above this is a divergence.
    """

    def __init__(self, depth_limit: int = DEFAULT_DEPTH_LIMIT,
                 max_energy_error: float = DEFAULT_MAX_ENERGY_ERROR):
        if isinstance(depth_limit, bool) or not isinstance(depth_limit, int) or not 1 <= depth_limit <= 30:
            raise ValueError(f"depth_limit: expected an integer in [1, 30], got {depth_limit!r}")
        if not isinstance(max_energy_error, (int, float)) or not max_energy_error > 0:
            raise ValueError(f"max_energy_error: expected a positive number, got {max_energy_error!r}")
        self.depth_limit = depth_limit
        self.max_energy_error = float(max_energy_error)
        self._index_cache: dict = {}

    def __call__(self, position: torch.Tensor, log_density: torch.Tensor, score: torch.Tensor,
                 step_size: torch.Tensor, metric, evaluate: Evaluate,
                 generator: torch.Generator):
        """Advance every chain by one draw.

        Parameters
        ----------
        position, score : torch.Tensor, shape (C, d)
            Current points and their gradients of the log density.
        log_density : torch.Tensor, shape (C,)
        step_size : torch.Tensor, shape (C,)
            Leapfrog step size of each chain.
        metric : DiagonalMetric or DenseMetric
        evaluate : callable
            ``evaluate(x (k, d)) -> (lp (k,), grad (k, d), bad (k,) bool)``.
        generator : torch.Generator
            Source of all randomness (momenta, directions, multinomial choices).

        Returns
        -------
        position, log_density, score : torch.Tensor, shapes (C, d), (C,), (C, d)
        stats : dict of torch.Tensor, each shape (C,)
            ``acceptance_rate`` (mean of ``min(1, exp(H0 - H))`` over the new points),
            ``tree_depth`` (doublings done, the last one included), ``n_steps`` (leapfrog steps),
            ``diverging``, ``energy`` (Hamiltonian at the draw), ``lp``.
        """
        n_chains, dim = position.shape
        dtype, device = position.dtype, position.device
        velocity_of, addcmul, where, stack = metric.velocity, torch.addcmul, torch.where, torch.stack
        threshold, neg_inf = -self.max_energy_error, torch.tensor(-torch.inf, dtype=dtype, device=device)
        momentum = metric.sample_momentum(n_chains, generator)
        velocity = velocity_of(momentum)
        energy0 = metric.kinetic_energy(momentum, velocity) - log_density
        coins = torch.rand((2, self.depth_limit, n_chains), generator=generator, dtype=dtype).to(device)
        forward_rows, log_u_rows = (coins[0] < 0.5).unbind(0), coins[1].log().unbind(0)
        steps_fw = step_size.to(dtype)[:, None]
        steps_bw = -steps_fw
        # per-chain tree state; ends: side 0 backward, 1 forward, rows [x | p | grad | p#]
        start = torch.cat([position, momentum, score, velocity], dim=1)
        ends = stack([start, start])
        zeros = torch.zeros_like(energy0)
        draw = torch.cat([position, score, stack([log_density, zeros], 1)], 1)   # [x | grad | lp | log w]
        log_w_tree, accept_sum = zeros, torch.zeros_like(energy0)     # log of summed weights exp(H0 - H)
        neg_rho = -momentum                                    # minus the momentum sum of the trajectory
        n_steps = torch.zeros(n_chains, dtype=torch.long, device=device)
        depth = torch.zeros(n_chains, dtype=torch.long, device=device)
        diverging = torch.zeros(n_chains, dtype=torch.bool, device=device)
        active = None                                          # building chains (None: all, in order)

        for j in range(self.depth_limit):
            size, last_depth = 1 << j, j == self.depth_limit - 1
            if active is None:
                fwd, ends_k, neg_rho_k, energy0_k = forward_rows[j], ends, neg_rho, energy0
                eps = where(fwd[:, None], steps_fw, steps_bw)
            else:
                fwd, ends_k = forward_rows[j][active], ends[:, active]
                neg_rho_k, energy0_k = neg_rho[active], energy0[active]
                eps = where(fwd[:, None], steps_fw[active], steps_bw[active])
            k = fwd.shape[0]
            fwd_col = fwd[:, None]
            far, front = where(fwd_col, ends_k, ends_k.flip(0)).unbind(0)   # far end, end to extend
            x, p, g, v = front.split(dim, 1)
            half = 0.5 * eps
            log_e = (torch.empty((size, k), dtype=dtype).exponential_(generator=generator).log_().to(device).unbind(0)
                     if size > 1 else [None])                   # one point: no choice to make
            ckpt = torch.empty((k, j + 2, 5, dim), dtype=dtype, device=device)   # (chain, slot, field, d)
            ckpt[:, j + 1, :2] = stack([neg_rho_k, far[:, 3 * dim:]], 1)   # virtual slot: old trajectory
            slot0, slot0_keep = ckpt[:, 0], ckpt[:, :1]
            sum_prev, sum_prev2, v_prev = torch.zeros_like(p), -p, v
            log_ws = []
            rows = active                                          # global rows of the working set
            for n in range(size):
                # leapfrog step: one batched evaluation of the k building chains
                p = addcmul(p, half, g)
                x = addcmul(x, eps, velocity_of(p))
                lp, g, bad = evaluate(x)
                p = addcmul(p, half, g)
                v = velocity_of(p)
                log_w = torch.add(lp + energy0_k, torch.linalg.vecdot(p, v), alpha=-0.5)  # H0 - H
                log_w = log_w.masked_fill(bad, torch.nan)
                ok = log_w >= threshold                            # False for NaN: bad points diverge
                log_w = where(ok, log_w, neg_inf)
                log_ws.append(log_w)
                # candidate: the largest log w - log E (E ~ Exp(1)) is a draw proportional to w
                if n == 0:
                    best = log_w if size == 1 else log_w - log_e[0]
                    sub_draw = torch.cat([x, g, stack([lp, log_w], 1)], 1)
                else:
                    key = log_w - log_e[n]
                    take = key > best
                    if n < 4 or bool(take.any()):              # early points are often taken: no sync
                        best = where(take, key, best)
                        point = torch.cat([x, g, stack([lp, log_w], 1)], 1)
                        sub_draw = where(take[:, None], point, sub_draw)
                total = sum_prev + p
                stack([sum_prev, v, sum_prev2, total, v_prev], 1, out=slot0)
                levels = _trailing_zeros(n) if n else j
                if levels:
                    ckpt[:, 1:levels + 1] = slot0_keep
                sum_prev2, sum_prev, v_prev = sum_prev, total, v
                closing = _trailing_zeros(n + 1)
                if n == size - 1:                                  # also check the merged trajectory
                    stop, top = self._turned(ckpt, closing, j)
                    any_stop = bool(stop.logical_or_(ok.logical_not()).any())
                elif closing:
                    stop = self._turned(ckpt, closing, None)[0].logical_or_(ok.logical_not())
                    any_stop = bool(stop.any())
                else:
                    any_stop = not bool(ok.all())
                    stop = ok.logical_not() if any_stop else None
                if any_stop:                                        # discard the sub-tree of these chains
                    gone = stop.nonzero().squeeze(1) if rows is None else rows[stop]
                    n_steps[gone] = size + n
                    depth[gone] = j + 1
                    diverging[gone] = ~ok[stop]
                    accept_sum[gone] += stack(log_ws, 1)[stop].clamp(max=0.0).exp().sum(1)
                    keep = ~stop
                    rows = (torch.arange(n_chains, device=device) if rows is None else rows)[keep]
                    if rows.numel() == 0:
                        break
                    (x, p, g, v, eps, half, energy0_k, ckpt, sum_prev, sum_prev2, v_prev, sub_draw,
                     best, fwd_col, far) = (
                        t[keep] for t in (x, p, g, v, eps, half, energy0_k, ckpt, sum_prev, sum_prev2,
                                          v_prev, sub_draw, best, fwd_col, far))
                    slot0, slot0_keep = ckpt[:, 0], ckpt[:, :1]
                    log_ws = [t[keep] for t in log_ws]
                    log_e = [t[keep] for t in log_e] if size > 1 else log_e
                    if n == size - 1:
                        top = top[keep]
            if rows is not None and rows.numel() == 0:
                active = rows
                break
            # the sub-tree is valid: biased progressive sampling, then merge with the trajectory
            log_w_steps = stack(log_ws, 1)
            log_w_sub = torch.logsumexp(log_w_steps, 1)
            accept_add = log_w_steps.clamp(max=0.0).exp().sum(1)
            new_ends = stack([far, torch.cat([x, p, g, v], dim=1)])
            new_ends = where(fwd_col, new_ends, new_ends.flip(0))
            if rows is None:
                accept = (log_w_sub - log_w_tree) > log_u_rows[j]
                draw = where(accept[:, None], sub_draw, draw)
                log_w_tree = torch.logaddexp(log_w_tree, log_w_sub)
                neg_rho = neg_rho - sum_prev
                ends = new_ends
                accept_sum = accept_sum + accept_add
            else:
                old_w = log_w_tree[rows]
                accept = (log_w_sub - old_w) > log_u_rows[j][rows]
                draw[rows] = where(accept[:, None], sub_draw, draw[rows])
                log_w_tree[rows] = torch.logaddexp(old_w, log_w_sub)
                neg_rho[rows] -= sum_prev
                ends[:, rows] = new_ends
                accept_sum[rows] += accept_add
            # chains whose whole trajectory (old + new) turned, or at max depth, stop
            if last_depth or bool(top.any()):
                done = top if not last_depth else torch.ones_like(top)
                gone = done.nonzero().squeeze(1) if rows is None else rows[done]
                n_steps[gone] = 2 * size - 1
                depth[gone] = j + 1
                rows = (torch.arange(n_chains, device=device) if rows is None else rows)[~done]
            active = rows
            if active is not None and active.numel() == 0:
                break

        x_out, g_out = draw[:, :dim], draw[:, dim:2 * dim]
        lp_out, log_w_out = draw[:, 2 * dim], draw[:, 2 * dim + 1]
        stats = {"acceptance_rate": accept_sum / n_steps.to(dtype), "tree_depth": depth,
                 "n_steps": n_steps, "diverging": diverging, "energy": energy0 - log_w_out, "lp": lp_out}
        return x_out, lp_out, g_out, stats                  # views of one fresh (C, 2d + 2) tensor

    def _turned(self, ckpt: torch.Tensor, closing: int, top: int | None):
        """U-turn flags of the blocks of sizes ``2^1 .. 2^closing`` closing now and, when ``top`` is
        given, of the merge of the new sub-tree with the old trajectory (virtual slot ``top + 1``).

        Parameters
        ----------
        ckpt : torch.Tensor, shape (k, slots, 5, d)
        closing : int
        top : int or None

        Returns
        -------
        tuple of torch.Tensor, each shape (k,), bool
            Inside the sub-tree, then (only when ``top`` is given) the merged trajectory.
        """
        key = (closing, top)
        index = self._index_cache.get(key)
        if index is None:
            index = self._index_cache[key] = _check_index(closing, top).to(ckpt.device)
        k, dim = ckpt.shape[0], ckpt.shape[-1]
        picked = ckpt.view(k, -1, dim).index_select(1, index).view(k, 4, -1, dim)
        rho = picked[:, 0] - picked[:, 1]                                   # (k, checks, d)
        dots = torch.linalg.vecdot(picked[:, 2:], rho.unsqueeze(1))          # (k, 2, checks)
        turned = (dots <= 0).any(1)                                         # (k, checks)
        if top is None:
            return (turned.any(1),)
        return turned[:, :3 * closing].any(1), turned[:, 3 * closing:].any(1)


def _check_index(closing: int, top: int | None) -> torch.Tensor:
    """Flat (slot * 5 + field) row indices of the checks: minuends, subtrahends, first and second
    ends, each (checks,); blocks of levels ``1..closing``, then level ``top + 1`` when given."""
    def flat(slot, field):
        return slot * 5 + field

    levels = list(range(1, closing + 1)) + ([top + 1] if top is not None else [])
    plus, minus, first, second = [], [], [], []
    for level in levels:
        a, m = level, level - 1                                     # block start slot, right-half slot
        plus += [flat(0, 3), flat(m, 3), flat(0, 3)]                # S_n, S_m, S_n
        minus += [flat(a, 0), flat(a, 0), flat(m, 2)]               # S_{a-1}, S_{a-1}, S_{m-2}
        first += [flat(a, 1), flat(a, 1), flat(m, 4)]               # p#_a, p#_a, p#_{m-1}
        second += [flat(0, 1), flat(m, 1), flat(0, 1)]              # p#_n, p#_m, p#_n
    return torch.tensor(plus + minus + first + second, dtype=torch.long)

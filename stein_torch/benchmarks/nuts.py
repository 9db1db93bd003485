"""NUTS cost: what the tree building adds to the time of the batched score calls it makes.

    stein-torch bench nuts [--repeats 11] [--transitions 30] [--threads 1]

Target: Bayesian logistic regression with 20 coefficients and 10,000 observations (invented data: a
lender's repayment records, generated here), 4 chains, written two ways: a flat ``st.Target(log_prob,
dim=20)`` closing over the data, and named latents with ``log_likelihood=`` and ``data=`` (the
likelihood then runs through the observation-chunk path). For each form and metric (diagonal,
dense) a sampler is warmed up (200 transitions), its state saved, and the same ``transitions`` draws
replayed from that state in every repeat, configurations interleaved. Per repeat,

    overhead = (time of the NUTS steps - time inside its score evaluations) / time inside them

in wall time and in this thread's CPU time (less sensitive to other work on the machine); the table
shows medians over repeats. A score evaluation is the sampler's whole contained evaluation (the
whitening map, the model's log density and autograd score, the fault mask); the rest of a step is
the tree building plus the sampler's bookkeeping. The bound is 0.50. Ratios within one run only.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import torch

import stein_torch as st

__all__ = ["main", "logistic_targets", "BOUND"]

BOUND = 0.50
CHAINS, WARMUP, N_OBS, DIM = 4, 200, 10_000, 20


def logistic_targets(n_obs: int = N_OBS, dim: int = DIM, seed: int = 0) -> dict:
    """The two forms of the benchmark's logistic regression (prior N(0, 2.5^2) on every coefficient)."""
    g = torch.Generator().manual_seed(seed)
    features = torch.randn(n_obs, dim, generator=g, dtype=torch.float64)
    truth = 0.5 * torch.randn(dim, generator=g, dtype=torch.float64)
    repaid = (torch.rand(n_obs, generator=g, dtype=torch.float64) < torch.sigmoid(features @ truth)).double()
    inv_var = 1.0 / 2.5 ** 2

    def log_prob(beta):                                              # (..., d) -> (...)
        z = beta @ features.T
        return (repaid * z - torch.nn.functional.softplus(z)).sum(-1) - 0.5 * inv_var * (beta * beta).sum(-1)

    def log_prior(p):
        return -0.5 * inv_var * (p["beta"] * p["beta"]).sum(-1)

    def log_likelihood(p, data):                                     # (..., n_obs) terms
        z = p["beta"] @ data["x"].T
        return data["repaid"] * z - torch.nn.functional.softplus(z)

    return {"flat": st.Target(log_prob, dim=dim),
            "data": st.Target(log_prior, latents={"beta": st.Latent((dim,))}, log_likelihood=log_likelihood,
                              data={"x": features, "repaid": repaid}, observed="repaid")}


class _Timed:
    """The sampler's evaluator with the wall and CPU time spent inside it."""

    def __init__(self, evaluate):
        self.evaluate, self.wall, self.cpu, self.calls = evaluate, 0.0, 0.0, 0

    def __getattr__(self, name):
        return getattr(self.evaluate, name)

    def __call__(self, *args, **kwargs):
        wall, cpu = time.perf_counter(), time.thread_time()
        out = self.evaluate(*args, **kwargs)
        self.cpu += time.thread_time() - cpu
        self.wall += time.perf_counter() - wall
        self.calls += 1
        return out


def _prepared(target, metric: str, draws: int):
    sampler = st.NUTS(target, CHAINS, draws, WARMUP, metric=metric, seed=0, precondition=None)
    sampler.run(WARMUP, progress=False)
    return sampler, sampler.state_dict()


def _replay(sampler, state, transitions: int) -> dict:
    sampler.load_state_dict(state)
    timed = _Timed(sampler.evaluate)
    sampler.evaluate = timed
    steps_before = sampler.grad_evals
    wall, cpu = time.perf_counter(), time.thread_time()
    for _ in range(transitions):
        sampler.step()
    cpu, wall = time.thread_time() - cpu, time.perf_counter() - wall
    sampler.evaluate = timed.evaluate
    return {"wall": wall, "cpu": cpu, "score": timed.wall, "score_cpu": timed.cpu, "calls": timed.calls,
            "rows": sampler.grad_evals - steps_before}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="stein-torch bench nuts", description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=11, help="interleaved repeats, medians reported (default 11)")
    parser.add_argument("--transitions", type=int, default=30, help="NUTS transitions per repeat (default 30)")
    parser.add_argument("--threads", type=int, default=1, help="torch intra-op threads (default 1)")
    parser.add_argument("--quick", action="store_true", help="3 repeats of 10 transitions (a check that it runs)")
    return parser


def main(args: list[str] | None = None) -> int:
    parser = build_parser()
    opts = parser.parse_args(args)
    if min(opts.repeats, opts.transitions, opts.threads) < 1:
        parser.error("--repeats, --transitions and --threads must be >= 1")
    if opts.quick:
        opts.repeats, opts.transitions = 3, 10
    torch.set_num_threads(opts.threads)
    configs = {(form, metric): _prepared(target, metric, opts.transitions)
               for form, target in logistic_targets().items() for metric in ("diag", "dense")}
    runs = {key: [] for key in configs}
    for _ in range(opts.repeats):
        for key, (sampler, state) in configs.items():        # interleaved
            runs[key].append(_replay(sampler, state, opts.transitions))
    print(f"torch {torch.__version__}, {torch.get_num_threads()} thread(s), {CHAINS} chains, logistic regression "
          f"d={DIM}, n={N_OBS}; {opts.transitions} transitions x {opts.repeats} interleaved repeats, medians\n")
    print("| target form | metric | score calls | rows/call | score us/call | rest us/call | overhead (wall) "
          "| overhead (CPU) | bound <= 0.50 |")
    print("|---|---|---|---|---|---|---|---|---|")
    worst = 0.0
    for (form, metric), rows in runs.items():
        med = lambda f: statistics.median(f(r) for r in rows)  # noqa: E731
        wall = med(lambda r: (r["wall"] - r["score"]) / r["score"])
        cpu = med(lambda r: (r["cpu"] - r["score_cpu"]) / r["score_cpu"])
        worst = max(worst, wall, cpu)
        calls, n_rows = rows[0]["calls"], rows[0]["rows"]
        print(f"| {form} | {metric} | {calls} | {n_rows / calls:.2f} | {med(lambda r: r['score'] / r['calls'] * 1e6):.0f} "
              f"| {med(lambda r: (r['wall'] - r['score']) / r['calls'] * 1e6):.0f} | {wall:.3f} | {cpu:.3f} "
              f"| {'pass' if max(wall, cpu) <= BOUND else 'FAIL'} |")
    print(f"\nload average (1 min) at the end: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    return 0 if worst <= BOUND else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))

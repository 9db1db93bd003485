"""Benchmarks run by ``stein-torch bench [suite]``.

Each suite is a module here with ``main(args: list[str]) -> int`` that prints its table. Figures are
ratios measured in one run (against a bare matmul, against a naive loop), so they stay meaningful on
shared, noisy machines.
"""

__all__ = ["SUITES"]

SUITES = {
    "core": "stein_torch.benchmarks.core",          # SVGD direction vs matmuls, memory, vs per-particle loop
    "accuracy": "stein_torch.benchmarks.accuracy",  # default SVGD and MALA on the reference posteriors
    "kernels": "stein_torch.benchmarks.kernels",    # kernel study: W1 error against steps and score evals
    "module": "stein_torch.benchmarks.module",      # nn.Module scores: vmap vs a loop over particles
    "nuts": "stein_torch.benchmarks.nuts",          # NUTS tree building vs its batched score calls
    "distributed": "stein_torch.benchmarks.distributed",  # 1 rank vs 2 ranks: particle and data sharding, memory
}

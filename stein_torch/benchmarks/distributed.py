"""Sharded runs: ``stein-torch bench distributed [--quick] [--rounds K] [--json]``.

Every figure comes from fresh processes with one torch thread each (2-rank runs through
``torchrun --standalone --nproc-per-node=2``, the 1-process baseline as a plain process), timed in
rounds that alternate the configurations so that changes in machine load hit all of them alike.
Rows, as ratios of the median seconds per step (steps 2-6 of each run, after set-up; the KSD checks
every 10 steps are sharded the same way and not in the window):

(a) score-bound: Bayesian logistic regression, 200,000 invented observations, d = 20, N = 256,
    particle sharding, 1 rank / 2 ranks. Floor 1.6x.
(b) the same model with data sharding. Floor 1.5x.
(c) pairwise-bound: N = 16,384, d = 16, a Gaussian log density (cheap scores), particle sharding.
    Floor 1.5x.
(d) peak resident memory (VmHWM, process lifetime, torch included) of the worst rank at
    N = 200,000, d = 10 on 2 ranks: set-up and one step. Floor 2 GB.
(e) loopback all-gather between 2 ranks: latency (8 bytes) and bandwidth (8 MiB), and the share of
    a step spent in exchanges; :func:`scaling_table` projects the step time to 64 ranks from them.

Beside each wall-clock ratio the table gives the ratio of CPU seconds per step (1 rank / the busiest
rank): on a machine whose cores are taken by other work, 2 ranks cannot get 2 cores, and the CPU
ratio tells how much of the shortfall is the machine rather than the sharding.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import statistics
import subprocess
import sys
import time

import torch

import stein_torch as st
from stein_torch.samplers.distributed import sharding
from stein_torch.samplers.svgd import Sampler

__all__ = ["main", "build_parser", "scaling_table", "received_bytes"]

FULL = {"score": (200_000, 20, 256), "pairwise": (16_384, 16), "memory": (200_000, 10), "rounds": 3, "steps": 5}
QUICK = {"score": (4_000, 5, 32), "pairwise": (512, 4), "memory": (2_000, 4), "rounds": 1, "steps": 2}
FLOORS = {"score particles": 1.6, "score data": 1.5, "pairwise particles": 1.5, "memory_gb": 2.0}
NETWORKS = {  # assumed cluster networks for the projection: (latency s, bandwidth bytes/s), common practice
    "10 GbE": (50e-6, 1.1e9),
    "100 Gb/s": (5e-6, 11e9),
}


# ------------------------------------------------------------------------------------------- models
def logistic_target(n_obs: int, d: int) -> st.Target:
    """Bayesian logistic regression on invented data (normal prior, per-observation terms)."""
    g = torch.Generator().manual_seed(0)
    x = torch.randn(n_obs, d, generator=g, dtype=torch.float64)
    w = torch.randn(d, generator=g, dtype=torch.float64) / math.sqrt(d)
    y = torch.bernoulli(torch.sigmoid(x @ w), generator=g)

    def log_prior(p):
        return -0.5 * (p["w"] ** 2).sum(-1)

    def log_likelihood(p, data):  # (..., n) terms
        logits = p["w"] @ data["x"].T
        return data["y"] * logits - torch.nn.functional.softplus(logits)

    return st.Target(log_prior, latents={"w": st.Latent((d,))}, log_likelihood=log_likelihood,
                     data={"x": x, "y": y}, observed="y")


def gaussian_target(d: int) -> st.Target:
    """A correlated Gaussian log density: scores cost O(d^2) per particle (cheap)."""
    g = torch.Generator().manual_seed(1)
    a = torch.randn(d, d, generator=g, dtype=torch.float64) / math.sqrt(d)
    precision = a @ a.T + 0.5 * torch.eye(d, dtype=torch.float64)
    return st.Target(lambda x: -0.5 * ((x @ precision) * x).sum(-1), dim=d)


# ------------------------------------------------------------------------------------------- worker
def _peak_rss_kib() -> int:
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    return 0


def _timed(obj, name: str, totals: dict, key: str) -> None:
    """Replace ``obj.name`` by a wrapper adding its wall time to ``totals[key]`` (bench only)."""
    inner = getattr(obj, name)

    def wrapper(*args, **kwargs):
        start = time.perf_counter()
        try:
            return inner(*args, **kwargs)
        finally:
            totals[key] += time.perf_counter() - start

    setattr(obj, name, wrapper)


def worker(config: dict) -> dict | None:
    """One run of a configuration on this process (a rank when started by torchrun); rank 0 returns
    the figures."""
    torch.set_num_threads(1)
    kind, mode = config["kind"], config.get("mode")
    target = logistic_target(*config["size"][:2]) if kind == "score" else gaussian_target(config["size"][1])
    n = config["size"][2] if kind == "score" else config["size"][0]
    totals = {"exchange": 0.0, "evaluate": 0.0, "direction": 0.0}
    with sharding(mode, target, particles=n, seed=0, resume=None, device=None, settings={"config": config}) as shard:
        comm = shard.comm
        if comm is not None:
            _timed(comm, "gather", totals, "exchange")
        sampler = Sampler(shard.target, n, seed=shard.seed, axis=shard.axis, stop=False)
        _timed(sampler, "_evaluate", totals, "evaluate")
        _timed(sampler, "direction", totals, "direction")
        if config.get("warmup", True):
            sampler.step()  # warm-up: buffers, caches
        for key in totals:
            totals[key] = 0.0
        barrier = (lambda: comm.gather(torch.zeros(1))) if comm is not None else (lambda: None)
        barrier()
        start, cpu_start = time.perf_counter(), time.process_time()
        for _ in range(config["steps"]):
            sampler.stop_together(False)  # the per-step agreement of run_loop (one small exchange)
            sampler.step()
        cpu = (time.process_time() - cpu_start) / config["steps"]  # this process, all its threads
        barrier()
        seconds = (time.perf_counter() - start) / config["steps"]
        out = {"seconds": seconds, "cpu": cpu, **{k: v / config["steps"] for k, v in totals.items()}}
        if comm is not None and config.get("loopback"):
            out.update(loopback(comm))
        peaks = [_peak_rss_kib()]
        if comm is not None:
            peaks = [int(p) for p in comm.gather(torch.tensor([peaks[0]], dtype=torch.int64))]
            out["cpu"] = max(float(c) for c in comm.gather(torch.tensor([cpu], dtype=torch.float64)))  # busiest rank
        out["peak_kib"] = max(peaks)
    return out if (comm is None or comm.rank == 0) else None


def loopback(comm, repeats: int = 20) -> dict:
    """Seconds of an all-gather of 8 bytes (latency) and of 8 MiB per rank (bandwidth, bytes/s)."""
    figures = {}
    for label, numbers in (("latency", 1), ("bulk", 2**20)):
        t = torch.zeros(numbers, dtype=torch.float64)
        comm.gather(t)
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            comm.gather(t)
            times.append(time.perf_counter() - start)
        figures[label] = statistics.median(times)
    # a ring all-gather moves (R - 1) blocks through every rank
    figures["bandwidth"] = (comm.world - 1) * 8 * 2**20 / max(figures["bulk"] - figures["latency"], 1e-9)
    return figures


def run_config(config: dict, ranks: int) -> dict:
    """Run ``worker(config)`` in fresh processes: one plain process, or ``ranks`` through torchrun."""
    payload = ["-m", "stein_torch.benchmarks.distributed", "--worker", json.dumps(config)]
    if ranks == 1:
        command = [sys.executable, *payload]
    else:
        command = [sys.executable, "-m", "torch.distributed.run", "--standalone", f"--nproc-per-node={ranks}", *payload]
    env = dict(os.environ, OMP_NUM_THREADS="1", GLOO_SOCKET_IFNAME="lo", LOGLEVEL="ERROR")
    done = subprocess.run(command, capture_output=True, text=True, env=env, timeout=3600)
    lines = [line for line in done.stdout.splitlines() if line.startswith("{")]
    if done.returncode != 0 or not lines:
        lines = [x for x in done.stderr.splitlines() if x.strip(" =-") and "Error" in x] or ["no error message"]
        tail = lines[-1].strip()
        raise RuntimeError(f"bench distributed: {config['kind']} on {ranks} rank(s) failed: {tail}")
    return json.loads(lines[-1])


# ------------------------------------------------------------------------------------------- scaling
def received_bytes(mode: str, n: int, d: int, r: int, ensembles: int = 1) -> float:
    """Bytes each rank receives per step (one score evaluation per step; docs/distributed.md)."""
    if r == 1:
        return 0.0
    check = 16 * (r - 1)  # the stop / same-particles agreement
    if mode == "particles":  # (lp, score, fault flag) of each block, then the direction of each block
        return 8 * ensembles * (r - 1) * math.ceil(n / r) * (2 * d + 2) + check
    return 8 * (r - 1) * (ensembles * n * (d + 1) + r) + check  # partial sums of every rank


def scaling_table(one: dict, mode: str, n: int, d: int, latency: float, bandwidth: float,
                  ranks=(1, 2, 4, 8, 16, 32, 64)) -> list[tuple[int, float, float, float]]:
    """Projected seconds per step against the number of ranks R.

    Model: the score evaluations (and, sharding particles, the SVGD direction) divide by R; the rest
    of a step (the step rule, bandwidth, standardiser on the full set) is repeated on every rank;
    each exchange is a ring all-gather costing (R - 1) latencies, plus :func:`received_bytes` over
    the bandwidth. Exchanges per step: 3 sharding particles, 2 sharding data.

    Parameters
    ----------
    one : dict
        Seconds per step of a 1-rank run and of its ``evaluate`` and ``direction`` parts.

    Returns
    -------
    list of (R, compute seconds, exchange seconds, speed-up over one rank)
    """
    divided = one["evaluate"] + (one["direction"] if mode == "particles" else 0.0)
    repeated = max(0.0, one["seconds"] - divided)
    exchanges = 3 if mode == "particles" else 2
    rows = []
    for r in ranks:
        compute = repeated + divided / r
        exchange = 0.0 if r == 1 else exchanges * (r - 1) * latency + received_bytes(mode, n, d, r) / bandwidth
        rows.append((r, compute, exchange, one["seconds"] / (compute + exchange)))
    return rows


# ------------------------------------------------------------------------------------------- main
def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="stein-torch bench distributed",
                                     description="1 rank against 2: particle and data sharding, memory per rank, scaling")
    parser.add_argument("--quick", action="store_true", help="small sizes (for tests; figures not meaningful)")
    parser.add_argument("--rounds", type=int, help="alternating rounds of the timed configurations")
    parser.add_argument("--json", action="store_true", help="also print the raw figures as JSON")
    parser.add_argument("--parts", choices=("all", "timing", "memory"), default="all",
                        help="timing: rows (a)-(c), (e); memory: row (d) (it takes minutes: one step at N = 200,000)")
    parser.add_argument("--worker", help=argparse.SUPPRESS)
    return parser


def main(args: list[str] | None = None) -> int:
    """Print the distributed table; return 1 if a figure misses its floor."""
    opts = build_parser().parse_args(args)
    if opts.worker:
        out = worker(json.loads(opts.worker))
        if out is not None:
            print(json.dumps(out), flush=True)
        return 0
    sizes = QUICK if opts.quick else FULL
    rounds = opts.rounds or sizes["rounds"]
    load = os.getloadavg()[0]
    print(f"stein_torch {st.__version__}, torch {torch.__version__}, 1 torch thread per rank, {os.cpu_count()} cores, "
          f"load average {load:.2f}" + ("  [--quick: small sizes, figures not meaningful]" if opts.quick else ""))
    steps = sizes["steps"]
    configs = {
        "score 1": ({"kind": "score", "size": sizes["score"], "steps": steps}, 1),
        "score particles": ({"kind": "score", "size": sizes["score"], "steps": steps, "mode": "particles",
                             "loopback": True}, 2),
        "score data": ({"kind": "score", "size": sizes["score"], "steps": steps, "mode": "data"}, 2),
        "pairwise 1": ({"kind": "pairwise", "size": sizes["pairwise"], "steps": steps}, 1),
        "pairwise particles": ({"kind": "pairwise", "size": sizes["pairwise"], "steps": steps, "mode": "particles"}, 2),
    }
    raw: dict[str, list[dict]] = {name: [] for name in configs}
    for _ in range(rounds if opts.parts != "memory" else 0):
        for name, (config, ranks) in configs.items():
            raw[name].append(run_config(config, ranks))
    memory = None
    if opts.parts != "timing":
        memory = run_config({"kind": "pairwise", "size": sizes["memory"], "steps": 1, "mode": "particles",
                             "warmup": False}, 2)
    failures = 0
    print(f"{'figure':<62} {'wall':>8} {'range':>13} {'floor':>6}  status")

    def row(label, values, floor, unit="x", higher_is_better=True, cpu=None):
        nonlocal failures
        mid = statistics.median(values)
        ok = mid >= floor if higher_is_better else mid <= floor
        failures += 0 if ok or opts.quick else 1
        spread = f"{min(values):.2f}-{max(values):.2f}" if len(values) > 1 else "-"
        extra = "" if cpu is None else f"   cpu {statistics.median(cpu):.2f}{unit} ({min(cpu):.2f}-{max(cpu):.2f})"
        print(f"{label:<62} {mid:>7.2f}{unit} {spread:>13} {floor:>5.1f}{unit}  {'ok' if ok else 'MISSED'}{extra}",
              flush=True)

    n_obs, d, n = sizes["score"]
    n_p, d_p = sizes["pairwise"]
    if memory is not None:
        n_m, d_m = sizes["memory"]
        row(f"(d) peak RSS per rank, N={n_m} d={d_m} on 2 ranks, GB", [memory["peak_kib"] / 2**20],
            FLOORS["memory_gb"], unit="", higher_is_better=False)
        print(f"    one step of 2 ranks took {memory['seconds']:.0f} s")
    if opts.parts == "memory":
        return 1 if failures else 0
    print("    (wall: seconds per step, 1 rank / 2 ranks; cpu: CPU seconds per step, 1 rank / the busiest of 2 ranks:\n"
          "     the most 2 idle cores would allow, waiting aside; on a loaded machine the wall ratio falls below it)")

    def ratios(one, two, key):
        return [a[key] / b[key] for a, b in zip(raw[one], raw[two])]

    for name, tag, what in (("score particles", "a", "particle"), ("score data", "b", "data")):
        row(f"({tag}) logistic n_obs={n_obs} d={d} N={n}, {what} sharding, 1/2 ranks", ratios("score 1", name, "seconds"),
            FLOORS[name], cpu=ratios("score 1", name, "cpu"))
    row(f"(c) pairwise N={n_p} d={d_p}, particle sharding, 1/2 ranks", ratios("pairwise 1", "pairwise particles", "seconds"),
        FLOORS["pairwise particles"], cpu=ratios("pairwise 1", "pairwise particles", "cpu"))
    for name in configs:
        seconds = ", ".join(f"{r['seconds']:.4f}" for r in raw[name])
        share = statistics.median(r["exchange"] / r["seconds"] for r in raw[name])
        print(f"    {name:<20} seconds per step {seconds}; exchanges (with waiting) {100 * share:.1f}% of a step")
    net = raw["score particles"][-1]
    print(f"(e) loopback all-gather, 2 ranks: latency {1e6 * net['latency']:.0f} us, bandwidth "
          f"{net['bandwidth'] / 1e9:.2f} GB/s")
    projections = {}
    nets = {"loopback": (net["latency"], net["bandwidth"]), **NETWORKS}
    for name, (mode, n_, d_, one) in {
        f"logistic N={n} d={d}, particle sharding": ("particles", n, d, raw["score 1"]),
        f"logistic N={n} d={d}, data sharding": ("data", n, d, raw["score 1"]),
        f"pairwise N={n_p} d={d_p}, particle sharding": ("particles", n_p, d_p, raw["pairwise 1"]),
    }.items():
        base = {k: statistics.median(r[k] for r in one) for k in ("seconds", "evaluate", "direction")}
        tables = {k: scaling_table(base, mode, n_, d_, lat, bw) for k, (lat, bw) in nets.items()}
        projections[name] = tables
        print(f"    projection, {name} ({received_bytes(mode, n_, d_, 2) / 2**20:.3f} MiB into each rank per "
              f"step at R=2, {received_bytes(mode, n_, d_, 64) / 2**20:.3f} MiB at R=64):")
        print(f"    {'R':>4} {'compute s':>10} " + " ".join(f"{'exch ' + k:>14} {'speed-up':>8}" for k in nets))
        for i, (r, compute, _, _) in enumerate(tables["loopback"]):
            cells = " ".join(f"{tables[k][i][2]:>14.5f} {tables[k][i][3]:>8.1f}" for k in nets)
            print(f"    {r:>4} {compute:>10.4f} {cells}")
    if opts.json:
        print(json.dumps({"raw": raw, "memory": memory, "projections": projections}))
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))

"""Command line: ``stein-torch demo``, ``stein-torch run MODEL.py``, ``stein-torch bench``, ``--version``.

Exit codes: 0 success, 1 the run failed (model error, numerical failure, failing benchmark),
2 usage error (bad option, missing file, unknown suite), 130 interrupted. Errors are one line on
stderr; ``--debug`` adds the traceback.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import sys
import time
import traceback
import warnings
from pathlib import Path

RUN_STEPS = 1000  # the sampler's default cap (stein_torch.samplers.svgd.DEFAULT_STEPS), kept import-free

__all__ = ["main"]

PROG = "stein-torch"


class UsageError(Exception):
    """Bad arguments or input files (exit code 2)."""


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors raised instead of usage text and ``sys.exit``."""

    def error(self, message):
        raise UsageError(f"{message} (see '{self.prog} --help')")


def _int_at_least(minimum: int, what: str):
    """An argparse type: an integer >= ``minimum``."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a {what} integer, got {text!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"expected a {what} integer, got {value}")
        return value

    return parse


_positive_int = _int_at_least(1, "positive")
_seed = _int_at_least(0, "non-negative")


def _version() -> str:
    from importlib import metadata

    import torch

    from ._version import __version__

    try:
        arviz = metadata.version("arviz")
    except metadata.PackageNotFoundError:
        arviz = "not installed"
    return f"{PROG} {__version__} (torch {torch.__version__}, arviz {arviz})"


def _build_parser() -> _Parser:
    common = argparse.ArgumentParser(add_help=False)
    # SUPPRESS: the flags may come before or after the subcommand without overwriting each other
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show tracebacks on errors")
    common.add_argument(
        "--threads", type=_positive_int, default=argparse.SUPPRESS,
        help="torch intra-op threads (default: 1 for the demo, torch's default otherwise)",
    )
    parser = _Parser(
        prog=PROG, parents=[common],
        description="Posterior particles from torch log densities by Stein variational gradient descent.",
    )
    parser.add_argument("--version", action="version", version=_version())
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    from .demo import DEMO_STEPS

    demo = sub.add_parser("demo", parents=[common], help="sample the embedded kiln-drying model, write files")
    demo.add_argument("--out", default="demo_output", metavar="DIR", help="output folder (default: ./demo_output)")
    demo.add_argument("--particles", type=_positive_int, default=200, help="particles (default: 200)")
    demo.add_argument("--steps", type=_positive_int, default=DEMO_STEPS, help=f"SVGD steps (default: {DEMO_STEPS})")
    demo.add_argument("--seed", type=_seed, default=0, help="random seed (default: 0)")

    _add_run_parser(sub, common)

    from .benchmarks import SUITES

    bench = sub.add_parser(
        "bench", parents=[common], formatter_class=argparse.RawDescriptionHelpFormatter,
        help="run benchmark suites and print their tables", epilog=_suites_help(SUITES),
    )
    bench.add_argument("suites", nargs="*", metavar="SUITE",
                       help=f"suite names or 'all' (default: core); one of {', '.join(SUITES)}")
    bench.add_argument("--quick", action="store_true", help="small sizes: a check that the suites run (seconds to a minute)")
    return parser


def _add_run_parser(sub, common) -> None:
    from .cli_run import METHODS, available_methods

    methods = available_methods()
    missing = [m for m in METHODS if m not in methods]
    run = sub.add_parser(
        "run", parents=[common], help="sample a stein_torch.Target defined in a Python file",
        description="Sample the stein_torch.Target defined in MODEL.py, print how the run went and the "
                    "ArviZ summary, and write the InferenceData as NetCDF."
                    + (f" Not in this installation: --method {', '.join(missing)}." if missing else ""),
    )
    run.add_argument("model", metavar="MODEL.py", help="Python file that defines a stein_torch.Target")
    run.add_argument("--target", default="target", metavar="NAME", help="variable holding the Target (default: target)")
    run.add_argument("--method", default="svgd", metavar="{" + ",".join(methods) + "}",
                     help="sampler (default: svgd)")
    run.add_argument("--particles", type=_positive_int, metavar="N", help="svgd: particles per ensemble (default: 200)")
    run.add_argument("--ensembles", type=_positive_int, metavar="N",
                     help="independent particle sets (svgd, default 1) or chains (langevin, nuts; default 4)")
    run.add_argument("--steps", type=_positive_int, metavar="N",
                     help=f"svgd: most steps (default: {RUN_STEPS}; the stop rule may end the run earlier)")
    run.add_argument("--no-stop", action="store_true", help="svgd: run every step (no stop rule)")
    run.add_argument("--kernel", metavar="SPEC",
                     help="svgd: kernel, e.g. rbf, imq, matern:1.5, gamma-exp:1, linear:2, weighted-rbf, joined "
                          "by '+' (default: imq+linear:2)")
    run.add_argument("--draws", type=_positive_int, metavar="N", help="langevin, nuts: kept draws per chain (default 1000)")
    run.add_argument("--warmup", type=_positive_int, metavar="N", help="langevin, nuts: warm-up per chain (default: langevin 1000, nuts 500)")
    run.add_argument("--checkpoint", metavar="FILE", help="write the sampler's state to FILE (every 100 steps, at the end, on Ctrl-C)")
    run.add_argument("--resume", metavar="FILE", help="continue the run saved in FILE (same model and options)")
    run.add_argument("--seed", type=_seed, default=0, help="random seed (default: 0)")
    run.add_argument("--out", metavar="FILE.nc", help="NetCDF output (default: MODEL.nc in the current folder)")
    run.add_argument("--ranks", type=_positive_int, default=1, metavar="R",
                     help="svgd: processes sharing the particles, started through torchrun on this machine (default: 1)")


def _suites_help(suites: dict) -> str:
    """The suites and the options each takes, for ``bench --help``."""
    lines = ["suites (options after the suite name go to that suite):"]
    for name, module in suites.items():
        try:
            parser = importlib.import_module(module).build_parser()
        except (ImportError, AttributeError):
            lines.append(f"  {name:<10} (not available in this installation)")
            continue
        lines.append(f"  {name:<10} {parser.description or ''}")
        for action in parser._actions:
            if action.help in (None, argparse.SUPPRESS) or not action.option_strings or "-h" in action.option_strings:
                continue
            flag = action.option_strings[-1]
            meta = "" if action.nargs == 0 else " " + (action.metavar or action.dest.upper()) + (" ..." if action.nargs == "*" else "")
            lines.append(f"      {flag + meta:<22} {action.help}")
    lines.append("examples: stein-torch bench all --quick;  stein-torch bench accuracy --names arK-arK --seeds 6")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``stein-torch``; returns the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    import torch

    threads = torch.get_num_threads()  # restored on return: main() may run inside a larger program
    try:
        parser = _build_parser()
        args, extra = parser.parse_known_args(argv)
        if extra and args.command != "bench":  # suite options (e.g. --names, --seeds) go through to the suite
            parser.error(f"unrecognized arguments: {' '.join(extra)}")
        args.suite_options, args.argv = extra, argv
        debug = getattr(args, "debug", False)
        _quiet_libraries()
        command = {"demo": _demo, "run": _run, "bench": _bench}[args.command]
        return command(args)
    except UsageError as exc:
        return _fail(exc, 2, debug, prefix="error")
    except SystemExit as exc:  # --help and friends
        return exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 2)
    except KeyboardInterrupt as exc:
        return _fail(exc, 130, debug, prefix="interrupted")
    except BrokenPipeError:  # the reader went away (e.g. `| head`): stop quietly, as shell tools do
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except Exception as exc:  # noqa: BLE001 - one line per failure is the contract of the CLI
        return _fail(exc, 1, debug, prefix=type(exc).__name__)
    finally:
        torch.set_num_threads(threads)


def _fail(exc: BaseException, code: int, debug: bool, prefix: str) -> int:
    if debug:
        traceback.print_exception(exc)
    text = " ".join(str(exc).split()) or type(exc).__name__
    print(f"{PROG}: {prefix}: {text}", file=sys.stderr)
    return code


def _quiet_libraries() -> None:
    warnings.filterwarnings("ignore", category=FutureWarning, module="arviz")
    import matplotlib

    matplotlib.use("Agg")  # the CLI only writes image files


def _set_threads(args, default: int | None) -> None:
    import torch

    threads = getattr(args, "threads", default)
    if threads is not None:
        torch.set_num_threads(threads)


# ---------------------------------------------------------------------------------------------- demo
def _demo(args) -> int:
    # 200 particles in 3 dimensions: intra-op threads only add synchronisation, and on a busy
    # machine they can slow small tensor work down many times over
    _set_threads(args, default=1)
    import torch

    from .demo import KILN_DRY_PERCENT, days_to_moisture, run_demo

    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise UsageError(f"--out: expected a folder, got the file {str(out)!r}")
    start = time.perf_counter()
    run = run_demo(out, particles=args.particles, steps=args.steps, seed=args.seed)
    seconds = time.perf_counter() - start
    print(f"Kiln drying of oak boards: {args.particles} particles, {run.settings['steps']} SVGD steps "
          f"(stopped: {run.stop_reason}), {seconds:.1f} s with the NUTS check and the figures\n")
    print(run.summary().to_string())
    draws = run.draws
    corr = torch.corrcoef(torch.stack([draws["initial_moisture"].ravel(), draws["drying_rate"].ravel()]))[0, 1]
    days = days_to_moisture(draws).ravel()
    low, high = torch.quantile(days, torch.tensor([0.05, 0.95], dtype=days.dtype)).tolist()
    print(f"\ncorrelation of initial_moisture and drying_rate: {float(corr):+.2f}")
    print(f"day the boards reach {KILN_DRY_PERCENT:g} % moisture: {float(days.mean()):.1f} (90 % interval {low:.1f} to {high:.1f})")
    worst = max(run.settings["against_nuts"].items(), key=lambda item: item[1][0])
    ratios = [ratio for _, ratio in run.settings["against_nuts"].values()]
    print(f"against NUTS (4 x 1000 draws): means differ by at most {worst[1][0]:.2f} NUTS sd ({worst[0]}), "
          f"sd ratios {min(ratios):.2f} to {max(ratios):.2f}\n")
    print(run.settings["crosscheck"])
    print("(an approximation from invented data: check a sample of boards before shipping on it)\n")
    for name, path in run.settings["files"].items():
        print(f"wrote {path}  ({name})")
    return 0


# ----------------------------------------------------------------------------------------------- run
def _run(args) -> int:
    _set_threads(args, default=None)
    import stein_torch as st

    from .cli_run import METHODS, available_methods, report, sample
    from .io import save_netcdf

    if args.method not in METHODS:
        raise UsageError(f"--method: expected one of {', '.join(available_methods())}, got {args.method!r}")
    if args.method not in available_methods():
        raise UsageError(
            f"--method {args.method}: this installation of stein_torch has no st.{METHODS[args.method][0]} yet; "
            f"choose from {', '.join(available_methods())}"
        )
    model = Path(args.model)
    if not model.is_file():
        raise UsageError(f"MODEL.py: no such file {str(model)!r}")
    if model.suffix != ".py":
        raise UsageError(f"MODEL.py: expected a Python file ending in .py, got {str(model)!r}")
    out = Path(args.out) if args.out else Path(model.stem + ".nc")
    if out.is_dir():
        raise UsageError(f"--out: expected a file name, got the folder {str(out)!r}")
    if not (out.parent if str(out.parent) else Path(".")).is_dir():
        raise UsageError(f"--out: the folder {str(out.parent)!r} does not exist")
    if args.resume is not None and not Path(args.resume).is_file():
        raise UsageError(f"--resume: no such file {args.resume!r}")
    if args.kernel is not None:
        from .cli_run import parse_kernel

        try:
            parse_kernel(args.kernel)
        except ValueError as err:
            raise UsageError(str(err)) from None
    target = _load_target(model, args.target, st.Target)
    from . import launch

    if args.ranks > 1 and "ranks" not in METHODS[args.method][1]:
        raise UsageError(f"--ranks: --method {args.method} runs in one process; --ranks applies to --method svgd")
    if args.ranks > 1 and not launch.inside_workers():  # start the workers, each running this command
        return launch.start_workers(args.ranks, args.argv, getattr(args, "threads", None))
    if launch.inside_workers() and launch.worker_count() != args.ranks:
        raise UsageError(f"--ranks {args.ranks}: torchrun started {launch.worker_count()} workers; give the same number")
    options = {k: getattr(args, k) for k in ("particles", "ensembles", "steps", "no_stop", "kernel", "draws", "warmup",
                                             "checkpoint", "resume", "seed")}
    options["ranks"] = args.ranks if args.ranks > 1 else None
    start = time.perf_counter()
    try:
        run, python_warnings = sample(target, args.method, options, progress=sys.stderr.isatty())
    except ValueError as err:
        if str(err).startswith("--method"):
            raise UsageError(str(err)) from None
        raise
    seconds = time.perf_counter() - start
    if launch.worker_rank() != 0:  # rank 0 prints and writes; the others hold the same particles
        return 0
    chains, draws = run.particles.shape[:2]
    unit = "particles" if run.method == "svgd" else "draws"
    ranks = f" on {args.ranks} ranks" if args.ranks > 1 else ""
    print(f"{model.name}: {run.method}, {chains} x {draws} {unit}, {seconds:.1f} s{ranks}")
    for line in report(run, python_warnings):
        print(line)
    print()
    print(run.summary().to_string())
    save_netcdf(run.to_inference_data(), out)
    print(f"\nwrote {out}")
    return 0


def _load_target(path: Path, name: str, target_type):
    module_name = f"_stein_torch_user_model_{abs(hash(str(path.resolve())))}"
    spec = importlib.util.spec_from_file_location(module_name, path)
    if spec is None or spec.loader is None:
        raise UsageError(f"MODEL.py: cannot load {str(path)!r} as a Python module")
    module = importlib.util.module_from_spec(spec)
    folder = str(path.resolve().parent)
    sys.path.insert(0, folder)  # the model may import helpers that sit next to it
    try:
        spec.loader.exec_module(module)
    except Exception as exc:
        raise RuntimeError(f"{path}: loading the model failed: {type(exc).__name__}: {exc}") from exc
    finally:
        if sys.path and sys.path[0] == folder:
            sys.path.pop(0)
    if not hasattr(module, name):
        found = sorted(k for k, v in vars(module).items() if isinstance(v, target_type))
        hint = f"; it defines Targets named {', '.join(found)} (use --target NAME)" if found else ""
        raise UsageError(f"--target: {str(path)!r} defines no variable {name!r}{hint}")
    target = getattr(module, name)
    if not isinstance(target, target_type):
        raise UsageError(
            f"--target: {name!r} in {str(path)!r} must be a stein_torch.Target, got {type(target).__qualname__}"
        )
    return target


# --------------------------------------------------------------------------------------------- bench
def _bench(args) -> int:
    _set_threads(args, default=None)
    from .benchmarks import SUITES

    allowed = ", ".join([*SUITES, "all"])
    names = args.suites or ["core"]
    for name in names:
        if name != "all" and name not in SUITES:
            raise UsageError(f"bench: unknown suite {name!r}; choose from {allowed}")
    if "all" in names:
        chosen = [name for name, module in SUITES.items() if _module_exists(module)]
    else:
        chosen = list(dict.fromkeys(names))
        missing = [name for name in chosen if not _module_exists(SUITES[name])]
        if missing:
            raise UsageError(f"bench: suite {missing[0]!r} is not available in this installation (module {SUITES[missing[0]]})")
    if args.suite_options and len(chosen) > 1:
        raise UsageError(f"bench: options {' '.join(args.suite_options)} are for one suite; name a single suite")
    suite_args = (["--quick"] if args.quick else []) + list(args.suite_options)
    worst = 0
    for i, name in enumerate(chosen):
        if len(chosen) > 1:
            print(("\n" if i else "") + f"== {name} ==", flush=True)
        code = importlib.import_module(SUITES[name]).main(list(suite_args))
        worst = max(worst, int(code or 0))
    return worst


def _module_exists(module: str) -> bool:
    try:
        return importlib.util.find_spec(module) is not None
    except ModuleNotFoundError:
        return False


if __name__ == "__main__":
    sys.exit(main())


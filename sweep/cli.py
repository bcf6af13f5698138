"""Command line: the only module that parses arguments and prints.

Exit status: 0 done, 2 bad input, 1 anything else.
"""
from __future__ import annotations

import argparse
import os
import sys
import warnings
from typing import Sequence

from . import __version__
from .errors import InputError, SweepError

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors in one line with exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: {message} (see '{self.prog} --help')\n")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every sub-command."""
    parser = _Parser(
        prog="sweep",
        description=(
            "Robustness sweeps of feedback loops whose plant parameters carry tolerances: "
            "critical gains, stable gain intervals, root loci and certified worst cases "
            "over the whole tolerance box."
        ),
        epilog="Exit status: 0 done, 2 bad input (one line naming the file, the field and the fix), "
               "1 anything else. 'python -m sweep' is the same program; 'sweep COMMAND --help' describes each command.",
    )
    parser.add_argument("--version", action="version", version=f"sweep {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("check", help="validate a config and analyse the nominal loop",
                       description="Validate CONFIG, print the parameter table, the nominal open loop and its stability analysis, and estimate the run time. Nothing is written.")
    p.add_argument("config", metavar="CONFIG", help="TOML config file")
    p.add_argument("--json", action="store_true",
                   help="print JSON instead of text (for a bad config: valid false and the error, exit status 2)")

    p = sub.add_parser("run", help="run the sweep and store the results (resumable)",
                       description="Generate the variants of CONFIG, analyse each one in parallel chunks and store the dataset as netCDF. Finished chunks are kept in OUT.parts/ and survive a crash; rerun (or --resume) to finish. A log goes to OUT.log.")
    p.add_argument("config", metavar="CONFIG", help="TOML config file")
    p.add_argument("-o", "--out", metavar="OUT", help="output .nc file (default results/<config stem>.nc)")
    p.add_argument("-j", "--jobs", type=int, metavar="N", help="parallel processes (default: all cores; 1 runs in-process)")
    p.add_argument("--resume", action="store_true", help="continue an interrupted run (a plain rerun does the same)")
    p.add_argument("--scheduler", metavar="ADDR", help="Dask distributed scheduler, e.g. tcp://10.0.0.5:8786")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    p = sub.add_parser("query", help="worst case, robust gain interval, quantiles, sensitivity",
                       description="Summarise a result file: the worst-case critical gain and its variant, the robust gain interval, quantiles and the parameters' influence.")
    p.add_argument("result", metavar="RESULT", help="result .nc file written by 'sweep run'")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")

    p = sub.add_parser("plot", help="draw loci, critical-gain limits, the envelope, distributions or a parameter plane",
                       description="Draw one view of a result file. The format follows the file extension (.png, .svg, .pdf).",
                       epilog="Views: locus - root-locus branches of the kept variants, nominal and worst case bold; "
                              "limits - critical gain against each uncertain parameter; "
                              "envelope - largest real part of the closed-loop roots against gain, min..max over all variants; "
                              "crossings - histograms of the critical gain and the crossing frequency; "
                              "plane - smallest critical gain on a grid of two parameters (needs the grid design; --params A B "
                              "picks them, by default the only two uncertain ones).")
    p.add_argument("result", metavar="RESULT", help="result .nc file written by 'sweep run'")
    p.add_argument("--what", required=True, choices=["locus", "limits", "envelope", "crossings", "plane"],
                   help="which view to draw")
    p.add_argument("-o", "--out", metavar="FILE", help="image file (default: RESULT stem + '-WHAT.png')")
    p.add_argument("--params", nargs=2, metavar=("A", "B"), help="the two parameters of --what plane (default: the only two uncertain parameters)")

    p = sub.add_parser("certify", help="guaranteed bounds on the worst-case critical gain",
                       description="Bound the worst-case critical gain over the whole tolerance box: exactly by Kharitonov's theorem for interval families, else by branch-and-bound with interval arithmetic.")
    p.add_argument("config", metavar="CONFIG", help="TOML config file")
    p.add_argument("--rtol", type=float, default=0.01, metavar="R", help="stop when upper - lower <= R * upper (default 0.01)")
    p.add_argument("--max-seconds", type=float, default=120.0, metavar="T", help="time budget (default 120)")
    p.add_argument("-o", "--out", metavar="RESULT",
                   help="the result file the certificate belongs to; it is saved beside it as <stem>.certificate.json "
                        "(default results/<config stem>.nc) and 'sweep query' shows it")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    p = sub.add_parser("bench", help="measure throughput on this machine and project a night's run",
                       description="Measure variants per second of the analysis and of locus tracing beside a bare eigenvalue pass, and project how many variants fit in 1 and 8 hours.")
    p.add_argument("config", nargs="?", metavar="CONFIG", help="config to measure (default: a built-in degree-6 loop)")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    for p in sub.choices.values():  # accepted after the command too, as the error lines suggest it
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show a full traceback on errors")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``sweep`` command."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return EXIT_BAD_INPUT
    handler = _COMMANDS[args.command]
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            code = handler(args)
        for w in caught:
            if issubclass(w.category, Warning) and w.category.__module__.startswith("sweep"):
                print(f"warning: {w.message}", file=sys.stderr)
        return code
    except InputError as exc:
        if args.debug:
            raise
        print(f"sweep {args.command}: {exc.line()}", file=sys.stderr)
        if args.command == "check" and getattr(args, "json", False):
            # a script reading `check --json` gets the verdict in the same shape as a good config
            from .jsonutil import dumps

            print(dumps({"valid": False, "error": exc.line(), "file": exc.file, "field": exc.field, "message": exc.message}))
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("\ninterrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # the reader of our output stopped early (`... | head`): leave quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_FAILURE
    except SweepError as exc:
        if args.debug:
            raise
        print(f"sweep {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_FAILURE
    except Exception as exc:  # a bug or an environment problem: one line unless --debug
        if args.debug:
            raise
        print(f"sweep {args.command}: error: {type(exc).__name__}: {exc} (run with --debug for a traceback)", file=sys.stderr)
        return EXIT_FAILURE


# ---------------------------------------------------------------------------
# Commands
# ---------------------------------------------------------------------------


_KERNEL_MODULES = ("_analysis_kernel", "rootfind", "_locus_kernel")


def _kernel_cache_is_cold(folder: str, modules: Sequence[str] = _KERNEL_MODULES) -> bool:
    """Whether numba's cache in ``folder`` lacks one of ``modules``' compiled kernels.

    False when ``folder`` is not writable: numba then caches elsewhere and we
    cannot tell.
    """
    try:
        if not os.access(folder, os.W_OK):
            return False
        files = os.listdir(folder)
    except OSError:
        return False
    return not all(any(f.startswith(m + ".") and f.endswith(".nbi") for f in files) for m in modules)


def _say_if_compiling(args: argparse.Namespace) -> None:
    """On the first use after installing, say why the command waits before its first result.

    numba compiles the numeric kernels once and keeps them in
    ``sweep/__pycache__``; until then a command spends its first seconds
    compiling.
    """
    if getattr(args, "quiet", False):
        return
    folder = os.path.join(os.path.dirname(os.path.abspath(__file__)), "__pycache__")
    modules = _KERNEL_MODULES if args.command in ("run", "bench") else _KERNEL_MODULES[:2]
    if _kernel_cache_is_cold(folder, modules):
        print("first use after installing: compiling the numeric kernels once (about 15 s on an idle "
              "2-core machine; later commands load them from the cache)", file=sys.stderr)


def _cmd_check(args: argparse.Namespace) -> int:
    from . import report
    from .config import load_config

    config = load_config(args.config)
    _say_if_compiling(args)
    summary = report.check_summary(config)
    if args.json:
        from .jsonutil import dumps

        print(dumps(summary))
    else:
        print(report.format_check(config, summary))
    return EXIT_OK


def _cmd_run(args: argparse.Namespace) -> int:
    from .config import load_config

    config = load_config(args.config)
    from . import runner

    if args.jobs is not None and args.jobs < 1:
        raise InputError(f"must be at least 1, got {args.jobs}", field="-j")
    _say_if_compiling(args)
    try:
        path = runner.run(config, out=args.out, jobs=args.jobs, resume=args.resume,
                          scheduler=args.scheduler, quiet=args.quiet)
    except runner.Interrupted as exc:
        print(f"\n{exc}", file=sys.stderr)
        return 130
    print(path)
    return EXIT_OK


def _open_result(path: str):
    """Open a result file; a missing or unreadable one is bad input (one line, exit 2)."""
    from . import store

    if not os.path.isfile(path):
        raise InputError("no such result file; run 'sweep run CONFIG -o RESULT' first", file=path)
    try:
        return store.open_result(path)
    except (OSError, ValueError) as exc:
        raise InputError(f"not a readable netCDF result ({exc.__class__.__name__}); give the .nc file "
                         "written by 'sweep run'", file=path) from None


def _cmd_query(args: argparse.Namespace) -> int:
    from . import query

    from . import store

    ds = _open_result(args.result)
    certificate = store.read_certificate(args.result, config_sha256=str(ds.attrs.get("config_sha256", "")))
    try:
        summary = query.summarize(ds, certificate=certificate)
    except InputError as exc:  # name the result file the problem is in
        exc.file = exc.file or args.result
        raise
    if args.json:
        from .jsonutil import dumps

        print(dumps(summary))
    else:
        print(query.format_summary(summary, ds))
    return EXIT_OK


def _cmd_plot(args: argparse.Namespace) -> int:
    from . import plots

    ds = _open_result(args.result)
    out = args.out or f"{os.path.splitext(args.result)[0]}-{args.what}.png"
    ext = os.path.splitext(out)[1].lower()
    if ext not in (".png", ".svg", ".pdf"):
        raise InputError(f"unknown image format '{ext or out}'; use a .png, .svg or .pdf file name", field="-o")
    try:
        path = plots.plot(ds, args.what, out, params=tuple(args.params) if args.params else None)
    except InputError as exc:  # name the result file the problem is in (unless it is the image)
        exc.file = exc.file or args.result
        raise
    print(path)
    return EXIT_OK


def _cmd_certify(args: argparse.Namespace) -> int:
    from . import certify as certify_mod
    from .config import load_config

    config = load_config(args.config)
    if not (0 < args.rtol < 1):
        raise InputError(f"must lie between 0 and 1 (0.01 stops at a 1 % gap), got {args.rtol:g}", field="--rtol")
    if not (args.max_seconds > 0):
        raise InputError(f"must be a positive number of seconds, got {args.max_seconds:g}",
                         field="--max-seconds")
    _say_if_compiling(args)
    bar = None
    progress = None
    if not args.quiet and not args.json:
        from tqdm import tqdm

        bar = tqdm(desc="boxes", unit="box", file=sys.stderr, leave=False)

        def progress(boxes: int, lower: float, upper: float) -> None:
            # update() redraws at most every mininterval (a forced redraw per step filled logs)
            bar.set_postfix_str(f"lower {lower:.6g}  upper {upper:.6g}", refresh=False)
            bar.update(boxes - bar.n)

    try:
        result = certify_mod.certify(config, rtol=args.rtol, max_seconds=args.max_seconds, progress=progress)
    finally:
        if bar is not None:
            bar.close()
    from . import store

    result_path = args.out or os.path.join("results", f"{config.stem}.nc")
    saved = store.write_certificate(result, result_path, config_sha256=config.sha256)
    if args.json:
        from .jsonutil import dumps

        print(dumps(result))
    else:
        print(certify_mod.format_certificate(result))
        print(f"certificate saved to {saved}")
    return EXIT_OK


def _cmd_bench(args: argparse.Namespace) -> int:
    from . import bench

    config = None
    if args.config:
        from .config import load_config

        config = load_config(args.config)
    _say_if_compiling(args)
    result = bench.measure(config)
    if args.json:
        from .jsonutil import dumps

        print(dumps(result))
    else:
        print(bench.format_result(result))
    return EXIT_OK


_COMMANDS = {
    "check": _cmd_check,
    "run": _cmd_run,
    "query": _cmd_query,
    "plot": _cmd_plot,
    "certify": _cmd_certify,
    "bench": _cmd_bench,
}


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

"""Command line: ``eigenstream run | status | export | place | tune | report | demo``.

Parses arguments, sets up logging, calls the pipeline and maps our exceptions to exit codes
and one-line messages on stderr (tracebacks only with ``--debug``). No numerics here.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path

from eigenstream import __version__
from eigenstream.errors import ConfigError, EigenstreamError

EXIT_OK = 0
EXIT_INTERNAL = 70
EXIT_INTERRUPTED = 130

log = logging.getLogger("eigenstream")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, not usage + error
        raise ConfigError(f"{message} (see `{self.prog} --help`)")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="eigenstream", description=__doc__.splitlines()[0])
    parser.add_argument("--version", action="version", version=f"eigenstream {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress bars or notes")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("run", help="run every stage of a configuration")
    p.add_argument("config", help="TOML configuration file")
    p.add_argument("--set", dest="overrides", action="append", default=[],
                   metavar="SECTION.KEY=VALUE", help="override one config value (repeatable)")
    p.add_argument("--fresh", action="store_true",
                   help="discard earlier work in the work directory (says what) and start again")
    p.add_argument("--verify", action="store_true",
                   help="read back every finished block of an unfinished stage before reusing it")

    p = sub.add_parser("status", help="show what a work directory holds")
    p.add_argument("workdir")
    p.add_argument("--json", action="store_true", help="print one JSON object")

    p = sub.add_parser("export", help="write the map coordinates to a file")
    p.add_argument("workdir")
    p.add_argument("--output", required=True, help="file to write")
    p.add_argument("--format", choices=("npy", "parquet", "csv"), default=None,
                   help="file format (default: from the output suffix)")

    p = sub.add_parser("place", help="put new rows on an existing map")
    p.add_argument("workdir")
    p.add_argument("--input", required=True, help="file or store with the new rows")
    p.add_argument("--output", required=True, help="file to write the coordinates to")
    p.add_argument("--format", choices=("npy", "parquet", "csv"), default=None,
                   help="output format (default: from the output suffix)")

    p = sub.add_parser("tune", help="recommend bandwidth and neighbours from a sample")
    p.add_argument("config", help="TOML configuration file")
    p.add_argument("--sample", type=int, default=20_000, help="rows to sample (default 20000)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--set", dest="overrides", action="append", default=[],
                   metavar="SECTION.KEY=VALUE", help="override one config value (repeatable)")

    p = sub.add_parser("report", help="write the self-contained HTML report of a run")
    p.add_argument("workdir")
    p.add_argument("--output", default=None, help="file to write (default WORKDIR/report.html)")

    p = sub.add_parser("demo", help="generate the demo data set and map it")
    p.add_argument("--rows", type=int, default=None, help="rows to generate (default 30000)")
    p.add_argument("--workdir", default="demo-work", help="folder for data and results")
    return parser


def _setup_logging(quiet: bool) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("eigenstream: %(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(logging.WARNING if quiet else logging.INFO)
    log.propagate = False


def _cmd_run(args) -> int:
    from eigenstream.api import run

    result = run(args.config, overrides=args.overrides, progress=not args.quiet, fresh=args.fresh,
                 verify=args.verify)
    _print_outputs(result.workdir)
    return EXIT_OK


def _print_outputs(workdir: Path) -> None:
    print(f"report:      {workdir / 'report.html'}")
    print(f"map:         {workdir / 'map.png'}")
    print(f"eigenvalues: {workdir / 'spectrum.png'}")
    print(f"manifest:    {workdir / 'manifest.json'}")
    print(f"export with: eigenstream export {workdir} --output coordinates.parquet")


def _cmd_status(args) -> int:
    from eigenstream.pipeline import status

    info = status(args.workdir)
    if args.json:
        print(json.dumps(info, indent=2, default=str))
        return EXIT_OK
    print(f"work directory: {info['workdir']}")
    print(f"state:          {info['state']}{' (complete)' if info['complete'] else ''}")
    if info.get("error"):
        print(f"error:          {info['error']}")
    fresh = info.get("up_to_date") or {}
    for name, state in info["stages"].items():
        seconds = info["timings"].get(name)
        extra = f"  {seconds:.1f} s" if isinstance(seconds, int | float) else ""
        if name == "neighbors" and "compile_seconds" in info.get("neighbors", {}):
            extra += "  (compile {compile_seconds:.1f} s, search {search_seconds:.1f} s)".format(
                **info["neighbors"])
        if name in info.get("blocks", {}):
            b = info["blocks"][name]
            extra += f"  ({b['done']} of {b['total'] if b['total'] is not None else '?'} blocks)"
        if state != "pending" and fresh and not fresh.get(name, True):
            extra += "  (settings or input changed since: will be recomputed)"
        print(f"  {name:<10} {state}{extra}")
    if info["eigenvalues"]:
        pairs = ", ".join(f"{v:.6f} (r={r:.1e})" for v, r in zip(info["eigenvalues"], info["residuals"], strict=True))
        print(f"rows: {info['rows']}  eigenvalues: {pairs}")
    return EXIT_OK


def _cmd_export(args) -> int:
    from eigenstream.api import open_result
    from eigenstream.io.export import export_coordinates

    result = open_result(args.workdir)
    id_name = result.manifest.get("config", {}).get("input", {}).get("id_column", "id")
    path = export_coordinates(result.coordinates, args.output, fmt=args.format, ids=result.ids,
                              id_name=id_name)
    print(f"wrote {result.coordinates.shape[0]} rows to {path}")
    return EXIT_OK


def _cmd_place(args) -> int:
    from eigenstream.place import place_rows

    path = place_rows(args.workdir, args.input, args.output, fmt=args.format)
    print(f"placed rows written to {path}")
    return EXIT_OK


def _cmd_tune(args) -> int:
    from eigenstream.config import load_config
    from eigenstream.tune import run_tune

    if args.sample < 40:
        raise ConfigError(f"`--sample` must be at least 40; got {args.sample}.")
    config = load_config(args.config, args.overrides)
    result = run_tune(config, sample=args.sample)
    _refresh_report(Path(config.run.workdir))
    if args.json:
        keys = ("intrinsic_dimension", "bandwidth_range", "bandwidth_best", "recommended",
                "reasons", "dimension_per_k", "slope_dimension", "sample_rows", "input_rows")
        print(json.dumps({k: result[k] for k in keys}, indent=2, default=str))
        return EXIT_OK
    print(f"sample: {result['sample_rows']} of {result['input_rows']} rows")
    print(f"intrinsic dimension (Levina-Bickel): {result['intrinsic_dimension']:.2f}")
    low, high = result["bandwidth_range"]
    print(f"usable global bandwidth sigma: {low:.4g} .. {high:.4g} "
          f"(best {result['bandwidth_best']:.4g}, on the sample)")
    print("recommended settings:\n")
    print(result["toml"])
    return EXIT_OK


def _refresh_report(workdir: Path) -> None:
    """Rewrite the report of a finished run so it includes the newest tune results."""
    from eigenstream.pipeline import status
    from eigenstream.stages.report import write_run_report

    try:
        complete = status(workdir)["complete"]
    except EigenstreamError:
        return
    if complete:
        log.info("report updated: %s", write_run_report(workdir))


def _cmd_report(args) -> int:
    from eigenstream.stages.report import write_run_report

    path = write_run_report(Path(args.workdir), Path(args.output) if args.output else None)
    print(f"report: {path}")
    return EXIT_OK


def _cmd_demo(args) -> int:
    from eigenstream.demo import run_demo

    workdir = run_demo(Path(args.workdir), rows=args.rows, progress=not args.quiet)
    _print_outputs(workdir)
    return EXIT_OK


COMMANDS = {
    "run": _cmd_run,
    "status": _cmd_status,
    "export": _cmd_export,
    "place": _cmd_place,
    "tune": _cmd_tune,
    "report": _cmd_report,
    "demo": _cmd_demo,
}


def main(argv: list[str] | None = None) -> int:
    """Run the command line and return the process exit code."""
    argv = sys.argv[1:] if argv is None else argv
    debug = "--debug" in argv
    try:
        args = build_parser().parse_args(argv)
        _setup_logging(args.quiet)
        return COMMANDS[args.command](args)
    except EigenstreamError as exc:
        if debug:
            raise
        print(f"eigenstream: error: {_one_line(exc)}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("eigenstream: interrupted; run the same command again to continue.", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:  # an internal fault, not a user error
        if debug:
            raise
        print(
            f"eigenstream: internal error: {type(exc).__name__}: {_one_line(exc)} "
            "(rerun with --debug for the traceback and report it)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())

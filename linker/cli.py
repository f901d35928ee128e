"""Command line: parses options, calls the library, prints one line per problem.

Exit codes: 0 success; 2 bad config or usage; 3 unreadable input; 1 unexpected failure.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from pathlib import Path

from . import __version__
from .config import load_config
from .errors import LinkerError
from .pipeline import _quiet, run_pipeline, stderr_progress, write_outputs

DESCRIPTION = """\
linker links person-records across agency spreadsheet productions: it reads every
sheet of every file in a delivery folder, keeps the exact file, sheet and row of each
record, and accounts for every input row.  Links it proposes are leads for qualified
staff to verify, never determinations.  The data is sensitive personal information."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="linker", description=DESCRIPTION,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"linker {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    run = sub.add_parser("run", help="read a delivery and write the record tables",
                         description="Read every file of the delivery the config names, "
                         "normalize its person-records and write records.csv, ledger.csv, "
                         "claims.csv, files.csv, columns.csv and run.json into --out.")
    run.add_argument("config", metavar="CONFIG", help="path of the TOML config file")
    run.add_argument("--out", required=True, metavar="DIR", help="folder for the outputs")
    run.add_argument("--skip-unreadable", action="store_true",
                     help="list corrupt or protected files in the ledger and go on, "
                     "instead of stopping")
    run.add_argument("--quiet", action="store_true", help="no progress lines on stderr")

    check = sub.add_parser("check-config", help="validate a config without running",
                           description="Load and validate a config; report the first problem "
                           "with its file and key.")
    check.add_argument("config", metavar="CONFIG")
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    try:
        return _dispatch(args)
    except LinkerError as err:
        print(f"linker: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print("linker: interrupted; no outputs were replaced", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug, not bad input: say so without echoing data values
        if os.environ.get("LINKER_DEBUG"):
            raise
        tb = traceback.extract_tb(exc.__traceback__)[-1]
        print(f"linker: internal error {type(exc).__name__} at {Path(tb.filename).name}:{tb.lineno}; "
              "set LINKER_DEBUG=1 to see details", file=sys.stderr)
        return 1


def _dispatch(args) -> int:
    if args.command == "check-config":
        cfg = load_config(args.config)
        print(f"config OK: {cfg.source} ({len(cfg.slots)} person slots, {len(cfg.sheets)} sheet rules)")
        return 0
    if args.command == "run":
        cfg = load_config(args.config)
        progress = _quiet if args.quiet else stderr_progress
        result = run_pipeline(cfg, progress=progress,
                              skip_unreadable=True if args.skip_unreadable else None)
        written = write_outputs(result, args.out)
        for w in result.warnings:
            print(f"linker: warning: {w}", file=sys.stderr)
        c = result.info["counts"]
        print(f"{c['files']} files, {c['input_rows']} rows, {c['records']} person-records, "
              f"{c['relation_claims']} relation claims -> {args.out} ({len(written)} files)")
        return 0
    raise AssertionError(args.command)


if __name__ == "__main__":
    sys.exit(main())

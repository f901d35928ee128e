"""Command line: parses options, calls the library, prints one line per problem.

Exit codes: 0 success; 2 bad config or usage; 3 unreadable input; 1 unexpected failure.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import sys
import traceback
from pathlib import Path

from . import __version__
from .config import load_config
from .errors import InputError, LinkerError
from .evaluate import evaluate_entities, read_truth
from .link import explain_pair, link_records
from .pipeline import (_quiet, import_decisions, read_model, read_records, rebuild_report, remember_run,
                       run_pipeline,
                       stderr_progress, store_inputs, write_outputs)
from .review import read_review
from .store import open_store

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
    run.add_argument("--group-readable", action="store_true",
                     help="let the owner's group read the outputs (default: owner only, since they hold "
                     "sensitive personal data)")
    run.add_argument("--truth", metavar="FILE",
                     help="a record -> person_id table (by record_id, or by source_file, sheet, row, "
                     "slot); adds pair completeness per rule to blocking.csv and writes evaluation.csv")

    run.add_argument("--store", metavar="FILE",
                     help="the project store (SQLite) keeping reviewer decisions and entity IDs across "
                     "runs; default: [store] path of the config; without either, nothing is remembered")
    run.add_argument("--engine", choices=("local", "spark"), default="local",
                     help="where the linkage stage runs: local (default) or spark (Apache Spark, same "
                     "results; needs `pip install linker[spark]` and Java)")
    run.add_argument("--spark-master", metavar="URL",
                     help="Spark master for --engine spark, e.g. local[4] or spark://host:7077 "
                     "(default: [spark] master of the config, else local[2])")

    review = sub.add_parser("review", help="bring reviewer decisions into the project store",
                            description="Commands on the review workbook (review.xlsx) a run writes.")
    review_sub = review.add_subparsers(dest="review_command", metavar="ACTION")
    imp = review_sub.add_parser("import", help="store the decisions of a filled review workbook",
                                description="Read the decisions of a filled review.xlsx and store them "
                                "(with reviewer, time and note) in the project store, all or nothing. "
                                "The next run honours them: same person joins the two records, "
                                "different people keeps them apart.")
    imp.add_argument("workbook", metavar="WORKBOOK", help="the filled review.xlsx")
    imp.add_argument("--config", required=True, metavar="CONFIG", help="the project's TOML config")
    imp.add_argument("--reviewer", required=True, metavar="NAME", help="who made the decisions")
    imp.add_argument("--store", metavar="FILE", help="the project store (default: [store] path of the config)")
    imp.add_argument("--decided-at", metavar="TIME",
                     help="when the decisions were made (ISO date or time; default: now)")

    rep = sub.add_parser("report", help="rebuild report.html and report.xlsx from a finished run",
                         description="Rebuild the descriptive report (report.html, self-contained with "
                         "embedded charts, and report.xlsx) from the tables of a finished run in DIR, "
                         "without relinking.")
    rep.add_argument("out", metavar="DIR", help="folder of the run")
    rep.add_argument("--config", metavar="CONFIG", help="config whose [report] settings to use (age bands)")

    explain = sub.add_parser("explain", help="show why two records got their match weight",
                             description="Print, for two records of an earlier run, each field's "
                             "values, comparison level, m, u and weight.  The weights, with the "
                             "prior and any guard, sum to the pair's match weight.")
    explain.add_argument("record_a", metavar="RECORD_A", help="record_id of the first record")
    explain.add_argument("record_b", metavar="RECORD_B", help="record_id of the second record")
    explain.add_argument("--out", default="out", metavar="DIR",
                         help="folder of the run (records.csv and model.json; default: out)")

    evaluate = sub.add_parser("evaluate", help="score a run's entities against known truth",
                              description="Pairwise and B-cubed precision, recall and F1 of the "
                              "entity_id in DIR/records.csv against a truth table.")
    evaluate.add_argument("--truth", required=True, metavar="FILE",
                          help="CSV with person_id and either record_id or source_file, sheet, row, slot")
    evaluate.add_argument("--out", default="out", metavar="DIR",
                          help="folder of the run (default: out)")

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
        truth = read_truth(args.truth) if args.truth else None
        store_path = args.store or cfg.store
        store = open_store(store_path) if store_path else None
        try:
            decisions, history = store_inputs(store) if store else (None, None)
            with _linkage_engine(args, cfg, progress) as link:
                result = run_pipeline(cfg, progress=progress,
                                      skip_unreadable=True if args.skip_unreadable else None, truth=truth,
                                      decisions=decisions, history=history, link=link)
            written = write_outputs(result, args.out, mode=0o640 if args.group_readable else 0o600)
            if store:
                remember_run(store, result)
        finally:
            if store:
                store.close()
        for w in result.warnings:
            print(f"linker: warning: {w}", file=sys.stderr)
        c = result.info["counts"]
        print(f"{c['files']} files, {c['input_rows']} rows, {c['records']} person-records, "
              f"{c['relation_claims']} relation claims -> {args.out} ({len(written)} files)")
        if "evaluation.csv" in result.extra:
            _print_scores(result.extra["evaluation.csv"])
        return 0
    if args.command == "explain":
        return _explain(args)
    if args.command == "report":
        written = rebuild_report(args.out, load_config(args.config) if args.config else None)
        print(f"report rebuilt: {', '.join(p.name for p in written)} in {args.out}")
        return 0
    if args.command == "review":
        if args.review_command != "import":
            raise UsageError("review: say what to do, e.g. `linker review import WORKBOOK --config CONFIG`")
        return _review_import(args)
    if args.command == "evaluate":
        records = read_records(args.out)
        truth = read_truth(args.truth)
        try:
            scores = evaluate_entities(records, truth)
        except ValueError as err:
            raise InputError(args.truth, str(err)) from None
        _print_scores(scores)
        return 0
    raise AssertionError(args.command)


class UsageError(LinkerError):
    """A command line that names no action."""


@contextlib.contextmanager
def _linkage_engine(args, cfg, progress):
    """The linkage stage of this run on the engine ``--engine`` names (handed to ``run_pipeline(link=...)``).

    ``local``: :func:`linker.link.link_records`.  ``spark``: pyspark is checked
    first (a clear error naming ``pip install linker[spark]`` when it is
    missing), a session is started (master from ``--spark-master``, else
    ``[spark] master``, else local[2]; ``[spark] conf`` settings) and stopped
    afterwards if this run started it.
    """
    if args.engine != "spark":
        if args.spark_master:
            raise UsageError("--spark-master applies to --engine spark only")
        yield link_records
        return
    from .spark import link_stage, require_spark, spark_session

    require_spark()
    from pyspark.sql import SparkSession

    master = args.spark_master or cfg.spark.get("master") or "local[2]"
    running = SparkSession.getActiveSession()
    progress(f"starting Spark ({master})")
    spark = spark_session(master, cfg.spark.get("conf") or None)
    try:
        yield link_stage(spark)
    finally:
        if running is None:
            spark.stop()


def _review_import(args) -> int:
    cfg = load_config(args.config)
    store_path = args.store or cfg.store
    if not store_path:
        raise UsageError(f"{args.config}: no [store] path in the config and no --store given: "
                         "decisions need a project store")
    lines = read_review(args.workbook)
    with open_store(store_path) as store:
        count, skipped = import_decisions(store, lines, args.workbook, args.reviewer, args.decided_at)
    already = len(lines) - skipped - count
    print(f"{count} new decisions stored from {Path(args.workbook).name}; {already} were already stored, "
          f"{skipped} pre-filled earlier decisions left as they were")
    return 0


def _explain(args) -> int:
    records = read_records(args.out)
    model = read_model(args.out)
    try:
        table = explain_pair(records, model, args.record_a, args.record_b)
    except KeyError as err:
        raise InputError(Path(args.out) / "records.csv", err.args[0]) from None
    total = float(table["weight"].sum())
    probability = 1.0 / (1.0 + 2.0 ** -total)
    shown = table.copy()
    for col in ("m", "u", "weight"):
        shown[col] = shown[col].map(lambda v: "" if v != v else f"{v:.4f}" if col != "weight" else f"{v:+.2f}")
    cols = [c for c in ("field", "value_a", "value_b", "level", "m", "u", "weight") if c in shown.columns]
    print(f"{args.record_a} vs {args.record_b}")
    print(shown[cols].to_string(index=False))
    print(f"match weight {total:+.2f} (log2), match probability {probability:.4f}")
    print("A link is a lead for qualified staff to verify, never a determination.")
    return 0


def _print_scores(scores) -> None:
    for _, r in scores.iterrows():
        print(f"{r['measure']:>8}: precision {r['precision']:.4f}  recall {r['recall']:.4f}  f1 {r['f1']:.4f}")
    first = scores.iloc[0]
    print(f"{first['records_scored']} records scored, {first['records_without_truth']} without truth, "
          f"{first['truth_rows_unmatched']} truth rows matched no record")


if __name__ == "__main__":
    sys.exit(main())

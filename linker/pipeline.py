"""The whole job as library calls returning DataFrames; the CLI only wires these.

>>> from linker import load_config, run_pipeline          # doctest: +SKIP
>>> result = run_pipeline(load_config("configs/sample.toml"))
>>> result.records.head()                                  # doctest: +SKIP
"""

from __future__ import annotations

import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import pandas as pd

from . import __version__
from .config import LinkConfig
from .errors import InputError
from .ingest import ingest_file
from .io import file_facts, list_delivery, read_file, write_csv, write_json
from .evaluate import evaluate_entities, truth_labels
from .model import FellegiSunter
from .checks import rule_table, run_checks
from .queries import query_sheets, write_queries
from .review import review_pairs, write_review
from .corrections import apply_corrections, read_corrections
from .report import report_tables, write_report_html, write_report_xlsx
from .roster import read_roster_sheet, reconcile_roster
from .counts import count_table, write_counts
from .fingerprint import record_fingerprints
from .store import Store, assign_entity_ids, changes_table, open_store, snapshot_of
from .relations import family_claims, family_values, relations_table
from .link import labelled_fit, unattached_decisions
from .link import LinkResult, blocking_report, entities_table, entity_ids, link_records, pairs_table
from .records import normalize_records
from .schema import CLAIM_COLUMNS, FILE_COLUMNS, LEDGER_COLUMNS, OUTCOME_FILE_SKIPPED

Progress = Callable[[str], None]


def stderr_progress(message: str) -> None:
    """Progress lines for long work (counts and file names only, no personal data)."""
    print(f"linker: {message}", file=sys.stderr, flush=True)


def _quiet(message: str) -> None:
    pass


@dataclass
class RunResult:
    """Everything one run produced, as DataFrames plus the run summary."""

    records: pd.DataFrame
    ledger: pd.DataFrame
    claims: pd.DataFrame
    files: pd.DataFrame
    columns: pd.DataFrame
    info: dict
    warnings: list[str] = field(default_factory=list)
    extra: dict = field(default_factory=dict)   # frames added by later stages (pairs, entities...)
    model: object = None                         # the fitted FellegiSunter model
    queries: dict = field(default_factory=dict)  # the agency query workbook: {sheet title: frame}
    review: pd.DataFrame | None = None           # the pairs of the review workbook (review_pairs)
    report: dict = field(default_factory=dict)   # the descriptive report's tables (report_tables)
    counts: tuple | None = None                  # (reported vs computed, entities behind each count)


def ingest_delivery(cfg: LinkConfig, progress: Progress = _quiet, skip_unreadable: bool | None = None):
    """Read and classify every file of the delivery.

    Returns raw records, ledger, claims, files and column-mapping frames, and warnings.
    A file that cannot be read raises :class:`InputError` unless ``skip_unreadable``
    (default from the config), in which case it gets a ledger line and the run goes on.
    """
    skip = cfg.skip_unreadable if skip_unreadable is None else skip_unreadable
    paths = list_delivery(cfg.folder, cfg.patterns, cfg.exclude)
    if not paths:
        raise InputError(cfg.folder, "no files in the delivery folder match "
                                     f"{', '.join(cfg.patterns)}")
    raws, ledgers, claims, columns, files, warnings = [], [], [], [], [], []
    for k, path in enumerate(paths, 1):
        facts = file_facts(path, cfg.folder)
        progress(f"reading file {k}/{len(paths)}: {facts['source_file']}")
        try:
            data = read_file(path, cfg.folder)
        except InputError as err:
            if not skip:
                raise
            files.append({**facts, "sheets": 0, "encoding": "", "status": f"skipped: {err.problem}"})
            ledgers.append(pd.DataFrame([(facts["source_file"], "", "", OUTCOME_FILE_SKIPPED,
                                          err.problem, 0)], columns=list(LEDGER_COLUMNS)))
            warnings.append(str(err))
            continue
        for res in ingest_file(cfg, data):
            raws.append(res.records)
            ledgers.append(res.ledger)
            claims.append(res.claims)
            columns.append(res.columns)
            warnings.extend(res.warnings)
        files.append({**facts, "sheets": len(data.sheets), "encoding": data.encoding,
                      "status": "read"})
    raw = pd.concat(raws, ignore_index=True) if raws else pd.DataFrame()
    return (raw, pd.concat(ledgers, ignore_index=True), pd.concat(claims, ignore_index=True)
            if claims else pd.DataFrame(), pd.DataFrame(files, columns=list(FILE_COLUMNS)),
            pd.concat(columns, ignore_index=True) if columns else pd.DataFrame(), warnings)


def run_pipeline(cfg: LinkConfig, progress: Progress = _quiet,
                 skip_unreadable: bool | None = None, truth: pd.DataFrame | None = None,
                 decisions: pd.DataFrame | None = None, history: dict | None = None,
                 link: Callable[..., LinkResult] = link_records) -> RunResult:
    """Run every stage on the delivery the config names and return the frames.

    ``link`` is the linkage stage, called as ``link(records, settings,
    progress, decisions=...)`` and returning a :class:`~linker.link.LinkResult`:
    :func:`linker.link.link_records` (the local engine) by default, or the
    Spark engine's (:func:`linker.spark.link_stage`); every other stage runs here.

    ``decisions`` (reviewer decisions by fingerprint: pair_id, fp_a, fp_b,
    decision, ...) overrule the model; ``history`` ({"previous": the last run's
    Snapshot or None, "next_number": the next unused entity number}) keeps entity
    IDs stable across runs and yields ``changes.csv``.  Both come from the project
    store (:func:`store_inputs`) when one is configured.

    With ``truth`` (person_id by record_id or by provenance, see
    :func:`linker.evaluate.truth_labels`) the blocking report gains pair
    completeness per rule and ``evaluation.csv`` holds pairwise and B-cubed scores.
    """
    timings = {}
    started = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    t0 = time.perf_counter()
    raw, ledger, claims, files, columns, warnings = ingest_delivery(cfg, progress, skip_unreadable)
    timings["ingest_s"] = round(time.perf_counter() - t0, 3)
    n_rows = int(pd.to_numeric(ledger["row"], errors="coerce").notna().sum())
    progress(f"read {len(files)} files, {n_rows} rows, {len(raw)} person-records")
    t1 = time.perf_counter()
    records = normalize_records(raw, cfg)
    fix = None
    if cfg.corrections is not None:
        fix = apply_corrections(raw, read_corrections(cfg.corrections), cfg, records=records)
        records = fix.records
        warnings = list(warnings) + list(fix.warnings)
    timings["normalize_s"] = round(time.perf_counter() - t1, 3)
    progress("normalized person-records")
    ledger = ledger.reset_index(drop=True)
    records = records.reset_index(drop=True)
    t2 = time.perf_counter()
    linked = link(records, cfg.linkage, progress, decisions=decisions)
    if history is None:
        records.insert(1, "entity_id", entity_ids(linked.labels))
    else:
        prev = history.get("previous")
        records.insert(1, "entity_id", assign_entity_ids(
            linked.labels, record_fingerprints(records), None if prev is None else prev.records,
            history.get("next_number")).to_numpy())
    fitted = hasattr(linked.model, "m_")
    pairs = pairs_table(records, linked) if fitted else pd.DataFrame()
    entities = entities_table(records)
    timings["link_s"] = round(time.perf_counter() - t2, 3)
    progress(f"linked: {linked.info['entities']} entities, {linked.info['pairs_for_review']} pairs for review")
    warnings = list(warnings) + [f"model: {w}" for w in getattr(linked.model, "warnings_", [])]
    claims = all_claims(cfg, records, claims)
    relations = relations_table(records, claims)
    t3 = time.perf_counter()
    findings = run_checks(records, claims, relations, cfg.checks)
    timings["checks_s"] = round(time.perf_counter() - t3, 3)
    progress(f"checked: {len(findings)} finding lines")
    extra = {"pairs.csv": pairs, "entities.csv": entities, "relations.csv": relations,
             "findings.csv": findings, "blocking.csv": linked.blocking}
    if cfg.roster is not None and fitted:
        roster = read_roster_sheet(cfg)
        extra["roster.csv"] = reconcile_roster(records, roster.entries, cfg.linkage, model=linked.model)
        extra["roster_ledger.csv"] = roster.ledger.reindex(columns=list(LEDGER_COLUMNS))  # every roster row
    report = report_tables(records, ledger, entities, relations, findings, cfg)
    counts = None
    if cfg.reported_totals:
        counts = count_table(records, pd.DataFrame(list(cfg.reported_totals)),
                             tuple(cfg.raw.get("report", {}).get("age_edges", (5, 10, 14, 18))))
    if fix is not None:
        extra["corrections_applied.csv"] = fix.applied
        extra["corrections_unapplied.csv"] = fix.unapplied
    if history is not None:
        extra["changes.csv"] = changes_table(history.get("previous"), snapshot_of(records, relations, findings))
    if decisions is not None:
        extra["decisions_unattached.csv"] = unattached_decisions(records, decisions)
        extra["fit_check.csv"] = labelled_fit(linked)
    queries = query_sheets(findings, records, rule_table(), group_by=cfg.queries_by)
    review = review_pairs(records, pairs, findings, decisions) if fitted else None
    if truth is not None:
        labels, _ = truth_labels(records, truth)
        # records the truth does not cover count as singletons for pair completeness
        own = pd.Series("\x00" + records["record_id"].astype(str), index=records.index)
        extra["blocking.csv"] = blocking_report(linked, labels.fillna(own).to_numpy())
        extra["evaluation.csv"] = evaluate_entities(records, truth)
    info = {
        "linker_version": __version__,
        "config": Path(cfg.source).name,
        "config_sha256": cfg.config_hash,
        "inputs": files[["source_file", "sha256", "size_bytes"]].to_dict(orient="records"),
        "counts": {
            "files": int(len(files)),
            "files_skipped": int((files["status"] != "read").sum()),
            "input_rows": int(pd.to_numeric(ledger["row"], errors="coerce").notna().sum()),
            "records": int(len(records)),
            "relation_claims": int(len(claims)),
            "relations": int(len(relations)),
            "findings": {k: int(v) for k, v in findings["rule"].value_counts().sort_index().items()},
            "ledger_outcomes": {k: int(v) for k, v in
                                ledger["outcome"].value_counts().sort_index().items()},
        },
        "timings": timings,
    }
    info["started"] = started
    info["linkage"] = linked.info
    return RunResult(records, ledger, claims, files, columns, info, warnings,
                     extra=extra, queries=queries, review=review, report=report, counts=counts,
                     model=linked.model if fitted else None)


def store_inputs(store: Store) -> tuple[pd.DataFrame, dict]:
    """The reviewer decisions and the run history a new run takes from the project store."""
    return store.decisions(), {"previous": store.last_run(), "next_number": store.next_entity_number()}


def remember_run(store: Store, result: RunResult) -> int:
    """Record a finished run in the store (one transaction): its records with entity IDs,
    relations and findings, so the next run keeps the IDs and reports what changed."""
    info = {"started": result.info.get("started"), "config_sha256": result.info["config_sha256"],
            "inputs": result.info["inputs"]}
    return store.record_run(info, result.records, result.extra.get("relations.csv"),
                            result.extra.get("findings.csv"))


def import_decisions(store: Store, lines: pd.DataFrame, workbook, reviewer: str,
                     decided_at: str | None = None) -> tuple[int, int]:
    """Store the decisions read from a review workbook (:func:`linker.review.read_review`).

    Each line's records are found by record id among the store's last run, which
    gives their fingerprints (what the decision is keyed on) and the values the
    reviewer saw.  Lines left as pre-filled are not stored again.  All or
    nothing: any problem raises and stores no decision.  Returns (stored, skipped).
    """
    name = Path(workbook).name
    todo = lines[~lines["prefilled"]] if "prefilled" in lines.columns else lines
    skipped = int(len(lines) - len(todo))
    if todo.empty:
        return 0, skipped
    prev = store.last_run()
    if prev is None:
        raise InputError(workbook, "the project store holds no run yet; decisions need the run that "
                                   "wrote the workbook")
    snap = prev.records.drop_duplicates("record_id").set_index("record_id")
    problems = []
    for line in todo.itertuples(index=False):
        for rid in (line.record_a, line.record_b):
            if rid not in snap.index:
                problems.append(f"row {line.row}: record {rid} is not in the store's last run "
                                "(the workbook is from another run; write a new one with `linker run`)")
    if problems:
        raise InputError(workbook, "; ".join(problems[:5]) + (f" (and {len(problems) - 5} more)"
                                                              if len(problems) > 5 else ""))
    a = snap.loc[todo["record_a"].to_numpy()]
    b = snap.loc[todo["record_b"].to_numpy()]
    frame = pd.DataFrame({
        "fp_a": a["fingerprint"].to_numpy(), "fp_b": b["fingerprint"].to_numpy(),
        "pair_id": todo["pair_id"].to_numpy(), "decision": todo["decision"].to_numpy(),
        "decided_at": decided_at or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "reviewer": reviewer, "note": todo["note"].to_numpy(), "source": name,
        "values_a": a["values"].to_numpy() if "values" in a.columns else None,
        "values_b": b["values"].to_numpy() if "values" in b.columns else None,
        "line": todo["row"].to_numpy(),
    })
    return store.add_decisions(frame), skipped


def all_claims(cfg: LinkConfig, records: pd.DataFrame, row_claims: pd.DataFrame) -> pd.DataFrame:
    """Row claims plus the family-column claims of sheets whose rule names a ``family_column``."""
    sheets = records[["source_file", "sheet"]].astype(str).drop_duplicates()
    columns = {}
    for source_file, sheet in sheets.itertuples(index=False):
        col = cfg.settings_for(source_file, sheet).family_column
        if col:
            columns[(source_file, sheet)] = col
    parts = [row_claims.reindex(columns=list(CLAIM_COLUMNS))]
    if columns:
        family = family_values(records, columns)
        for child, parent in cfg.relations:
            parts.append(family_claims(records, family, (child,), (parent,)))
    out = pd.concat(parts, ignore_index=True)
    return out.drop_duplicates(["child_record_id", "parent_record_id"]).reset_index(drop=True)


def write_outputs(result: RunResult, out_dir: str | Path, mode: int = 0o600) -> list[Path]:
    """Write the run's tables into ``out_dir`` (each file atomically, readable by its owner only;
    ``mode`` relaxes that, e.g. 0o640 for the owner's group)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    tables = {"records.csv": result.records, "ledger.csv": result.ledger,
              "claims.csv": result.claims, "files.csv": result.files,
              "columns.csv": result.columns, **result.extra}
    for name, frame in tables.items():
        write_csv(frame, out / name)
        written.append(out / name)
    if result.queries:
        write_queries(result.queries, out / "queries.xlsx")
        written.append(out / "queries.xlsx")
    if result.review is not None:
        write_review(result.review, result.records, out / "review.xlsx")
        written.append(out / "review.xlsx")
    if result.report:
        written += write_report(result.report, out)
    if result.counts is not None:
        written.append(write_counts(*result.counts, out / "counts.xlsx"))
    info = dict(result.info)
    info["finished"] = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    info["warnings"] = result.warnings
    if result.model is not None:
        tmp = out / "model.json.tmp"
        result.model.to_json(tmp)
        os.chmod(tmp, 0o600)                     # like the other outputs: owner only
        tmp.replace(out / "model.json")
        written.append(out / "model.json")
    write_json(info, out / "run.json")
    written.append(out / "run.json")
    for path in written:
        os.chmod(path, mode)
    return written


def write_report(tables: dict, out_dir: str | Path) -> list[Path]:
    """report.html (self-contained, charts embedded) and report.xlsx (the same tables)."""
    out = Path(out_dir)
    return [write_report_html(tables, out / "report.html"), write_report_xlsx(tables, out / "report.xlsx")]


def rebuild_report(out_dir: str | Path, cfg=None) -> list[Path]:
    """Rebuild the report of a finished run from its tables, without relinking."""
    out = Path(out_dir)
    tables = {}
    for name in ("records", "ledger", "entities", "relations", "findings"):
        path = out / f"{name}.csv"
        if not path.is_file():
            raise InputError(path, f"no {name}.csv here; run `linker run CONFIG --out DIR` first")
        try:
            tables[name] = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8")
        except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as err:
            raise InputError(path, f"cannot read the table ({type(err).__name__})") from None
    report = report_tables(tables["records"], tables["ledger"], tables["entities"], tables["relations"],
                           tables["findings"], cfg)
    return write_report(report, out)


def read_records(out_dir: str | Path) -> pd.DataFrame:
    """The records.csv of an earlier run, every column as text; errors name the file."""
    path = Path(out_dir) / "records.csv"
    if not path.is_file():
        raise InputError(path, "no records.csv here; run `linker run CONFIG --out DIR` first")
    try:
        return pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8")
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as err:
        raise InputError(path, f"cannot read the records table ({type(err).__name__})") from None


def read_model(out_dir: str | Path):
    """The fitted model an earlier run saved as model.json; errors name the file."""
    path = Path(out_dir) / "model.json"
    if not path.is_file():
        raise InputError(path, "no model.json here (the run had too few records to fit a model, "
                               "or has not been made)")
    try:
        return FellegiSunter.from_json(path)
    except (OSError, ValueError, KeyError, TypeError) as err:
        raise InputError(path, f"cannot read the saved model ({type(err).__name__})") from None

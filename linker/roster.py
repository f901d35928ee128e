"""The roster stage: the official class list, read and set beside the entities.

The roster (config section ``[roster]``) is read with openpyxl, its header row
found from the configured header names, and its rows lifted into raw records
of slot ``roster`` in the layout ingest gives, so :func:`linker.records.normalize_records`
normalizes registration numbers, names, dates and sex exactly as it does for
the agency records.

:func:`reconcile_roster` links roster entries to the entities like another
source but keeps them apart: the roster entries never join or split an
entity.  Candidate pairs come from the person blocking rules over the records
and roster entries together; only roster-record pairs are kept, compared and
scored with the run's fitted model (or a model fitted here when none is
given).  A roster entry and an entity are linked when the probability of
their best record pair is at least ``link_at`` and the entity is the entry's
best-scoring entity, or the entry is the entity's best-scoring roster entry
(so an entity split in two still finds its entry, and two entries of one
merged entity both find it).  An entity left unlinked whose best roster entry
scores from ``review_at`` up to ``link_at`` is "possibly on the list": a
reviewer decides (on the demo these are fragments of a listed person that
carry a name only); such an entry is not reported "in no agency file".

Class membership rule: every person slot can be a class member.  The demo
class list names children, parents and guardians alike (sample/truth/roster.csv
against persons.csv), so by default no slot is left out; ``member_slots``
narrows it.

The lines are leads for qualified staff to verify, never determinations.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .blocking import BlockRule, OversizedBlockWarning, block
from .config import LinkConfig
from .errors import ConfigError, InputError
from .ingest import HEADER_SCAN_ROWS, IDENTITY_FIELDS, cell_text, stable_id
from .link import LinkageSettings, person_fields, person_rules
from .model import DEFAULT_PERSON_GUARDS, FellegiSunter
from .normalize import fold_header
from .records import normalize_records
from .schema import CANONICAL_FIELDS, OUTCOME_HEADER, OUTCOME_RECORD, OUTCOME_SKIPPED, PERSON_FIELDS

__all__ = ["ROSTER_SLOT", "STATUS_LISTED", "STATUS_MISSING", "STATUS_ROSTER_ONLY", "STATUS_REVIEW",
           "ROSTER_COLUMNS",
           "RosterRead", "read_roster", "read_roster_sheet", "roster_raw_records", "roster_rules", "roster_pairs",
           "reconcile_roster", "source_name"]

ROSTER_SLOT = "roster"
STATUS_LISTED = "on the list"
STATUS_MISSING = "missing from the list"
STATUS_ROSTER_ONLY = "on the list but in no agency file"
STATUS_REVIEW = "possibly on the list"
_EVENT_DATES = ("intake_date", "placement_date", "release_date")

# roster.csv, one line per entity or roster entry (a link of two entries to one entity gives two lines)
ROSTER_COLUMNS = (
    "entity_id", "roster_row", "roster_status", "probability", "nearest_entity_id", "nearest_roster_row",
    "rank", "in_class_period", "sources", "files", "source_files", "first_event", "last_event",
    "first_intake", "roster_reg_no", "roster_family_name", "roster_given_name", "roster_birth_date",
    "first_source_file", "first_sheet", "first_row", "first_slot",
)


@dataclass
class RosterRead:
    """The roster as read: its normalized entries (one per person row) and a ledger line per sheet row."""

    entries: pd.DataFrame
    ledger: pd.DataFrame


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------
def _open_sheet(path: Path, name: str, sheet: str | None) -> tuple[str, list[list]]:
    """Rows (row 1 first) of the roster sheet; errors name the file and sheet."""
    import openpyxl

    if not path.is_file():
        raise InputError(name, "roster file does not exist")
    try:
        book = openpyxl.load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:  # openpyxl raises several types for damaged or foreign files
        raise InputError(name, f"roster workbook cannot be read ({type(exc).__name__}); "
                               "save it as an unprotected .xlsx") from None
    try:
        if sheet is None:
            ws = book.worksheets[0]
        elif sheet in book.sheetnames:
            ws = book[sheet]
        else:
            raise InputError(name, f"no such sheet (the workbook has: {', '.join(book.sheetnames)})",
                             sheet=sheet)
        rows = [list(r) for r in ws.iter_rows(values_only=True)]
        return ws.title, rows
    finally:
        book.close()


def _find_header(texts: list[list[str]], vocab: dict[str, str], need: int) -> int | None:
    """0-based index of the row (among the first HEADER_SCAN_ROWS) naming most configured fields."""
    best, best_n = None, 0
    for i, row in enumerate(texts[:HEADER_SCAN_ROWS]):
        n = len({vocab[fold_header(t)] for t in row if t and fold_header(t) in vocab})
        if n > best_n:
            best, best_n = i, n
    return best if best_n >= need else None


def source_name(cfg: LinkConfig) -> str:
    """How roster lines name the roster file: its file name (no machine path)."""
    return Path(cfg.roster.file).name


def roster_raw_records(cfg: LinkConfig, sheet: str, rows: list[list]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Raw records (ingest layout, slot ``roster``) and ledger of one roster sheet's rows."""
    name = source_name(cfg)
    vocab = {h: fld for fld, heads in cfg.roster.columns.items() for h in heads}
    width = max((len(r) for r in rows), default=0)
    texts = [[cell_text(v) for v in r] + [""] * (width - len(r)) for r in rows]
    need = min(len(set(vocab.values())), max(1, cfg.min_header_matches))
    h = _find_header(texts, vocab, need)
    if h is None:
        raise InputError(name, f"no header row found: no row among the first {HEADER_SCAN_ROWS} names "
                               f"{need} or more of the configured roster columns "
                               f"({', '.join(sorted(cfg.roster.columns))})", sheet=sheet)
    mapping: dict[int, str] = {}
    for c, t in enumerate(texts[h]):
        fld = vocab.get(fold_header(t)) if t else None
        if fld is not None and fld not in mapping.values():
            mapping[c] = fld
    ledger = [(name, sheet, i + 1, OUTCOME_SKIPPED, "above the header row (title or notes)" if any(texts[i])
               else "blank row", 0) for i in range(h)]
    ledger.append((name, sheet, h + 1, OUTCOME_HEADER, "header row", 0))
    out = []
    for i in range(h + 1, len(rows)):
        t, rownum = texts[i], i + 1
        if not any(t):
            ledger.append((name, sheet, rownum, OUTCOME_SKIPPED, "blank row", 0))
            continue
        if not any(t[c] for c, fld in mapping.items() if fld in IDENTITY_FIELDS):
            ledger.append((name, sheet, rownum, OUTCOME_SKIPPED, "no person data in the roster columns", 0))
            continue
        rec = {"record_id": stable_id(name, sheet, rownum, ROSTER_SLOT), "row_key": stable_id(name, sheet, rownum, prefix="W"),
               "source_file": name, "sheet": sheet, "row": rownum, "slot": ROSTER_SLOT, "extras": ""}
        for c, fld in mapping.items():
            rec[fld + "_obj"] = rows[i][c] if c < len(rows[i]) else None
        out.append(rec)
        ledger.append((name, sheet, rownum, OUTCOME_RECORD, "roster entry", 1))
    obj_cols = [f + "_obj" for f in CANONICAL_FIELDS]
    raw = pd.DataFrame(out, columns=["record_id", "row_key", "source_file", "sheet", "row", "slot", "extras",
                                     *obj_cols])
    raw["date_order"] = cfg.date_order
    raw["full_name_order"] = cfg.full_name_order
    raw["sex_codes"] = json.dumps(cfg.sex_codes, sort_keys=True)
    led = pd.DataFrame(ledger, columns=["source_file", "sheet", "row", "outcome", "reason", "records"])
    return raw, led


def read_roster_sheet(cfg: LinkConfig) -> RosterRead:
    """Read and normalize the roster named by ``cfg.roster``; entries carry ``roster_row`` (1-based)."""
    if cfg.roster is None:
        raise ConfigError(cfg.source, "[roster]", "no roster configured")
    unknown = sorted(set(cfg.roster.columns) - set(PERSON_FIELDS))
    if unknown:
        raise ConfigError(cfg.source, "[roster] columns", f"not person fields: {', '.join(unknown)}")
    sheet, rows = _open_sheet(Path(cfg.roster.file), source_name(cfg), cfg.roster.sheet)
    raw, ledger = roster_raw_records(cfg, sheet, rows)
    entries = normalize_records(raw, cfg)
    entries.insert(0, "roster_row", entries["row"].astype(np.int64))
    return RosterRead(entries.reset_index(drop=True), ledger)


def read_roster(cfg: LinkConfig) -> pd.DataFrame:
    """The roster's normalized entries: the record columns plus ``roster_row``; see :func:`read_roster_sheet`."""
    return read_roster_sheet(cfg).entries


# ---------------------------------------------------------------------------
# Linking
# ---------------------------------------------------------------------------
def roster_rules(settings: LinkageSettings) -> tuple[BlockRule, ...]:
    """The person blocking rules plus the order-free name key: a roster entry meets every record of
    its name, even where the sorted window is crowded by many records of one person."""
    return (*person_rules(settings), BlockRule("name_key", "exact", ("name_key",), cap=settings.block_cap))


def roster_pairs(records: pd.DataFrame, roster: pd.DataFrame, settings: LinkageSettings,
                 model: FellegiSunter | None = None) -> pd.DataFrame:
    """Scored roster-record candidate pairs: ``record`` (position in records), ``entry`` (position in
    roster), ``weight``, ``probability``.  Uses ``model`` when it is fitted, else fits one here."""
    cols = ["record", "entry", "weight", "probability"]
    n = len(records)
    both = pd.concat([records.drop(columns=["entity_id", "roster_row"], errors="ignore"),
                      roster.drop(columns=["roster_row"], errors="ignore")], ignore_index=True)
    with warnings.catch_warnings():      # caps are reported by the linkage stage already
        warnings.simplefilter("ignore", OversizedBlockWarning)
        pairs, _ = block(both, roster_rules(settings))
    cross = (pairs["left"].to_numpy() < n) & (pairs["right"].to_numpy() >= n)
    pairs = pairs[cross].reset_index(drop=True)
    if pairs.empty:
        return pd.DataFrame({c: pd.Series(dtype=np.int64 if c in ("record", "entry") else float) for c in cols})
    from .compare import compare
    if model is None or not hasattr(model, "m_"):
        model = FellegiSunter(person_fields(settings), seed=settings.seed, u_sample=settings.random_pairs,
                              classes=settings.latent_classes, max_iter=settings.max_iter,
                              guards=DEFAULT_PERSON_GUARDS if settings.guards else ())
        model.fit(both, pairs, compare(both, pairs, model.fields))
    scores = model.score(both, pairs, compare(both, pairs, model.fields))
    return pd.DataFrame({"record": scores["left"].to_numpy(np.int64),
                         "entry": scores["right"].to_numpy(np.int64) - n,
                         "weight": scores["weight"].to_numpy(float),
                         "probability": scores["probability"].to_numpy(float)})


def _best(frame: pd.DataFrame, by: str, other: str) -> pd.DataFrame:
    """Per value of ``by``: the line of highest probability (ties: higher weight, then smaller ``other``)."""
    s = frame.sort_values([by, "probability", "weight", other], ascending=[True, False, False, True],
                          kind="mergesort")
    return s.drop_duplicates(by)


def _links(scored: pd.DataFrame, link_at: float) -> pd.DataFrame:
    """Entity-entry links: the pair is at least link_at and one is the other's best counterpart."""
    ok = scored[scored["probability"] >= link_at]
    a = _best(ok, "entry", "entity_id")
    b = _best(ok, "entity_id", "entry")
    return pd.concat([a, b]).drop_duplicates(["entity_id", "entry"])


def _evidence(records: pd.DataFrame, period: tuple) -> pd.DataFrame:
    """Per entity: sources (agencies: top folder or file), files, event span, first intake, class period."""
    rec = records.reset_index(drop=True)
    src = rec["source_file"].astype(str)
    agency = np.where(src.str.contains("/"), src.str.split("/").str[0], src)
    g = pd.DataFrame({"entity_id": rec["entity_id"].to_numpy(), "agency": agency, "file": src.to_numpy()})
    out = g.groupby("entity_id", sort=True).agg(sources=("agency", "nunique"), files=("file", "nunique"),
                                                 source_files=("file", lambda x: "|".join(sorted(set(x)))))
    ev = pd.concat([rec[["entity_id", c]].rename(columns={c: "d"}) for c in _EVENT_DATES])
    ev = ev[ev["d"].astype(str) != ""]
    ev = ev[ev["d"].notna()]
    out["first_event"] = ev.groupby("entity_id")["d"].min()
    out["last_event"] = ev.groupby("entity_id")["d"].max()
    intake = rec[["entity_id", "intake_date"]]
    intake = intake[intake["intake_date"].notna() & (intake["intake_date"].astype(str) != "")]
    out["first_intake"] = intake.groupby("entity_id")["intake_date"].min()
    lo, hi = period
    if lo is None and hi is None:
        out["in_class_period"] = True
    else:
        d = intake["intake_date"].astype(str)
        inside = np.ones(len(d), dtype=bool)
        if lo is not None:
            inside &= (d >= lo.isoformat()).to_numpy()
        if hi is not None:
            inside &= (d <= hi.isoformat()).to_numpy()
        hit = set(intake["entity_id"].to_numpy()[inside])
        out["in_class_period"] = out.index.isin(hit)
    out = out.fillna({"first_event": "", "last_event": "", "first_intake": ""})
    first = rec.drop_duplicates("entity_id").set_index("entity_id")[["source_file", "sheet", "row", "slot"]]
    out = out.join(first.add_prefix("first_"))
    slots = rec.groupby("entity_id")["slot"].agg(lambda x: frozenset(x))
    out["slots"] = slots
    return out.reset_index()


def reconcile_roster(records: pd.DataFrame, roster: pd.DataFrame, settings: LinkageSettings = LinkageSettings(),
                     model: FellegiSunter | None = None, *, class_period: tuple = (None, None),
                     member_slots: tuple[str, ...] | None = None) -> pd.DataFrame:
    """roster.csv: each entity and each roster entry, on the list or not.

    Parameters
    ----------
    records : DataFrame
        The run's records with ``entity_id``.
    roster : DataFrame
        :func:`read_roster` entries (with ``roster_row``).
    settings : LinkageSettings
        ``link_at`` decides a link; the blocking and comparison settings as in the run.
    model : FellegiSunter, optional
        The run's fitted model (``RunResult.model``); without it one is fitted on the roster pairs.
    class_period : (date or None, date or None)
        Entities missing from the list are evidence of class membership when an intake date
        (separation) falls in this closed period; default: every entity counts.
    member_slots : tuple of str, optional
        Slots whose persons can be class members (default: every slot).  Entities with none of
        them are never reported missing.

    Returns
    -------
    DataFrame with :data:`ROSTER_COLUMNS`.  ``probability`` is that of the link, or for a
    missing entity / roster-only entry that of its nearest counterpart (named in
    ``nearest_roster_row`` / ``nearest_entity_id``; 0 and blank when none was a candidate).
    Missing entities are ranked (``rank`` 1 = strongest evidence): in the class period first,
    then more independent sources, then earlier first intake.
    """
    rec = records.reset_index(drop=True)
    ros = roster.reset_index(drop=True)
    scored = roster_pairs(rec, ros, settings, model)
    scored["entity_id"] = rec["entity_id"].to_numpy()[scored["record"].to_numpy()]
    scored = (scored.sort_values(["entity_id", "entry", "probability", "weight", "record"],   # best pair
                                 ascending=[True, True, False, False, True], kind="mergesort")  # per
              .drop_duplicates(["entity_id", "entry"]))                                           # entity-entry
    links = _links(scored, settings.link_at)
    ev = _evidence(rec, class_period)
    rows_of = ros["roster_row"].to_numpy()

    listed = links[["entity_id", "entry", "probability"]].assign(roster_status=STATUS_LISTED)
    unlinked_e = ev[~ev["entity_id"].isin(links["entity_id"])]
    if member_slots is not None:
        keep = set(member_slots)
        unlinked_e = unlinked_e[unlinked_e["slots"].map(lambda s: bool(s & keep))]
    near_e = _best(scored, "entity_id", "entry")
    near_e = near_e[near_e["entity_id"].isin(unlinked_e["entity_id"])]
    review = near_e[near_e["probability"] >= settings.review_at][["entity_id", "entry", "probability"]]
    review = review.assign(roster_status=STATUS_REVIEW)
    near_e = near_e.set_index("entity_id")
    missing = pd.DataFrame({"entity_id": unlinked_e.loc[~unlinked_e["entity_id"].isin(review["entity_id"]),
                                                        "entity_id"].to_numpy(), "roster_status": STATUS_MISSING})
    missing["probability"] = missing["entity_id"].map(near_e["probability"]).fillna(0.0)
    missing["nearest_roster_row"] = missing["entity_id"].map(near_e["entry"]).map(
        lambda e: int(rows_of[int(e)]) if e == e else pd.NA)
    unlinked_r = np.setdiff1d(np.arange(len(ros)), np.concatenate([links["entry"].to_numpy(np.int64),
                                                                   review["entry"].to_numpy(np.int64)]))
    near_r = _best(scored, "entry", "entity_id").set_index("entry")
    only = pd.DataFrame({"entry": unlinked_r, "roster_status": STATUS_ROSTER_ONLY})
    only["probability"] = only["entry"].map(near_r["probability"]).fillna(0.0)
    only["nearest_entity_id"] = only["entry"].map(near_r["entity_id"]).fillna("")

    out = pd.concat([listed, review, missing, only], ignore_index=True)
    out["roster_row"] = pd.array([int(rows_of[int(e)]) if e == e else pd.NA for e in out["entry"]],
                                 dtype="Int64")
    out["nearest_roster_row"] = pd.array(out.get("nearest_roster_row", pd.NA), dtype="Int64")
    out["nearest_entity_id"] = out["nearest_entity_id"].fillna("")
    out["entity_id"] = out["entity_id"].fillna("")
    out = out.merge(ev.drop(columns=["slots"]), on="entity_id", how="left")
    for c in ("sources", "files"):
        out[c] = out[c].fillna(0).astype(np.int64)
    for c in ("source_files", "first_event", "last_event", "first_intake", "first_source_file", "first_sheet",
              "first_slot"):
        out[c] = out[c].fillna("")
    out["first_row"] = pd.array(out["first_row"], dtype="Int64")
    out["in_class_period"] = out["in_class_period"].astype("boolean")
    for fld in ("reg_no", "family_name", "given_name", "birth_date"):
        vals = ros[fld].to_numpy(dtype=object)
        out["roster_" + fld] = [vals[int(e)] if e == e else "" for e in out["entry"]]
    out["probability"] = out["probability"].astype(float).round(6)
    out["rank"] = pd.array([pd.NA] * len(out), dtype="Int64")
    m = out["roster_status"] == STATUS_MISSING
    order = out[m].assign(_far=out["first_intake"].eq(""), _icp=~out["in_class_period"].fillna(False).astype(bool)).sort_values(
        ["_icp", "sources", "files", "_far", "first_intake", "entity_id"],
        ascending=[True, False, False, True, True, True], kind="mergesort").index
    out.loc[order, "rank"] = np.arange(1, len(order) + 1)
    key = {STATUS_LISTED: 0, STATUS_REVIEW: 1, STATUS_MISSING: 2, STATUS_ROSTER_ONLY: 3}
    out = out.assign(_s=out["roster_status"].map(key), _r=out["rank"].fillna(0),
                     _row=out["roster_row"].fillna(0)).sort_values(
        ["_s", "_r", "_row", "entity_id"], kind="mergesort")
    return out[list(ROSTER_COLUMNS)].reset_index(drop=True)

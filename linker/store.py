"""The project store: reviewer decisions and entity IDs kept from one run to the next.

The store is one SQLite file.  It keeps

* every reviewer decision ever imported (``same``, ``different``, ``unsure``),
  keyed on the sorted pair of record fingerprints, never changed or deleted:
  a newer decision on the same pair is a new row and the latest one counts;
* a snapshot of every run: each record's fingerprint, provenance and entity
  ID, the relations between entities and the findings, so the next run can
  keep the entity IDs and report what changed;
* the largest entity number ever issued, so a retired ID is never reused.

Every write is one transaction: a run that fails or is killed half-way
leaves the store as it was.

The pure pandas functions (:func:`check_decisions`, :func:`latest_decisions`,
:func:`snapshot_of`, :func:`assign_entity_ids`, :func:`changes_table`) hold
the logic; :class:`Store` only moves frames in and out of SQLite.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import sqlite3
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Mapping

import numpy as np
import pandas as pd

from .errors import LinkerError
from .fingerprint import FINGERPRINT_FIELDS, pair_keys, record_fingerprints
from .io import text_column

__all__ = [
    "SCHEMA_VERSION", "DECISIONS", "DECISION_LABELS", "CHANGE_KINDS", "CHANGE_COLUMNS",
    "StoreError", "StoreVersionError", "DecisionError",
    "Snapshot", "Store", "open_store",
    "check_decisions", "latest_decisions", "record_values", "inputs_digest", "snapshot_of",
    "assign_entity_ids", "entity_number", "changes_table",
]

SCHEMA_VERSION = 1

DECISIONS = ("same", "different", "unsure")
# workbook dropdown label -> decision
DECISION_LABELS = {"same person": "same", "different people": "different", "not sure": "unsure"}

DECISION_COLUMNS = ("pair_id", "fp_a", "fp_b", "decision", "reviewer", "decided_at", "note", "source")
HISTORY_COLUMNS = ("decision_no", *DECISION_COLUMNS, "values_a", "values_b", "imported_at")
RUN_COLUMNS = ("run_id", "started", "config_sha256", "inputs_sha256", "records")
SNAPSHOT_RECORDS = ("fingerprint", "record_id", "entity_id", "source_file", "sheet", "row", "slot", "values")
SNAPSHOT_RELATIONS = ("child_entity_id", "parent_entity_id")
SNAPSHOT_FINDINGS = ("rule", "fingerprint", "record_id", "entity_id", "source_file", "sheet", "row", "slot",
                     "detail")

CHANGE_KINDS = ("entity_new", "entity_gone", "entity_merged", "entity_split",
                "record_added", "record_removed", "record_changed",
                "relation_added", "relation_removed", "finding_new", "finding_resolved")
CHANGE_COLUMNS = ("change", "entity_id", "other_entity_ids", "fingerprint", "source_file", "sheet", "row",
                  "slot", "detail")

_PROVENANCE = ("source_file", "sheet", "row", "slot")


# ---------------------------------------------------------------------------
# Errors
# ---------------------------------------------------------------------------
class StoreError(LinkerError):
    """The store file cannot be opened, read or written.  Names the file."""

    exit_code = 3

    def __init__(self, file, problem: str):
        self.file = str(file)
        self.problem = problem
        super().__init__(f"{self.file}: {problem}")


class StoreVersionError(StoreError):
    """The store was written by a newer linker (its schema version is higher than this one knows)."""


class DecisionError(StoreError):
    """Reviewer decisions that cannot be stored; nothing was written.  ``problems`` lists each one."""

    def __init__(self, file, problems: list[str]):
        self.problems = list(problems)
        shown = "; ".join(self.problems[:10])
        more = f"; and {len(self.problems) - 10} more" if len(self.problems) > 10 else ""
        word = "problem" if len(self.problems) == 1 else "problems"
        super().__init__(file, f"no decisions stored, {len(self.problems)} {word}: {shown}{more}")


# ---------------------------------------------------------------------------
# Small helpers
# ---------------------------------------------------------------------------
_text = text_column                # column as stripped text (linker.io)


def _rows(frame: pd.DataFrame, col: str) -> pd.Series:
    """1-based row numbers as a nullable integer column."""
    if col not in frame.columns:
        return pd.Series(pd.NA, index=frame.index, dtype="Int64")
    return pd.to_numeric(frame[col], errors="coerce").round().astype("Int64")


def _now() -> str:
    return dt.datetime.now(dt.timezone.utc).replace(tzinfo=None).isoformat(timespec="seconds")


def _json_object(value) -> str | None:
    """Canonical JSON text of a mapping (or of JSON text of one); None when it is not one."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "{}"
    if isinstance(value, str):
        if not value.strip():
            return "{}"
        try:
            value = json.loads(value)
        except ValueError:
            return None
    if not isinstance(value, Mapping):
        return None
    return json.dumps({str(k): ("" if v is None else str(v)) for k, v in value.items()},
                      sort_keys=True, ensure_ascii=False)


def _iso_time(value) -> str | None:
    """ISO date/time text in one canonical form ("YYYY-MM-DDTHH:MM:SS"); None when unreadable.

    Times with an offset are turned to UTC; times without one are kept as written.
    """
    if isinstance(value, dt.datetime):
        t = value
    elif isinstance(value, dt.date):
        t = dt.datetime(value.year, value.month, value.day)
    else:
        text = "" if value is None or (isinstance(value, float) and np.isnan(value)) else str(value).strip()
        if not text:
            return None
        try:
            t = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
        except ValueError:
            return None
    if pd.isna(t):
        return None
    if t.tzinfo is not None:
        t = t.astimezone(dt.timezone.utc).replace(tzinfo=None)
    return t.replace(microsecond=0).isoformat(timespec="seconds")


def entity_number(ids) -> pd.Series:
    """The number of each entity ID ("E00042" -> 42); <NA> for text not of that form."""
    s = pd.Series(ids, dtype=object).astype(str)
    return pd.to_numeric(s.str.extract(r"^E(\d+)$", expand=False), errors="coerce").astype("Int64")


def _id_order(ids: pd.Series) -> np.ndarray:
    """Sort key of entity IDs by number (IDs not of the "E<digits>" form last)."""
    return entity_number(ids).astype("Float64").fillna(np.inf).to_numpy(dtype=float)


def _counted(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def _format_ids(numbers: np.ndarray) -> np.ndarray:
    return np.array([f"E{int(n):05d}" for n in numbers], dtype=object)


# ---------------------------------------------------------------------------
# Decisions (pure)
# ---------------------------------------------------------------------------
def check_decisions(frame: pd.DataFrame, file="decisions") -> pd.DataFrame:
    """Validated, normalized decisions ready to store; raises :class:`DecisionError` naming every bad line.

    ``frame`` needs ``fp_a``, ``fp_b``, ``decision`` and ``decided_at``; it may
    have ``pair_id`` (checked against the fingerprints), ``reviewer``, ``note``,
    ``source`` (the workbook file name), ``values_a`` / ``values_b`` (mapping or
    JSON text of the compared values the reviewer saw) and ``line`` (the
    workbook row, used in messages; else the 1-based position in the frame).
    Decisions may be the codes (``same``...) or the workbook labels
    (``same person``...).  The fingerprints are put in sorted order (their
    values along).  Two lines on the same pair with different decisions are
    an error naming both lines.
    """
    missing = [c for c in ("fp_a", "fp_b", "decision", "decided_at") if c not in frame.columns]
    if missing:
        raise DecisionError(file, [f"missing column {c!r}" for c in missing])
    n = len(frame)
    line = _text(frame, "line") if "line" in frame.columns else pd.Series(
        [str(k + 1) for k in range(n)], index=frame.index, dtype=object)
    source = _text(frame, "source")
    where = (source.where(source == "", source + " ") + "line " + line).to_numpy()
    fp_a, fp_b = _text(frame, "fp_a"), _text(frame, "fp_b")
    raw = _text(frame, "decision").str.lower()
    decision = raw.map(lambda d: DECISION_LABELS.get(d, d))
    decided = frame["decided_at"].map(_iso_time)
    values_a = (frame["values_a"] if "values_a" in frame.columns else pd.Series(None, index=frame.index)).map(
        _json_object)
    values_b = (frame["values_b"] if "values_b" in frame.columns else pd.Series(None, index=frame.index)).map(
        _json_object)
    pid = pair_keys(fp_a, fp_b) if n else pd.Series(dtype=object)
    problems: list[tuple[int, str]] = []

    def flag(mask, text):
        for k in np.flatnonzero(np.asarray(mask, dtype=bool)):
            problems.append((k, f"{where[k]}: {text}"))

    flag(fp_a == "", "fp_a is empty")
    flag(fp_b == "", "fp_b is empty")
    bad = ~decision.isin(DECISIONS)
    for k in np.flatnonzero(bad.to_numpy()):
        shown = "unknown decision" if raw.iloc[k] else "no decision"   # cell text not echoed: may be personal
        problems.append((k, f"{where[k]}: {shown} (expected one of: {', '.join(DECISIONS)})"))
    flag(decided.isna(), "decided_at is not an ISO date/time")
    flag(values_a.isna(), "values_a is not a JSON object")
    flag(values_b.isna(), "values_b is not a JSON object")
    if "pair_id" in frame.columns:
        given = _text(frame, "pair_id")
        flag((given != "") & (given != pid) & (fp_a != "") & (fp_b != ""),
             "pair_id does not match fp_a and fp_b")
    ok = (fp_a != "") & (fp_b != "") & ~bad
    conflicts = pd.DataFrame({"pid": pid, "decision": decision, "pos": np.arange(n)})[ok.to_numpy()]
    first = conflicts.drop_duplicates("pid").set_index("pid")
    conflicts = conflicts.join(first, on="pid", rsuffix="_first")
    conflicts = conflicts[conflicts["decision"] != conflicts["decision_first"]]
    for pos, d, pos0, d0 in conflicts[["pos", "decision", "pos_first", "decision_first"]].itertuples(index=False):
        problems.append((pos, f"{where[pos0]} and {where[pos]} give different decisions on the same pair "
                              f"({d0} / {d})"))
    if problems:
        raise DecisionError(file, [text for _, text in sorted(problems, key=lambda p: p[0])])
    swap = (fp_a > fp_b).to_numpy()
    out = pd.DataFrame({
        "pair_id": pid,
        "fp_a": np.where(swap, fp_b, fp_a),
        "fp_b": np.where(swap, fp_a, fp_b),
        "decision": decision,
        "reviewer": _text(frame, "reviewer"),
        "decided_at": decided,
        "note": _text(frame, "note"),
        "source": source,
        "values_a": np.where(swap, values_b, values_a),
        "values_b": np.where(swap, values_a, values_b),
    })
    return out.reset_index(drop=True)


def latest_decisions(history: pd.DataFrame) -> pd.DataFrame:
    """The decision that counts per pair: latest ``decided_at``, then latest stored (``decision_no``).

    Columns :data:`DECISION_COLUMNS`, sorted by ``pair_id``.
    """
    if history.empty:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in DECISION_COLUMNS})
    h = history.sort_values(["pair_id", "decided_at", "decision_no"], kind="mergesort")
    return h.drop_duplicates("pair_id", keep="last")[list(DECISION_COLUMNS)].reset_index(drop=True)


# ---------------------------------------------------------------------------
# Run snapshots (pure)
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Snapshot:
    """What a run looked like: records, relations and findings (columns ``SNAPSHOT_*``).

    ``run`` is the run's line of the runs table (None for a run not stored).
    """

    records: pd.DataFrame
    relations: pd.DataFrame
    findings: pd.DataFrame
    run: pd.DataFrame | None = None


def record_values(records: pd.DataFrame) -> pd.Series:
    """JSON text of each record's compared values (:data:`linker.fingerprint.FINGERPRINT_FIELDS`)."""
    text = pd.Series("{", index=records.index, dtype=object)
    for k, col in enumerate(FINGERPRINT_FIELDS):
        codes, uniques = pd.factorize(_text(records, col))
        encoded = np.array([json.dumps(u, ensure_ascii=False) for u in uniques] or [""], dtype=object)
        text = text + ("" if k == 0 else ", ") + json.dumps(col) + ": " + encoded[codes]
    return (text + "}").rename("values")


def inputs_digest(inputs) -> str:
    """One SHA-256 over the delivery: (source_file, sha256) of each input, sorted by file name."""
    items = sorted((str(d.get("source_file", "")), str(d.get("sha256", ""))) for d in (inputs or ()))
    return hashlib.sha256("".join(f"{f}\t{h}\n" for f, h in items).encode("utf-8")).hexdigest()


def _empty(columns) -> pd.DataFrame:
    out = pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    if "row" in out.columns:
        out["row"] = out["row"].astype("Int64")
    return out


def snapshot_of(records: pd.DataFrame, relations: pd.DataFrame | None = None,
                findings: pd.DataFrame | None = None) -> Snapshot:
    """A run's snapshot from its frames (the pipeline's records, relations.csv and findings.csv).

    ``records`` needs ``record_id``, ``entity_id`` and the provenance; the
    ``fingerprint`` and ``values`` columns are computed when absent.  Findings
    missing ``fingerprint``, ``entity_id`` or provenance get them from the
    records by ``record_id``.
    """
    rec = pd.DataFrame(index=records.index)
    rec["fingerprint"] = (_text(records, "fingerprint") if "fingerprint" in records.columns
                          else record_fingerprints(records).astype(object))
    for c in ("record_id", "entity_id", "source_file", "sheet"):
        rec[c] = _text(records, c)
    rec["row"] = _rows(records, "row")
    rec["slot"] = _text(records, "slot")
    rec["values"] = _text(records, "values") if "values" in records.columns else record_values(records)
    rec = rec[list(SNAPSHOT_RECORDS)].reset_index(drop=True)

    rel = _empty(SNAPSHOT_RELATIONS)
    if relations is not None and not relations.empty:
        rel = pd.DataFrame({c: _text(relations, c) for c in SNAPSHOT_RELATIONS})
        rel = rel.drop_duplicates().sort_values(list(SNAPSHOT_RELATIONS), kind="mergesort")
        rel = rel.reset_index(drop=True)

    fnd = _empty(SNAPSHOT_FINDINGS)
    if findings is not None and not findings.empty:
        fnd = pd.DataFrame(index=findings.index)
        lookup = rec.drop_duplicates("record_id").set_index("record_id")
        ids = _text(findings, "record_id")
        for c in SNAPSHOT_FINDINGS:
            if c == "row":
                own = _rows(findings, c)
                fnd[c] = own if c in findings.columns else lookup[c].reindex(ids).to_numpy()
            elif c in findings.columns or c in ("rule", "record_id", "detail"):
                fnd[c] = _text(findings, c)
            else:
                fnd[c] = lookup[c].reindex(ids).fillna("").to_numpy()
        fnd["row"] = fnd["row"].astype("Int64")
        fnd = fnd[list(SNAPSHOT_FINDINGS)].reset_index(drop=True)
    return Snapshot(rec, rel, fnd)


# ---------------------------------------------------------------------------
# Stable entity IDs (pure)
# ---------------------------------------------------------------------------
def _greedy_pairs(cand: pd.DataFrame) -> pd.DataFrame:
    """Greedy one-to-one matching over candidates already sorted best first.

    Same result as taking the candidates one by one and keeping each whose two
    ends are both still free, done in rounds: a candidate that comes first for
    its cluster and for its earlier ID is one the one-by-one pass would keep.
    """
    taken = []
    while not cand.empty:
        first_c = ~cand["cluster"].duplicated()
        first_p = ~cand["prev_id"].duplicated()
        keep = cand[first_c & first_p]
        taken.append(keep)
        cand = cand[~cand["cluster"].isin(keep["cluster"]) & ~cand["prev_id"].isin(keep["prev_id"])]
    return pd.concat(taken, ignore_index=True) if taken else cand


def assign_entity_ids(labels, fingerprints, previous: pd.DataFrame | None = None,
                      next_number: int | None = None) -> pd.Series:
    """Entity IDs for this run's clusters, keeping the earlier run's IDs where the records are the same.

    ``labels`` is each record's cluster (ints), ``fingerprints`` each record's
    fingerprint, ``previous`` the earlier run's (``fingerprint``, ``entity_id``)
    lines (may be empty or None).  A cluster and an earlier ID overlap by the
    records they share, counted over the fingerprint multisets.  Matching is
    one-to-one and greedy: largest overlap first, then the smaller earlier ID
    number, then the cluster whose first record comes first.  Clusters left
    over get new IDs, in the order of their first record, from ``next_number``
    (at least one past the largest earlier number; the store remembers the
    largest ever issued so retired IDs are not reused).  IDs read "E00001"
    (more digits past 99999).  Returns one ID per record, index of
    ``fingerprints`` when it is a Series.
    """
    lab = np.asarray(labels).astype(np.int64)
    fps = pd.Series(fingerprints, dtype=object).astype(str).to_numpy()
    index = fingerprints.index if isinstance(fingerprints, pd.Series) else pd.RangeIndex(len(lab))
    if len(fps) != len(lab):
        raise ValueError("labels and fingerprints differ in length")
    cur = pd.DataFrame({"cluster": lab, "fingerprint": fps, "pos": np.arange(len(lab))})
    first_pos = cur.groupby("cluster")["pos"].min()
    prev = pd.DataFrame(columns=["fingerprint", "entity_id"]) if previous is None else previous
    prev = pd.DataFrame({"fingerprint": _text(prev, "fingerprint"), "prev_id": _text(prev, "entity_id")})
    prev = prev[prev["prev_id"] != ""]
    prev_numbers = entity_number(prev["prev_id"])
    start = max(int(prev_numbers.max()) + 1 if prev_numbers.notna().any() else 1, int(next_number or 1))

    a = cur.groupby(["cluster", "fingerprint"], sort=False).size().rename("n_cur").reset_index()
    b = prev.groupby(["prev_id", "fingerprint"], sort=False).size().rename("n_prev").reset_index()
    both = a.merge(b, on="fingerprint")
    both["overlap"] = np.minimum(both["n_cur"], both["n_prev"])
    cand = both.groupby(["cluster", "prev_id"], as_index=False, sort=False)["overlap"].sum()
    cand["number"] = _id_order(cand["prev_id"])
    cand["first_pos"] = first_pos.reindex(cand["cluster"]).to_numpy()
    cand = cand.sort_values(["overlap", "number", "prev_id", "first_pos"],
                            ascending=[False, True, True, True], kind="mergesort")
    chosen = _greedy_pairs(cand.reset_index(drop=True)).set_index("cluster")["prev_id"]

    ids = pd.Series(pd.NA, index=first_pos.index, dtype=object)
    ids.loc[chosen.index] = chosen.to_numpy()
    fresh = first_pos[ids.isna()].sort_values(kind="mergesort")
    ids.loc[fresh.index] = _format_ids(start + np.arange(len(fresh)))
    return pd.Series(ids.reindex(lab).to_numpy(), index=index, dtype=object, name="entity_id")


# ---------------------------------------------------------------------------
# Changes between two runs (pure)
# ---------------------------------------------------------------------------
def _pair_up(old: pd.DataFrame, new: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Multiset matching on ``keys``: the k-th old and k-th new line of each key value (provenance order).

    Returns (``i_old``, ``i_new``) positions.
    """
    order = ["source_file", "sheet", "row", "slot", "record_id", "_i"]

    def ranked(frame):
        f = frame.sort_values(order, kind="mergesort", na_position="first")
        return f.assign(_k=f.groupby(keys, sort=False).cumcount())[keys + ["_k", "_i"]]

    m = ranked(old).merge(ranked(new), on=keys + ["_k"], suffixes=("_old", "_new"))
    return m.rename(columns={"_i_old": "i_old", "_i_new": "i_new"})[["i_old", "i_new"]]


def _changed_fields(old_values: pd.Series, new_values: pd.Series) -> list[str]:
    out = []
    for a, b in zip(old_values, new_values):
        try:
            va, vb = json.loads(a or "{}"), json.loads(b or "{}")
        except ValueError:
            va, vb = {}, {}
        names = sorted(k for k in set(va) | set(vb) if va.get(k, "") != vb.get(k, ""))
        out.append("changed: " + ", ".join(names) if names else "compared values changed")
    return out


def _lines(kind: str, frame: pd.DataFrame, **cols) -> pd.DataFrame:
    """Change lines of one kind, one per line of ``frame``.

    Each output column comes from ``cols`` (Series, list or scalar), else from
    ``frame``'s column of that name, else is blank.
    """
    n = len(frame)
    out = {"change": np.full(n, kind, dtype=object)}
    for c in CHANGE_COLUMNS[1:]:
        if c == "row":
            out[c] = _rows(frame, "row").array
            continue
        v = cols[c] if c in cols else (frame[c] if c in frame.columns else "")
        if isinstance(v, pd.Series):
            v = v.to_numpy(dtype=object)
        out[c] = np.full(n, v, dtype=object) if np.isscalar(v) else np.asarray(v, dtype=object)
    return pd.DataFrame(out, columns=list(CHANGE_COLUMNS))


def _record_changes(old: pd.DataFrame, new: pd.DataFrame) -> tuple[list[pd.DataFrame], pd.DataFrame]:
    """Record lines, and the (old entity, new entity) of records present in both runs."""
    same = _pair_up(old, new, ["fingerprint"])
    links = pd.DataFrame({"old": old["entity_id"].to_numpy()[same["i_old"]],
                          "new": new["entity_id"].to_numpy()[same["i_new"]]})
    rest_old = old[~old["_i"].isin(same["i_old"])]
    rest_new = new[~new["_i"].isin(same["i_new"])]
    changed = [_pair_up(rest_old, rest_new, ["entity_id", "slot", "source_file", "sheet", "row"])]
    rest_old = rest_old[~rest_old["_i"].isin(changed[0]["i_old"])]
    rest_new = rest_new[~rest_new["_i"].isin(changed[0]["i_new"])]
    changed.append(_pair_up(rest_old, rest_new, ["entity_id", "slot"]))
    changed = pd.concat(changed, ignore_index=True)
    rest_old = old[~old["_i"].isin(same["i_old"]) & ~old["_i"].isin(changed["i_old"])]
    rest_new = new[~new["_i"].isin(same["i_new"]) & ~new["_i"].isin(changed["i_new"])]

    was = old.iloc[changed["i_old"]].reset_index(drop=True)
    now = new.iloc[changed["i_new"]].reset_index(drop=True)
    detail = pd.Series(_changed_fields(was["values"], now["values"]), dtype=object)
    was_row = was["row"].astype("string").fillna("")
    moved = ((was["source_file"] != now["source_file"]) | (was["sheet"] != now["sheet"])
             | (was_row != now["row"].astype("string").fillna("")))
    where = "; was " + was["source_file"] + ", sheet " + was["sheet"] + ", row " + was_row.astype(object)
    detail = detail.where(~moved, detail + where)
    lines = [
        _lines("record_added", rest_new, detail="not in the earlier run"),
        _lines("record_removed", rest_old, detail="not in this run"),
        _lines("record_changed", now, detail=detail),
    ]
    return lines, links


def _joined(frame: pd.DataFrame, by: str, col: str) -> pd.Series:
    """Per ``by`` value, its distinct ``col`` IDs in number order, "; " joined."""
    f = frame[[by, col]].drop_duplicates()
    f = f.assign(_n=_id_order(f[col])).sort_values([by, "_n", col], kind="mergesort")
    return f.groupby(by, sort=False)[col].agg("; ".join)


def _entity_changes(old: pd.DataFrame, new: pd.DataFrame, links: pd.DataFrame) -> list[pd.DataFrame]:
    links = links[(links["old"] != "") & (links["new"] != "")].drop_duplicates()
    lines, mentioned = [], set()
    for kind, subject, other, word in (("entity_merged", "new", "old", "holds records of {n} earlier entities"),
                                       ("entity_split", "old", "new", "records now lie in {n} entities")):
        n = links.groupby(subject)[other].nunique()
        hit = sorted(n[n >= 2].index)
        sub = links[links[subject].isin(hit)]
        others = _joined(sub[sub[other] != sub[subject]], subject, other)
        frame = pd.DataFrame({"entity_id": hit})
        lines.append(_lines(kind, frame, other_entity_ids=others.reindex(hit).fillna("").to_numpy(),
                            detail=[word.format(n=int(n[h])) for h in hit]))
        mentioned |= set(sub["old"]) | set(sub["new"])
    old_ids = set(old["entity_id"]) - {""}
    new_ids = set(new["entity_id"]) - {""}
    for kind, ids, own, subject, other, word in (
            ("entity_new", new_ids - old_ids - mentioned, new, "new", "old", "{n}"),
            ("entity_gone", old_ids - new_ids - mentioned, old, "old", "new", "had {n}")):
        ids = sorted(ids)
        counts = own["entity_id"].value_counts()
        linked = _joined(links[links[subject].isin(ids)], subject, other)
        frame = pd.DataFrame({"entity_id": ids})
        lines.append(_lines(kind, frame, other_entity_ids=linked.reindex(ids).fillna("").to_numpy(),
                            detail=[word.format(n=_counted(int(counts[i]), "record")) for i in ids]))
    return lines


def _keyed_changes(old: pd.DataFrame, new: pd.DataFrame, keys: list[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Lines of ``new`` not in ``old`` and of ``old`` not in ``new``, multiset-matched on ``keys``."""
    on = keys + ["_k"]

    def ranked(frame):
        f = frame.sort_values(list(frame.columns), kind="mergesort", na_position="first")
        return f.assign(_k=f.groupby(keys, sort=False).cumcount())

    old, new = ranked(old), ranked(new)
    both = old[on].merge(new[on], on=on).assign(_both=True)

    def only(frame):
        m = frame.merge(both, on=on, how="left")
        return m[m["_both"].isna()].drop(columns=["_k", "_both"]).reset_index(drop=True)

    return only(new), only(old)


def _prepared(snap: Snapshot | None) -> Snapshot:
    if snap is None:
        snap = Snapshot(_empty(SNAPSHOT_RECORDS), _empty(SNAPSHOT_RELATIONS), _empty(SNAPSHOT_FINDINGS))
    rec = snap.records.reindex(columns=list(SNAPSHOT_RECORDS))
    rec = pd.DataFrame({c: (_rows(rec, c) if c == "row" else _text(rec, c)) for c in SNAPSHOT_RECORDS})
    rec["_i"] = np.arange(len(rec))
    rel = snap.relations.reindex(columns=list(SNAPSHOT_RELATIONS))
    rel = pd.DataFrame({c: _text(rel, c) for c in SNAPSHOT_RELATIONS})
    fnd = snap.findings.reindex(columns=list(SNAPSHOT_FINDINGS))
    fnd = pd.DataFrame({c: (_rows(fnd, c) if c == "row" else _text(fnd, c)) for c in SNAPSHOT_FINDINGS})
    return Snapshot(rec.reset_index(drop=True), rel, fnd)


def changes_table(prev: Snapshot | None, cur: Snapshot) -> pd.DataFrame:
    """What changed from run ``prev`` to run ``cur``: one line per change, columns :data:`CHANGE_COLUMNS`.

    Records are first matched by fingerprint (a multiset: moved or re-exported
    rows are not changes).  Of the rest, an earlier and a current record of
    the same entity and slot pair up as ``record_changed`` (same file, sheet
    and row first); ``detail`` names the compared fields that differ.  The
    rest are ``record_added`` / ``record_removed``.  A current entity holding
    records of two or more earlier entities is ``entity_merged``; an earlier
    entity whose records lie in two or more current ones is ``entity_split``
    (``other_entity_ids`` lists the other entities, "; " separated).  IDs new
    or gone that no merge or split explains are ``entity_new`` /
    ``entity_gone``.  Relations compare on (child, parent) entity
    (``entity_id`` = child, ``other_entity_ids`` = parent) and findings on
    (rule, fingerprint).  Sorted by kind (order of :data:`CHANGE_KINDS`), then
    entity number, provenance, fingerprint and detail.
    """
    old, new = _prepared(prev), _prepared(cur)
    record_lines, links = _record_changes(old.records, new.records)
    lines = _entity_changes(old.records, new.records, links) + record_lines

    added, removed = _keyed_changes(old.relations, new.relations, list(SNAPSHOT_RELATIONS))
    for kind, frame, word in (("relation_added", added, "relation claimed"),
                              ("relation_removed", removed, "relation no longer claimed")):
        lines.append(_lines(kind, frame, entity_id=frame["child_entity_id"],
                            other_entity_ids=frame["parent_entity_id"],
                            detail=("child " + frame["child_entity_id"] + " of parent "
                                    + frame["parent_entity_id"] + ": " + word)))

    new_f, gone_f = _keyed_changes(old.findings, new.findings, ["rule", "fingerprint"])
    for kind, frame in (("finding_new", new_f), ("finding_resolved", gone_f)):
        lines.append(_lines(kind, frame, detail=frame["rule"] + ": " + frame["detail"]))

    lines = [x for x in lines if len(x)]
    out = pd.concat(lines, ignore_index=True) if lines else _lines("", pd.DataFrame())
    out["_kind"] = out["change"].map({k: n for n, k in enumerate(CHANGE_KINDS)})
    out["_n"] = _id_order(out["entity_id"])
    out = out.sort_values(["_kind", "_n", "entity_id", "source_file", "sheet", "row", "slot", "fingerprint",
                           "other_entity_ids", "detail"], kind="mergesort", na_position="first")
    return out[list(CHANGE_COLUMNS)].reset_index(drop=True)


# ---------------------------------------------------------------------------
# SQLite I/O
# ---------------------------------------------------------------------------
_SCHEMA = """
CREATE TABLE meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE decisions (
    decision_no INTEGER PRIMARY KEY,
    pair_id     TEXT NOT NULL CHECK (pair_id <> ''),
    fp_a        TEXT NOT NULL CHECK (fp_a <> ''),
    fp_b        TEXT NOT NULL CHECK (fp_b <> ''),
    decision    TEXT NOT NULL CHECK (decision IN ('same', 'different', 'unsure')),
    reviewer    TEXT NOT NULL DEFAULT '',
    decided_at  TEXT NOT NULL,
    note        TEXT NOT NULL DEFAULT '',
    source      TEXT NOT NULL DEFAULT '',
    values_a    TEXT NOT NULL DEFAULT '{}',
    values_b    TEXT NOT NULL DEFAULT '{}',
    imported_at TEXT NOT NULL,
    CHECK (fp_a <= fp_b)
);
CREATE INDEX decisions_pair ON decisions (pair_id);
CREATE TRIGGER decisions_kept_update BEFORE UPDATE ON decisions
BEGIN SELECT RAISE(ABORT, 'decisions are never changed: store a newer decision instead'); END;
CREATE TRIGGER decisions_kept_delete BEFORE DELETE ON decisions
BEGIN SELECT RAISE(ABORT, 'decisions are never deleted: store a newer decision instead'); END;
CREATE TABLE runs (
    run_id        INTEGER PRIMARY KEY,
    started       TEXT NOT NULL,
    config_sha256 TEXT NOT NULL DEFAULT '',
    inputs_sha256 TEXT NOT NULL DEFAULT '',
    records       INTEGER NOT NULL
);
CREATE TABLE run_records (
    run_id      INTEGER NOT NULL REFERENCES runs (run_id),
    fingerprint TEXT NOT NULL,
    record_id   TEXT NOT NULL,
    entity_id   TEXT NOT NULL,
    source_file TEXT NOT NULL,
    sheet       TEXT NOT NULL,
    row         INTEGER,
    slot        TEXT NOT NULL,
    "values"    TEXT NOT NULL DEFAULT '{}'
);
CREATE INDEX run_records_run ON run_records (run_id);
CREATE TABLE run_relations (
    run_id           INTEGER NOT NULL REFERENCES runs (run_id),
    child_entity_id  TEXT NOT NULL,
    parent_entity_id TEXT NOT NULL,
    PRIMARY KEY (run_id, child_entity_id, parent_entity_id)
);
CREATE TABLE run_findings (
    run_id      INTEGER NOT NULL REFERENCES runs (run_id),
    rule        TEXT NOT NULL,
    fingerprint TEXT NOT NULL,
    record_id   TEXT NOT NULL,
    entity_id   TEXT NOT NULL,
    source_file TEXT NOT NULL,
    sheet       TEXT NOT NULL,
    row         INTEGER,
    slot        TEXT NOT NULL,
    detail      TEXT NOT NULL DEFAULT ''
);
CREATE INDEX run_findings_run ON run_findings (run_id);
"""

# Migrations: MIGRATIONS[v] upgrades a store from schema version v to v + 1 (inside the open
# transaction).  None yet: version 1 is the first.
MIGRATIONS: dict[int, Callable[[sqlite3.Connection], None]] = {}


def _insert(con: sqlite3.Connection, table: str, frame: pd.DataFrame) -> None:
    """Insert a frame's rows (its columns name the table's columns); NA becomes NULL."""
    if frame.empty:
        return
    cols = list(frame.columns)
    data = [[None if pd.isna(v) else (int(v) if isinstance(v, (np.integer, int)) and not isinstance(v, bool)
                                      else v) for v in frame[c].tolist()] for c in cols]
    names = ", ".join(f'"{c}"' for c in cols)
    marks = ", ".join("?" for _ in cols)
    con.executemany(f"INSERT INTO {table} ({names}) VALUES ({marks})", zip(*data))


class Store:
    """An open project store; use :func:`open_store`.  Usable as a context manager."""

    def __init__(self, path: Path, con: sqlite3.Connection):
        self.path = path
        self._con = con

    # -- plumbing ---------------------------------------------------------
    def close(self) -> None:
        self._con.close()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @contextmanager
    def _transaction(self):
        """One write transaction: everything inside lands, or nothing does."""
        try:
            self._con.execute("BEGIN IMMEDIATE")
        except sqlite3.Error as err:
            raise StoreError(self.path, f"cannot write the store ({err}); is another run using it?") from None
        try:
            yield self._con
        except BaseException as err:
            self._rollback()
            if isinstance(err, sqlite3.Error):
                raise StoreError(self.path, f"store not changed: {err}") from None
            raise
        try:
            self._con.execute("COMMIT")
        except sqlite3.Error as err:
            self._rollback()
            raise StoreError(self.path, f"store not changed: {err}") from None

    def _rollback(self) -> None:
        try:
            self._con.execute("ROLLBACK")
        except sqlite3.Error:    # no transaction left open (SQLite rolled it back itself)
            pass

    def _read(self, sql: str, params=(), columns=None) -> pd.DataFrame:
        try:
            cur = self._con.execute(sql, params)
            rows = cur.fetchall()
            names = [d[0] for d in cur.description]
        except sqlite3.Error as err:
            raise StoreError(self.path, f"cannot read the store: {err}") from None
        out = pd.DataFrame(rows, columns=names, dtype=object)
        if columns is not None:
            out = out[list(columns)]
        if "row" in out.columns:
            out["row"] = pd.to_numeric(out["row"], errors="coerce").astype("Int64")
        for c in ("run_id", "records", "decision_no"):
            if c in out.columns:
                out[c] = out[c].astype("int64")
        return out

    def _meta(self, key: str, default: str = "") -> str:
        row = self._con.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return default if row is None else row[0]

    @property
    def schema_version(self) -> int:
        return int(self._meta("schema_version", "0"))

    # -- decisions --------------------------------------------------------
    def add_decisions(self, frame: pd.DataFrame, *, imported_at: str | None = None) -> int:
        """Store reviewer decisions (see :func:`check_decisions`) in one transaction; returns how many.

        Any bad line raises :class:`DecisionError` and nothing is stored.  A line
        identical to one already stored (same pair, decision, reviewer, time,
        note and source) is not stored again, so importing a workbook twice adds nothing.
        """
        rows = check_decisions(frame, self.path)
        rows["imported_at"] = imported_at or _now()
        same = ["pair_id", "decision", "reviewer", "decided_at", "note", "source"]
        rows = rows.drop_duplicates(same)
        with self._transaction() as con:
            stored = pd.DataFrame(con.execute(f"SELECT {', '.join(same)} FROM decisions").fetchall(),
                                  columns=same, dtype=object)
            rows = rows.merge(stored.assign(_old=True), on=same, how="left")
            rows = rows[rows["_old"].isna()].drop(columns="_old")
            _insert(con, "decisions", rows)
        return int(len(rows))

    def decision_history(self) -> pd.DataFrame:
        """Every decision ever stored, oldest first (columns ``HISTORY_COLUMNS``)."""
        return self._read(f"SELECT {', '.join(HISTORY_COLUMNS)} FROM decisions ORDER BY decision_no")

    def decisions(self) -> pd.DataFrame:
        """The decision that counts per pair (:func:`latest_decisions`), sorted by pair_id."""
        return latest_decisions(self.decision_history())

    # -- runs -------------------------------------------------------------
    def next_entity_number(self) -> int:
        """One past the largest entity number ever issued (retired IDs are never reused)."""
        return int(self._meta("entity_max", "0")) + 1

    def record_run(self, info: Mapping, records: pd.DataFrame, relations: pd.DataFrame | None = None,
                   findings: pd.DataFrame | None = None) -> int:
        """Store a run's snapshot (see :func:`snapshot_of`) in one transaction; returns its run_id.

        ``records`` may also be a ready :class:`Snapshot` (``relations`` and
        ``findings`` are then ignored).  Every record needs a record_id and an
        entity_id.  The store's largest issued entity number grows to the
        largest in ``records``.

        ``info`` may give ``started`` (ISO; default now), ``config_sha256`` and
        ``inputs_sha256`` or ``inputs`` (the run info's list of source_file /
        sha256, digested by :func:`inputs_digest`).
        """
        snap = records if isinstance(records, Snapshot) else snapshot_of(records, relations, findings)
        missing = [c for c in ("record_id", "entity_id") if c not in snap.records.columns
                   or (snap.records[c] == "").any()]
        if missing:
            raise StoreError(self.path, f"run not stored: records without {', '.join(missing)}")
        inputs = str(info.get("inputs_sha256") or (inputs_digest(info["inputs"]) if "inputs" in info else ""))
        numbers = entity_number(snap.records["entity_id"])
        top = int(numbers.max()) if numbers.notna().any() else 0
        with self._transaction() as con:
            cur = con.execute("INSERT INTO runs (started, config_sha256, inputs_sha256, records) "
                              "VALUES (?, ?, ?, ?)",
                              (str(info.get("started") or _now()), str(info.get("config_sha256") or ""),
                               inputs, int(len(snap.records))))
            run_id = int(cur.lastrowid)
            _insert(con, "run_records", snap.records.assign(run_id=run_id))
            _insert(con, "run_relations", snap.relations.assign(run_id=run_id))
            _insert(con, "run_findings", snap.findings.assign(run_id=run_id))
            con.execute("UPDATE meta SET value = CAST(MAX(CAST(value AS INTEGER), ?) AS TEXT) "
                        "WHERE key = 'entity_max'", (top,))
        return run_id

    def runs(self) -> pd.DataFrame:
        """One line per stored run, oldest first (columns ``RUN_COLUMNS``)."""
        return self._read(f"SELECT {', '.join(RUN_COLUMNS)} FROM runs ORDER BY run_id")

    def run_snapshot(self, run_id: int) -> Snapshot:
        """The stored snapshot of one run; :class:`StoreError` when there is no such run."""
        run = self._read(f"SELECT {', '.join(RUN_COLUMNS)} FROM runs WHERE run_id = ?", (int(run_id),))
        if run.empty:
            raise StoreError(self.path, f"no run {run_id} in the store")
        cols = lambda names: ", ".join(f'"{c}"' for c in names)   # noqa: E731
        records = self._read(f"SELECT {cols(SNAPSHOT_RECORDS)} FROM run_records WHERE run_id = ? ORDER BY rowid",
                             (int(run_id),))
        relations = self._read(f"SELECT {cols(SNAPSHOT_RELATIONS)} FROM run_relations WHERE run_id = ? "
                               "ORDER BY child_entity_id, parent_entity_id", (int(run_id),))
        findings = self._read(f"SELECT {cols(SNAPSHOT_FINDINGS)} FROM run_findings WHERE run_id = ? "
                              "ORDER BY rowid", (int(run_id),))
        return Snapshot(records, relations, findings, run)

    def last_run(self) -> Snapshot | None:
        """The snapshot of the latest run, or None before the first run."""
        runs = self.runs()
        return None if runs.empty else self.run_snapshot(int(runs["run_id"].iloc[-1]))


def _create(con: sqlite3.Connection) -> None:
    # statement by statement: executescript() would commit the open transaction first
    for statement in _SCHEMA.split(";\n"):
        if statement.strip():
            con.execute(statement)
    con.executemany("INSERT INTO meta (key, value) VALUES (?, ?)",
                    [("schema_version", str(SCHEMA_VERSION)), ("entity_max", "0"), ("created", _now())])


def _found_version(con: sqlite3.Connection, path: Path) -> int | None:
    """The schema version of an existing store, None for an empty database file."""
    tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    if not tables:
        return None
    if "meta" not in tables:
        raise StoreError(path, "not a linker store (no meta table)")
    row = con.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
    try:
        return int(row[0])
    except (TypeError, ValueError):
        raise StoreError(path, "not a linker store (no readable schema_version)") from None


def open_store(path) -> Store:
    """Open the store at ``path``, creating the file (and its folder) and the schema when new.

    A store of an older schema version is migrated (:data:`MIGRATIONS`); a
    newer one is refused with :class:`StoreVersionError`.  Foreign keys are
    on; the journal is SQLite's default rollback journal (one file at rest).
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        if not path.exists():                  # a new store is readable by its owner only
            os.close(os.open(path, os.O_CREAT | os.O_WRONLY, 0o600))
        con = sqlite3.connect(path, isolation_level=None, timeout=10)
    except (OSError, sqlite3.Error) as err:
        raise StoreError(path, f"cannot open the store: {err}") from None
    store = Store(path, con)
    try:
        con.execute("PRAGMA foreign_keys = ON")
        con.execute("SELECT name FROM sqlite_master").fetchall()     # not a database -> DatabaseError
        with store._transaction():
            found = _found_version(con, path)
            if found is None:
                _create(con)
            elif found > SCHEMA_VERSION:
                raise StoreVersionError(path, f"store schema version {found} is newer than this linker "
                                              f"knows ({SCHEMA_VERSION}); use a newer linker")
            elif found < SCHEMA_VERSION:
                for v in range(found, SCHEMA_VERSION):
                    if v not in MIGRATIONS:
                        raise StoreVersionError(path, f"no migration from store schema version {v}")
                    MIGRATIONS[v](con)
                con.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION),))
    except sqlite3.OperationalError as err:
        con.close()
        raise StoreError(path, f"cannot open the store ({err})") from None
    except sqlite3.DatabaseError as err:
        con.close()
        raise StoreError(path, f"not a linker store ({err})") from None
    except BaseException:
        con.close()
        raise
    return store

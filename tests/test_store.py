"""Project store: schema and versions, reviewer decisions, run snapshots, stable IDs, changes between runs.

All data here is made up for the tests (letters for names, fixed dates).
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import linker.store as store_mod
from linker.errors import LinkerError
from linker.fingerprint import pair_key, record_fingerprints
from linker.store import (CHANGE_COLUMNS, DecisionError, Snapshot, StoreError, StoreVersionError,
                          assign_entity_ids, changes_table, check_decisions, inputs_digest,
                          latest_decisions, open_store, snapshot_of)

ROOT = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------
def _decisions(*rows, **common) -> pd.DataFrame:
    cols = ["fp_a", "fp_b", "decision", "decided_at"]
    frame = pd.DataFrame([dict(zip(cols, r)) for r in rows])
    for k, v in common.items():
        frame[k] = v
    return frame


def _records(rows) -> pd.DataFrame:
    """Records from (record_id, entity_id, source_file, row, slot, given_name, birth_date) tuples."""
    frame = pd.DataFrame(rows, columns=["record_id", "entity_id", "source_file", "row", "slot",
                                        "given_name", "birth_date"])
    frame["sheet"] = "intake"
    frame["family_name"] = "Q"
    return frame


def _counts(path) -> dict:
    con = sqlite3.connect(path)
    try:
        out = {t: con.execute(f"SELECT COUNT(*) FROM {t}").fetchone()[0]
               for t in ("runs", "run_records", "run_relations", "run_findings", "decisions")}
        out["entity_max"] = con.execute("SELECT value FROM meta WHERE key = 'entity_max'").fetchone()[0]
    finally:
        con.close()
    return out


RUN_RECORDS = _records([
    ("r1", "E00001", "a.xlsx", 2, "child", "A", "2001-01-01"),
    ("r2", "E00001", "a.xlsx", 3, "child", "A", "2001-01-02"),
    ("r3", "E00002", "b.csv", 2, "parent", "B", "1970-05-05"),
])
RUN_RELATIONS = pd.DataFrame({"child_entity_id": ["E00001"], "parent_entity_id": ["E00002"]})
RUN_FINDINGS = pd.DataFrame({"rule": ["chronology"], "record_id": ["r2"], "detail": ["release before intake"]})


# ---------------------------------------------------------------------------
# schema and versions
# ---------------------------------------------------------------------------
def test_new_store_creates_file_schema_and_version(tmp_path):
    path = tmp_path / "project" / "store.sqlite"
    with open_store(path) as st:
        assert st.schema_version == store_mod.SCHEMA_VERSION == 1
        assert st.next_entity_number() == 1
        assert st.last_run() is None
        assert st.decisions().empty and st.decision_history().empty
        assert st._con.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    assert path.is_file()
    con = sqlite3.connect(path)
    tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    con.close()
    assert tables == {"meta", "decisions", "runs", "run_records", "run_relations", "run_findings"}
    with open_store(path) as st:          # reopening an existing store keeps it
        assert st.schema_version == 1


def test_newer_schema_is_refused_naming_the_file(tmp_path):
    path = tmp_path / "store.sqlite"
    open_store(path).close()
    con = sqlite3.connect(path)
    con.execute("UPDATE meta SET value = '7' WHERE key = 'schema_version'")
    con.commit()
    con.close()
    with pytest.raises(StoreVersionError) as err:
        open_store(path)
    assert isinstance(err.value, LinkerError) and err.value.exit_code in (2, 3)
    assert "store.sqlite" in str(err.value) and "7" in str(err.value) and "newer" in str(err.value)


def test_a_file_that_is_not_a_store_is_refused(tmp_path):
    junk = tmp_path / "junk.sqlite"
    junk.write_bytes(b"this is not a database at all, just some text that fills the header" * 20)
    with pytest.raises(StoreError, match="junk.sqlite.*not a linker store"):
        open_store(junk)
    other = tmp_path / "other.sqlite"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE t (x)")
    con.commit()
    con.close()
    with pytest.raises(StoreError, match="other.sqlite.*not a linker store"):
        open_store(other)


def test_migrations_run_from_an_older_schema(tmp_path, monkeypatch):
    path = tmp_path / "store.sqlite"
    open_store(path).close()
    ran = []

    def to_v2(con):
        ran.append(1)
        con.execute("CREATE TABLE notes (x TEXT)")

    monkeypatch.setattr(store_mod, "SCHEMA_VERSION", 2)
    monkeypatch.setattr(store_mod, "MIGRATIONS", {1: to_v2})
    with open_store(path) as st:
        assert st.schema_version == 2 and ran == [1]
        st._con.execute("SELECT * FROM notes")
    monkeypatch.setattr(store_mod, "SCHEMA_VERSION", 3)
    with pytest.raises(StoreVersionError, match="no migration from store schema version 2"):
        open_store(path)
    monkeypatch.setattr(store_mod, "SCHEMA_VERSION", 2)
    with open_store(path) as st:          # the failed migration left the store at version 2
        assert st.schema_version == 2


# ---------------------------------------------------------------------------
# decisions
# ---------------------------------------------------------------------------
def test_decisions_are_stored_keyed_on_sorted_fingerprints(tmp_path):
    frame = _decisions(("Fbb", "Faa", "same person", "2025-03-01T10:00:00"),
                       ("Fcc", "Fdd", "different", "2025-03-01"),
                       reviewer="rv1", source="review.xlsx")
    frame["values_a"] = [{"given_name": "B"}, None]
    frame["values_b"] = [json.dumps({"given_name": "A"}), ""]
    with open_store(tmp_path / "s.sqlite") as st:
        assert st.add_decisions(frame, imported_at="2025-03-02T00:00:00") == 2
        got = st.decision_history().set_index("fp_a")
    assert got.loc["Faa", "fp_b"] == "Fbb"                       # sorted, values swapped along
    assert json.loads(got.loc["Faa", "values_a"]) == {"given_name": "A"}
    assert json.loads(got.loc["Faa", "values_b"]) == {"given_name": "B"}
    assert got.loc["Faa", "pair_id"] == pair_key("Fbb", "Faa")
    assert got.loc["Faa", "decision"] == "same"                  # workbook label -> code
    assert got.loc["Fcc", "decided_at"] == "2025-03-01T00:00:00"
    assert set(got["reviewer"]) == {"rv1"} and set(got["source"]) == {"review.xlsx"}
    assert set(got["imported_at"]) == {"2025-03-02T00:00:00"}


@pytest.mark.parametrize("change, message", [
    ({"fp_a": ""}, "review.xlsx line 9: fp_a is empty"),
    ({"fp_b": None}, "review.xlsx line 9: fp_b is empty"),
    ({"decision": "maybe"}, "review.xlsx line 9: unknown decision"),
    ({"decision": ""}, "review.xlsx line 9: no decision"),
    ({"decided_at": "yesterday"}, "review.xlsx line 9: decided_at is not an ISO"),
    ({"values_a": "[1, 2]"}, "review.xlsx line 9: values_a is not a JSON object"),
    ({"pair_id": "Kwrong"}, "review.xlsx line 9: pair_id does not match"),
])
def test_a_bad_line_stores_nothing_and_is_named(tmp_path, change, message):
    frame = _decisions(("Fa", "Fb", "same", "2025-01-01"), ("Fc", "Fd", "different", "2025-01-01"),
                       source="review.xlsx")
    frame["line"] = [4, 9]
    frame["pair_id"] = [pair_key("Fa", "Fb"), pair_key("Fc", "Fd")]
    frame["values_a"] = ["{}", "{}"]
    for col, value in change.items():
        frame.loc[1, col] = value
    with open_store(tmp_path / "s.sqlite") as st:
        with pytest.raises(DecisionError) as err:
            st.add_decisions(frame)
        assert st.decision_history().empty
    assert message in str(err.value) and "no decisions stored" in str(err.value)
    assert "maybe" not in str(err.value)           # cell text is not echoed


def test_conflicting_lines_in_one_frame_name_both_lines(tmp_path):
    frame = _decisions(("Fa", "Fb", "same", "2025-01-01"), ("Fx", "Fy", "unsure", "2025-01-01"),
                       ("Fb", "Fa", "different", "2025-01-02"), ("Fx", "Fy", "unsure", "2025-01-03"))
    with open_store(tmp_path / "s.sqlite") as st:
        with pytest.raises(DecisionError) as err:
            st.add_decisions(frame)
        assert st.decision_history().empty
    assert err.value.problems == ["line 1 and line 3 give different decisions on the same pair (same / different)"]


def test_missing_columns_are_named():
    with pytest.raises(DecisionError, match="missing column 'decided_at'"):
        check_decisions(pd.DataFrame({"fp_a": ["Fa"], "fp_b": ["Fb"], "decision": ["same"]}))


def test_history_is_kept_and_the_latest_decision_wins(tmp_path):
    with open_store(tmp_path / "s.sqlite") as st:
        st.add_decisions(_decisions(("Fa", "Fb", "same", "2025-01-05"), ("Fc", "Fd", "same", "2025-01-05")))
        st.add_decisions(_decisions(("Fb", "Fa", "different", "2025-02-01"),     # later: wins
                                    ("Fc", "Fd", "different", "2025-01-01")))    # decided earlier: loses
        st.add_decisions(_decisions(("Fa", "Fb", "unsure", "2025-02-01")))       # same time, stored later: wins
        history = st.decision_history()
        latest = st.decisions()
    assert list(history["decision"]) == ["same", "same", "different", "different", "unsure"]
    assert list(history["decision_no"]) == [1, 2, 3, 4, 5]
    assert list(latest.columns) == ["pair_id", "fp_a", "fp_b", "decision", "reviewer", "decided_at", "note",
                                    "source"]
    by_pair = latest.set_index("fp_a")["decision"].to_dict()
    assert by_pair == {"Fa": "unsure", "Fc": "same"}
    assert list(latest["pair_id"]) == sorted(latest["pair_id"])


def test_latest_decisions_is_pure_and_orders_by_time_then_storage():
    history = pd.DataFrame({"decision_no": [1, 2, 3], "pair_id": ["K1", "K1", "K1"], "fp_a": "Fa",
                            "fp_b": "Fb", "decision": ["different", "same", "unsure"], "reviewer": "",
                            "decided_at": ["2025-01-02T00:00:00", "2025-01-03T00:00:00", "2025-01-01T00:00:00"],
                            "note": "", "source": ""})
    assert latest_decisions(history)["decision"].tolist() == ["same"]


def test_decisions_are_never_updated_or_deleted(tmp_path):
    with open_store(tmp_path / "s.sqlite") as st:
        st.add_decisions(_decisions(("Fa", "Fb", "same", "2025-01-05")))
        with pytest.raises(sqlite3.DatabaseError, match="never changed"):
            st._con.execute("UPDATE decisions SET decision = 'different'")
        with pytest.raises(sqlite3.DatabaseError, match="never deleted"):
            st._con.execute("DELETE FROM decisions")
        assert st.decisions()["decision"].tolist() == ["same"]


def test_importing_the_same_workbook_twice_adds_nothing(tmp_path):
    frame = _decisions(("Fa", "Fb", "same", "2025-01-05"), ("Fa", "Fb", "same", "2025-01-05"),
                       reviewer="rv1", note="checked", source="review.xlsx")
    with open_store(tmp_path / "s.sqlite") as st:
        assert st.add_decisions(frame) == 1        # identical lines stored once
        assert st.add_decisions(frame) == 0
        frame.loc[0, "note"] = "checked again"
        assert st.add_decisions(frame) == 1
        assert len(st.decision_history()) == 2


def test_a_write_failing_half_way_stores_no_decision(tmp_path, monkeypatch):
    real = store_mod._insert

    def half(con, table, frame):
        real(con, table, frame.iloc[:1])          # first line written inside the transaction...
        raise RuntimeError("disk pulled")         # ...then the write fails

    with open_store(tmp_path / "s.sqlite") as st:
        monkeypatch.setattr(store_mod, "_insert", half)
        with pytest.raises(RuntimeError):
            st.add_decisions(_decisions(("Fa", "Fb", "same", "2025-01-05"), ("Fc", "Fd", "same", "2025-01-05")))
        monkeypatch.setattr(store_mod, "_insert", real)
        assert st.decision_history().empty
        assert st.add_decisions(_decisions(("Fa", "Fb", "same", "2025-01-05"))) == 1


# ---------------------------------------------------------------------------
# runs
# ---------------------------------------------------------------------------
def test_record_run_and_read_its_snapshot(tmp_path):
    info = {"started": "2025-04-01T08:00:00", "config_sha256": "c" * 64,
            "inputs": [{"source_file": "b.csv", "sha256": "2"}, {"source_file": "a.xlsx", "sha256": "1"}]}
    with open_store(tmp_path / "s.sqlite") as st:
        run_id = st.record_run(info, RUN_RECORDS, RUN_RELATIONS, RUN_FINDINGS)
        runs = st.runs()
        snap = st.last_run()
        assert st.next_entity_number() == 3
    assert run_id == 1
    assert runs.to_dict(orient="records") == [{
        "run_id": 1, "started": "2025-04-01T08:00:00", "config_sha256": "c" * 64,
        "inputs_sha256": inputs_digest(info["inputs"][::-1]), "records": 3}]
    assert snap.records["fingerprint"].tolist() == record_fingerprints(RUN_RECORDS).tolist()
    assert snap.records["record_id"].tolist() == ["r1", "r2", "r3"]
    assert snap.records["row"].tolist() == [2, 3, 2]
    assert json.loads(snap.records["values"].iloc[2])["given_name"] == "B"
    assert snap.relations.to_dict(orient="records") == [{"child_entity_id": "E00001",
                                                         "parent_entity_id": "E00002"}]
    f = snap.findings.iloc[0]
    assert (f["rule"], f["entity_id"], f["source_file"], f["row"], f["slot"]) == \
        ("chronology", "E00001", "a.xlsx", 3, "child")
    assert f["fingerprint"] == snap.records["fingerprint"].iloc[1]
    # what was stored is what snapshot_of makes of the frames
    fresh = snapshot_of(RUN_RECORDS, RUN_RELATIONS, RUN_FINDINGS)
    pd.testing.assert_frame_equal(snap.records, fresh.records)
    pd.testing.assert_frame_equal(snap.findings, fresh.findings)


def test_records_without_entity_ids_are_refused(tmp_path):
    rec = RUN_RECORDS.assign(entity_id=["E00001", "", "E00002"])
    with open_store(tmp_path / "s.sqlite") as st:
        with pytest.raises(StoreError, match="records without entity_id"):
            st.record_run({}, rec)
        assert st.runs().empty


def test_run_failing_half_way_leaves_the_store_as_before(tmp_path, monkeypatch):
    path = tmp_path / "s.sqlite"
    with open_store(path) as st:
        st.record_run({}, RUN_RECORDS, RUN_RELATIONS, RUN_FINDINGS)
    before = _counts(path)
    real = store_mod._insert

    def failing(con, table, frame):
        if table == "run_findings":                        # runs, run_records, run_relations already written
            raise RuntimeError("killed")
        real(con, table, frame)

    bigger = RUN_RECORDS.assign(entity_id=["E00001", "E00001", "E00009"])
    with open_store(path) as st:
        monkeypatch.setattr(store_mod, "_insert", failing)
        with pytest.raises(RuntimeError):
            st.record_run({}, bigger, RUN_RELATIONS, RUN_FINDINGS)
        monkeypatch.setattr(store_mod, "_insert", real)
        assert st.next_entity_number() == 3
    assert _counts(path) == before
    with open_store(path) as st:
        assert len(st.runs()) == 1 and len(st.last_run().records) == 3


def test_a_process_killed_mid_write_leaves_the_store_as_before(tmp_path):
    path = tmp_path / "s.sqlite"
    with open_store(path) as st:
        st.record_run({}, RUN_RECORDS, RUN_RELATIONS, RUN_FINDINGS)
    before = _counts(path)
    script = textwrap.dedent(f"""
        import os, sys
        import pandas as pd
        import linker.store as s
        real = s._insert
        def dying(con, table, frame):
            real(con, table, frame)
            if table == "run_records":
                os._exit(9)                      # killed with the transaction open
        s._insert = dying
        rec = pd.DataFrame({{"record_id": ["x1"], "entity_id": ["E00042"], "source_file": "c.csv",
                            "sheet": "", "row": [2], "slot": "child", "given_name": ["C"]}})
        with s.open_store(sys.argv[1]) as st:
            st.record_run({{}}, rec)
    """)
    done = subprocess.run([sys.executable, "-c", script, str(path)], cwd=ROOT, capture_output=True, text=True)
    assert done.returncode == 9, done.stderr
    assert _counts(path) == before                   # the left-over journal is rolled back
    with open_store(path) as st:
        assert st.next_entity_number() == 3
        assert st.last_run().records["record_id"].tolist() == ["r1", "r2", "r3"]


def test_a_retired_id_is_never_issued_again(tmp_path):
    path = tmp_path / "s.sqlite"
    fps = ["Fa", "Fb", "Fc"]
    first = assign_entity_ids([0, 1, 2], fps, None)
    assert first.tolist() == ["E00001", "E00002", "E00003"]
    rec = pd.DataFrame({"fingerprint": fps, "record_id": ["r1", "r2", "r3"], "entity_id": first,
                        "source_file": "a.csv", "sheet": "", "row": [2, 3, 4], "slot": "child"})
    with open_store(path) as st:
        st.record_run({}, rec)
        # second run: the record of E00003 is gone, so is the ID
        second = assign_entity_ids([0, 1], fps[:2], st.last_run().records, st.next_entity_number())
        assert second.tolist() == ["E00001", "E00002"]
        st.record_run({}, rec.iloc[:2].assign(entity_id=second.to_numpy()))
        # third run: a new person; the last run's largest ID is E00002 but E00003 was issued before
        third = assign_entity_ids([0, 1, 2], ["Fa", "Fb", "Fz"], st.last_run().records, st.next_entity_number())
    assert third.tolist() == ["E00001", "E00002", "E00004"]


# ---------------------------------------------------------------------------
# stable IDs (pure)
# ---------------------------------------------------------------------------
def _previous(groups: dict) -> pd.DataFrame:
    rows = [(fp, eid) for eid, fps in groups.items() for fp in fps]
    return pd.DataFrame(rows, columns=["fingerprint", "entity_id"])


def test_first_run_numbers_clusters_by_their_first_record():
    ids = assign_entity_ids(np.array([5, 2, 5, 0]), pd.Series(["Fa", "Fb", "Fc", "Fd"], index=[10, 11, 12, 13]),
                            pd.DataFrame(columns=["fingerprint", "entity_id"]))
    assert ids.tolist() == ["E00001", "E00002", "E00001", "E00003"]
    assert ids.index.tolist() == [10, 11, 12, 13] and ids.name == "entity_id"


def test_reordered_records_keep_their_ids():
    prev = _previous({"E00001": ["Fa", "Fb"], "E00002": ["Fc"], "E00003": ["Fd", "Fe", "Ff"]})
    order = [4, 2, 0, 5, 3, 1]
    fps = np.array(["Fa", "Fb", "Fc", "Fd", "Fe", "Ff"])[order]
    labels = np.array([0, 0, 1, 2, 2, 2])[order] * 7 + 3          # other label values, other order
    ids = assign_entity_ids(labels, fps, prev, next_number=4)
    assert dict(zip(fps, ids)) == dict(zip(prev["fingerprint"], prev["entity_id"]))


def test_a_merge_keeps_the_larger_groups_id():
    prev = _previous({"E00001": ["Fa"], "E00002": ["Fb", "Fc", "Fd"]})
    ids = assign_entity_ids([0, 0, 0, 0], ["Fa", "Fb", "Fc", "Fd"], prev)
    assert set(ids) == {"E00002"}


def test_a_split_gives_the_new_part_a_new_id():
    prev = _previous({"E00001": ["Fx"], "E00002": ["Fa", "Fb", "Fc", "Fd"]})
    ids = assign_entity_ids([0, 1, 1, 1, 2], ["Fa", "Fb", "Fc", "Fd", "Fx"], prev, next_number=3)
    assert ids.tolist() == ["E00003", "E00002", "E00002", "E00002", "E00001"]


def test_ties_are_broken_deterministically():
    # two clusters of equal overlap with the same earlier entity: the one whose first record comes first
    prev = _previous({"E00004": ["Fa", "Fb"]})
    ids = assign_entity_ids([1, 0], ["Fb", "Fa"], prev)
    assert ids.tolist() == ["E00004", "E00005"]
    # one cluster sharing equally with two earlier entities: the smaller ID number
    prev = _previous({"E00010": ["Fa"], "E00009": ["Fb"]})
    assert set(assign_entity_ids([0, 0], ["Fa", "Fb"], prev)) == {"E00009"}


def test_overlap_counts_fingerprint_multisets():
    # identical records (same fingerprint) count once per copy on each side
    prev = _previous({"E00001": ["Fs", "Fs", "Fs"], "E00002": ["Fs", "Ft"]})
    ids = assign_entity_ids([0, 0, 0, 1, 1], ["Fs", "Fs", "Fs", "Fs", "Ft"], prev)
    assert ids.tolist() == ["E00001"] * 3 + ["E00002"] * 2


def test_ids_grow_past_five_digits_and_next_number_never_goes_back():
    prev = _previous({"E99999": ["Fa"]})
    ids = assign_entity_ids([0, 1], ["Fa", "Fb"], prev, next_number=7)
    assert ids.tolist() == ["E99999", "E100000"]


def test_greedy_rounds_match_the_one_by_one_greedy():
    rng = np.random.default_rng(5)
    for _ in range(30):
        cand = pd.DataFrame({"cluster": rng.integers(0, 8, 40), "prev_id": rng.integers(0, 8, 40)})
        cand = cand.drop_duplicates().reset_index(drop=True)
        got = store_mod._greedy_pairs(cand)
        used_c, used_p, want = set(), set(), []
        for c, p in cand.itertuples(index=False):
            if c not in used_c and p not in used_p:
                used_c.add(c)
                used_p.add(p)
                want.append((c, p))
        assert sorted(map(tuple, got[["cluster", "prev_id"]].to_numpy().tolist())) == sorted(want)


# ---------------------------------------------------------------------------
# changes between runs (pure)
# ---------------------------------------------------------------------------
PREV_ROWS = [
    ("a1", "E00001", "a.xlsx", 2, "child", "Ann", "2001-01-01"),
    ("a2", "E00001", "a.xlsx", 3, "child", "Ann", "2001-01-02"),
    ("a3", "E00001", "b.xlsx", 2, "child", "Ann", "2001-01-03"),
    ("b1", "E00002", "b.xlsx", 3, "child", "Anne", "2001-01-01"),
    ("c1", "E00003", "a.xlsx", 4, "child", "Cid", "2002-02-01"),
    ("c2", "E00003", "a.xlsx", 5, "child", "Cid", "2002-02-02"),
    ("c3", "E00003", "a.xlsx", 6, "child", "Cid", "2002-02-03"),
    ("c4", "E00003", "a.xlsx", 7, "child", "Cyd", "2012-02-01"),
    ("d1", "E00004", "a.xlsx", 8, "child", "Dag", "2003-03-01"),
    ("d2", "E00004", "a.xlsx", 9, "child", "Dag", "2003-03-02"),
    ("e1", "E00005", "c.csv", 2, "parent", "Eve", "1970-01-01"),
    ("e2", "E00005", "c.csv", 3, "child", "Eve", "1970-01-02"),
]


def _constructed_runs():
    prev = snapshot_of(_records(PREV_ROWS),
                       pd.DataFrame({"child_entity_id": ["E00004", "E00003"], "parent_entity_id": ["E00005"] * 2}),
                       pd.DataFrame({"rule": ["chronology", "sex_conflict"], "record_id": ["d1", "a1"],
                                     "detail": ["release before intake", "F / M"]}))
    # this run: rows re-exported elsewhere (a.xlsx -> a2.xlsx, new row numbers, other order); injected:
    # b1 joins E00001 (merge), c4 splits off, d2's birth date corrected, e2 gone, g1 new,
    # relation (E00003, E00005) now claimed for E00001, one finding resolved, one new.
    cur_rows = [
        ("g1", None, "d.csv", 2, "child", "Ann", "2001-01-09"),
        ("e1", None, "c.csv", 2, "parent", "Eve", "1970-01-01"),
        ("d2", None, "a.xlsx", 9, "child", "Dag", "2003-03-12"),
        ("d1", None, "a2.xlsx", 18, "child", "Dag", "2003-03-01"),
        ("c4", None, "a2.xlsx", 17, "child", "Cyd", "2012-02-01"),
        ("c3", None, "a2.xlsx", 16, "child", "Cid", "2002-02-03"),
        ("c2", None, "a2.xlsx", 15, "child", "Cid", "2002-02-02"),
        ("c1", None, "a2.xlsx", 14, "child", "Cid", "2002-02-01"),
        ("b1", None, "b.xlsx", 3, "child", "Anne", "2001-01-01"),
        ("a3", None, "b.xlsx", 2, "child", "Ann", "2001-01-03"),
        ("a2", None, "a2.xlsx", 13, "child", "Ann", "2001-01-02"),
        ("a1", None, "a2.xlsx", 12, "child", "Ann", "2001-01-01"),
    ]
    cur = _records(cur_rows)
    labels = np.array([0, 4, 3, 3, 5, 2, 2, 2, 0, 0, 0, 0])
    cur["entity_id"] = assign_entity_ids(labels, record_fingerprints(cur), prev.records, next_number=6).to_numpy()
    cur_snap = snapshot_of(cur, pd.DataFrame({"child_entity_id": ["E00001", "E00004"],
                                              "parent_entity_id": ["E00005"] * 2}),
                           pd.DataFrame({"rule": ["chronology", "birth_date_conflict"], "record_id": ["d1", "c1"],
                                         "detail": ["release before intake (reworded)", "2002-02-01 vs 2012"]}))
    return prev, cur, cur_snap


def test_constructed_changes_are_listed_exactly():
    prev, cur, cur_snap = _constructed_runs()
    ids = dict(zip(cur["record_id"], cur["entity_id"]))
    assert ids["b1"] == ids["a1"] == ids["g1"] == "E00001"      # the larger group's ID
    assert ids["c1"] == "E00003" and ids["c4"] == "E00006"        # the split-off part: a new ID
    fp = dict(zip(cur["record_id"], cur_snap.records["fingerprint"]))
    old_fp = dict(zip(prev.records["record_id"], prev.records["fingerprint"]))

    out = changes_table(prev, cur_snap)
    assert list(out.columns) == list(CHANGE_COLUMNS)
    got = [tuple(x) for x in out[["change", "entity_id", "other_entity_ids", "fingerprint"]].to_numpy()]
    assert got == [
        ("entity_merged", "E00001", "E00002", ""),
        ("entity_split", "E00003", "E00006", ""),
        ("record_added", "E00001", "", fp["g1"]),
        ("record_removed", "E00005", "", old_fp["e2"]),
        ("record_changed", "E00004", "", fp["d2"]),
        ("relation_added", "E00001", "E00005", ""),
        ("relation_removed", "E00003", "E00005", ""),
        ("finding_new", "E00003", "", fp["c1"]),
        ("finding_resolved", "E00001", "", old_fp["a1"]),
    ]
    changed = out[out["change"] == "record_changed"].iloc[0]
    assert changed["detail"] == "changed: birth_date"
    assert (changed["source_file"], changed["sheet"], changed["row"], changed["slot"]) == \
        ("a.xlsx", "intake", 9, "child")
    removed = out[out["change"] == "record_removed"].iloc[0]
    assert (removed["source_file"], removed["row"], removed["slot"]) == ("c.csv", 3, "child")
    assert out[out["change"] == "finding_new"]["detail"].iloc[0].startswith("birth_date_conflict: ")
    assert out["row"].dtype == "Int64"


def test_changes_do_not_depend_on_input_order():
    prev, cur, cur_snap = _constructed_runs()
    out = changes_table(prev, cur_snap)
    shuffled = Snapshot(cur_snap.records.sample(frac=1, random_state=3),
                        cur_snap.relations.iloc[::-1], cur_snap.findings.iloc[::-1])
    old_shuffled = Snapshot(prev.records.sample(frac=1, random_state=4), prev.relations, prev.findings)
    pd.testing.assert_frame_equal(changes_table(old_shuffled, shuffled), out)


def test_the_same_run_twice_has_no_changes_and_a_first_run_is_all_new():
    prev, _, _ = _constructed_runs()
    assert changes_table(prev, prev).empty
    first = changes_table(None, prev)
    counts = first["change"].value_counts().to_dict()
    assert counts == {"record_added": 12, "entity_new": 5, "relation_added": 2, "finding_new": 2}
    assert first[first["entity_id"] == "E00001"]["detail"].iloc[0] == "3 records"


def test_a_changed_record_that_also_moved_says_where_it_was():
    prev = snapshot_of(_records([("r1", "E00001", "a.xlsx", 2, "child", "Ann", "2001-01-01"),
                                 ("r2", "E00001", "a.xlsx", 3, "child", "Ann", "2001-01-02")]))
    cur = snapshot_of(_records([("r1", "E00001", "a.xlsx", 2, "child", "Ann", "2001-01-01"),
                                ("r9", "E00001", "z.xlsx", 7, "child", "Anna", "2001-01-02")]))
    out = changes_table(prev, cur)
    assert out["change"].tolist() == ["record_changed"]
    assert out["detail"].iloc[0] == "changed: given_name; was a.xlsx, sheet intake, row 3"
    assert out["source_file"].iloc[0] == "z.xlsx"


def test_an_entity_whose_records_all_went_is_gone_and_a_wholly_new_one_is_new():
    prev = snapshot_of(_records([("r1", "E00001", "a.xlsx", 2, "child", "Ann", "2001-01-01"),
                                 ("r2", "E00002", "a.xlsx", 3, "child", "Bo", "1999-01-02")]))
    cur = snapshot_of(_records([("r1", "E00001", "a.xlsx", 2, "child", "Ann", "2001-01-01"),
                                ("r3", "E00003", "a.xlsx", 4, "parent", "Cy", "1960-01-02")]))
    out = changes_table(prev, cur)
    assert out[["change", "entity_id", "detail"]].to_numpy().tolist() == [
        ["entity_new", "E00003", "1 record"],
        ["entity_gone", "E00002", "had 1 record"],
        ["record_added", "E00003", "not in the earlier run"],
        ["record_removed", "E00002", "not in this run"],
    ]

"""The Spark engine against the local engine, Spark in local mode (local[2], UI off, 127.0.0.1).

Same candidate pairs and rule bitmask, same levels, weights within 1e-9,
same entities as :func:`linker.link.link_records`, on the demo delivery and on
FEBRL3; block caps reported as :func:`linker.blocking.block` reports them;
large-star / small-star components equal scipy's; Parquet round trip.  One
Spark session for the module.  Skipped only when Java or pyspark is missing.
"""

from __future__ import annotations

import os
import shutil
import sys
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from linker import load_config
from linker.blocking import OversizedBlockWarning, block
from linker.cli import main
from linker.cluster import relabel_by_first
from linker.compare import compare, prepare_fields
from linker.fingerprint import record_fingerprints
from linker.link import LinkageSettings, link_records, person_rules
from linker.model import FellegiSunter
from linker.pipeline import ingest_delivery
from linker.records import normalize_records

import _febrl
from conftest import ROOT


def _missing() -> str | None:
    if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        return "Java is not installed: the Spark engine needs a JVM (Java 17+)"
    for name in ("pyspark", "pyarrow"):
        try:
            __import__(name)
        except ImportError:
            return f"{name} is not installed: pip install linker[spark]"
    return None


MISSING = _missing()
needs_spark = pytest.mark.skipif(MISSING is not None, reason=MISSING or "")


@pytest.fixture(scope="module")
def spark():
    if MISSING:
        pytest.skip(MISSING)
    mp = pytest.MonkeyPatch()
    mp.setenv("SPARK_LOCAL_IP", "127.0.0.1")          # before the JVM starts
    from linker.spark import spark_session

    # small data, short JVM: whole-stage code generation and the optimizing JIT cost more than they save
    session = spark_session("local[2]", {"spark.ui.enabled": "false", "spark.sql.shuffle.partitions": "1",
                                         "spark.default.parallelism": "2",
                                         "spark.sql.codegen.wholeStage": "false",
                                         "spark.driver.extraJavaOptions": "-XX:TieredStopAtLevel=1"})
    yield session
    session.stop()
    mp.undo()


@pytest.fixture(scope="module")
def demo():
    """The demo delivery's normalized records, as run_pipeline makes them (no corrections file)."""
    cfg = load_config(ROOT / "configs" / "sample.toml")
    assert cfg.corrections is None
    raw = ingest_delivery(cfg)[0]
    return normalize_records(raw, cfg).reset_index(drop=True), cfg


@pytest.fixture(scope="module")
def febrl3():
    rec = _febrl.febrl_records("febrl3")
    # the person stage reads a validation status; FEBRL numbers have no check digit: present = valid
    rec["reg_no_status"] = np.where(rec["reg_no"] != "", "valid", "missing")
    return rec


def _assert_same_result(local, spark_result):
    a, b = local.scores, spark_result.scores
    assert len(a) > 1000
    pd.testing.assert_frame_equal(a[["left", "right", "rules"]], b[["left", "right", "rules"]])
    assert b["left"].dtype == np.int64 and b["rules"].dtype == np.int64
    assert spark_result.levels.dtype == np.int8
    np.testing.assert_array_equal(local.levels, spark_result.levels)
    np.testing.assert_allclose(b["weight"].to_numpy(), a["weight"].to_numpy(), rtol=0, atol=1e-9)
    np.testing.assert_allclose(b["probability"].to_numpy(), a["probability"].to_numpy(), rtol=0, atol=1e-12)
    assert (a["decision"].to_numpy() == b["decision"].to_numpy()).all()
    assert (a["reviewed"].to_numpy() == b["reviewed"].to_numpy()).all()
    np.testing.assert_array_equal(local.labels, spark_result.labels)
    pd.testing.assert_frame_equal(local.blocking, spark_result.blocking)
    pd.testing.assert_frame_equal(local.capped, spark_result.capped)
    for f in local.fields:
        np.testing.assert_array_equal(local.model.m_[f.name], spark_result.model.m_[f.name])
        np.testing.assert_array_equal(local.model.u_[f.name], spark_result.model.u_[f.name])
    assert local.model.tf_ == spark_result.model.tf_
    skip = {"timings", "engine", "clustering"}
    assert {k: v for k, v in local.info.items() if k not in skip} == \
        {k: v for k, v in spark_result.info.items() if k not in skip}
    assert spark_result.info["engine"] == "spark"


@needs_spark
def test_demo_delivery_spark_equals_local(spark, demo):
    """Pandas records in: pairs, bitmask, levels, weights, decisions, entities and reports all equal."""
    from linker.spark import link_records_spark

    records, cfg = demo
    local = link_records(records, cfg.linkage)
    result = link_records_spark(spark, records, cfg.linkage)
    assert result.info["clustering"] == "driver"
    assert local.info["pairs_linked"] > 1000 and local.info["links_held_apart"] > 0   # splits happen too
    _assert_same_result(local, result)


@needs_spark
def test_febrl3_from_parquet_with_components_in_spark_equals_local(spark, febrl3, tmp_path):
    """Records read by Spark from Parquet, reviewer decisions, links clustered in Spark (large-star /
    small-star, identifier conflicts and cannot-links split on the driver): the same result as
    link_records on the same Parquet."""
    from linker.spark import link_records_spark, read_records, read_records_pandas, write_records_parquet

    path = write_records_parquet(febrl3, tmp_path / "febrl3", rows_per_file=2000)
    assert len(list(path.glob("part-*.parquet"))) == 3
    back = read_records_pandas(path)
    pd.testing.assert_frame_equal(back, febrl3)
    settings = LinkageSettings(random_pairs=50_000)        # fewer random pairs: a quicker test, same check
    first = link_records(back, settings).scores
    fp = record_fingerprints(back).to_numpy()
    picks = [(first[first["decision"] == d].iloc[3], v) for d, v in
             (("link", "different"), ("review", "same"), ("non-link", "unsure"))]
    decisions = pd.DataFrame({"pair_id": [f"P{k}" for k in range(3)],
                              "fp_a": [fp[int(r["left"])] for r, _ in picks],
                              "fp_b": [fp[int(r["right"])] for r, _ in picks],
                              "decision": [v for _, v in picks]})
    local = link_records(back, settings, decisions=decisions)
    assert local.info["links_held_apart"] > 0 and local.info["decisions_applied"] == 3
    result = link_records_spark(spark, read_records(spark, path), settings, decisions=decisions,
                                max_driver_links=0)
    assert result.info["clustering"] == "spark"
    _assert_same_result(local, result)
    assert set(result.scores["reviewed"]) == {"", "same", "different", "unsure"}


@needs_spark
def test_febrl3_stages_with_the_febrl_rules_and_fields(spark, febrl3):
    """FEBRL's own rules (seven, on dates and postcodes too) and fields (string, exact, reg_no kinds):
    blocking and comparison in Spark equal the local stage functions; so do the weights of one model."""
    from linker.spark import block_spark, compare_spark

    pairs_l, report_l, capped_l = block(febrl3, _febrl.RULES, return_capped=True)
    keep = []
    pairs_s, report_s, capped_s = block_spark(spark, febrl3, _febrl.RULES, _keep=keep)
    pd.testing.assert_frame_equal(report_s, report_l)
    pd.testing.assert_frame_equal(capped_s, capped_l)
    prepared = prepare_fields(febrl3, _febrl.FIELDS)
    bc = spark.sparkContext.broadcast({"prepared": prepared, "stub": pd.DataFrame(index=febrl3.index)})
    got = compare_spark(pairs_s, bc, _febrl.FIELDS).toPandas().sort_values(["left", "right"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got[["left", "right", "rules"]], pairs_l)
    levels_s = got[[f"lv{j}" for j in range(len(_febrl.FIELDS))]].to_numpy(dtype=np.int8)
    levels_l = compare(febrl3, pairs_l, _febrl.FIELDS, prepared=prepared)
    np.testing.assert_array_equal(levels_s, levels_l)
    model = FellegiSunter(_febrl.FIELDS, seed=0, u_sample=20_000).fit(febrl3, pairs_l, levels_l, prepared=prepared)
    assert model.converged_
    np.testing.assert_array_equal(model.match_weight(febrl3, pairs_l, levels_s),
                                  model.match_weight(febrl3, pairs_l, levels_l))
    bc.destroy()
    for df in keep:
        df.unpersist()


@needs_spark
def test_block_caps_are_applied_and_reported_as_block_does(spark, demo):
    """Small caps on the demo: every rule kind caps blocks; same pairs, report, capped rows (rule, key
    text, size, order) and the same warnings."""
    from linker.spark import block_spark

    records, _ = demo
    rules = person_rules(LinkageSettings(block_cap=3, name_window=3))
    with warnings.catch_warnings(record=True) as seen_l:
        warnings.simplefilter("always")
        pairs_l, report_l, capped_l = block(records, rules, return_capped=True)
    keep = []
    with warnings.catch_warnings(record=True) as seen_s:
        warnings.simplefilter("always")
        pairs_s, report_s, capped_s = block_spark(spark, records, rules, _keep=keep)
    assert set(capped_l["rule"]) == {"reg_no", "reg_no_near", "names_sx_year", "given_dob"}
    assert (capped_l["key"].str.contains(r"\?").any() and capped_l["key"].str.contains("<").any())
    pd.testing.assert_frame_equal(capped_s, capped_l)
    pd.testing.assert_frame_equal(report_s, report_l)
    got = pairs_s.toPandas().sort_values(["left", "right"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got, pairs_l)
    msgs = lambda seen: [str(w.message) for w in seen if issubclass(w.category, OversizedBlockWarning)]
    assert msgs(seen_s) == msgs(seen_l) and len(msgs(seen_l)) == 4
    # the window rule's ranks were stitched across partitions of the range-partitioned sort
    window_sort = [df for df in keep if "mid" in df.columns]
    assert len(window_sort) == 1
    assert len({r["part"] for r in window_sort[0].selectExpr("shiftright(mid, 33) AS part").distinct().collect()}) >= 2
    for df in keep:
        df.unpersist()


@needs_spark
def test_variant_keys_in_spark_sql_equal_the_local_ones(spark):
    """near_id's variant key text made by Spark SQL equals blocking._variant_keys, id by id."""
    from linker.blocking import _variant_keys
    from linker.spark import _to_spark, _variant_frame

    ids = np.array(["12345678", "1", "12", "11", "1122", "AB12", "ÉÖ9Z", "00000000", "a?b<c", "98765432101"],
                   dtype=object)
    owner, keys = _variant_keys(ids)
    want = sorted(zip(ids[owner], keys))
    frame = _to_spark(spark, pd.DataFrame({"id": ids, "n_rec": 1, "first": np.arange(ids.size)}))
    got = sorted((r["id"], r["vkey"]) for r in _variant_frame(frame).collect())
    # 15 for 8 distinct digits, 8 for 8 equal ones (no transposition), 1 for a single character
    assert got == want and len(want) == 78


@needs_spark
def test_large_star_small_star_equals_scipy_components(spark):
    """A random sparse graph and a shuffled path (the slowest shape to converge), side by side."""
    from linker.spark import _to_spark, spark_components

    rng = np.random.default_rng(7)
    n_random, n_path = 400, 60
    a, b = rng.integers(0, n_random, 330), rng.integers(0, n_random, 330)
    path = n_random + rng.permutation(n_path)
    a, b = np.concatenate([a, path[:-1]]), np.concatenate([b, path[1:]])
    n = n_random + n_path + 5                     # the last five records are in no link
    labels = spark_components(spark, _to_spark(spark, pd.DataFrame({"left": a, "right": b})), n)
    k, ref = connected_components(coo_matrix((np.ones(a.size), (a, b)), shape=(n, n)), directed=False)
    np.testing.assert_array_equal(labels, relabel_by_first(ref))
    assert labels.max() + 1 == k and 10 < k < n - 100
    assert len(set(labels[n_random:n_random + n_path])) == 1


@needs_spark
def test_parquet_round_trip_of_the_demo_records(spark, demo, tmp_path):
    from linker.spark import POSITION, read_records, read_records_pandas, write_records_parquet

    records, _ = demo
    path = write_records_parquet(records, tmp_path / "demo")
    back = read_records_pandas(path)
    assert list(back.columns) == list(records.columns)
    # an object column of whole numbers ("row") comes back as integers; every value is kept
    pd.testing.assert_frame_equal(back, records, check_dtype=False)
    assert (back.dtypes[records.dtypes != object] == records.dtypes[records.dtypes != object]).all()
    sdf = read_records(spark, path)
    assert sdf.count() == len(records)
    assert set(sdf.columns) == set(records.columns) | {POSITION}
    first = sdf.where(f"{POSITION} = 7").select("record_id", "given_name").collect()[0]
    assert (first["record_id"], first["given_name"]) == (records.at[7, "record_id"], records.at[7, "given_name"])


@needs_spark
def test_parquet_written_a_part_at_a_time_reads_back_whole(demo, tmp_path):
    """``start=`` appends the next records at their positions; reading only the linkage columns keeps order."""
    from linker.link import linkage_columns
    from linker.spark import read_records_pandas, write_records_parquet

    records, cfg = demo
    cut = 1234
    path = tmp_path / "parts"
    write_records_parquet(records.iloc[:cut], path, rows_per_file=1000)
    write_records_parquet(records.iloc[cut:], path, rows_per_file=1000, start=cut)
    pd.testing.assert_frame_equal(read_records_pandas(path), records, check_dtype=False)
    with pytest.raises(ValueError, match="overlap"):
        write_records_parquet(records.iloc[cut:], path, rows_per_file=1000, start=cut)
    cols = linkage_columns(cfg.linkage)
    assert {"reg_no", "given_name", "family_soundex", "birth_year", "name_key", "reg_no_status"} <= set(cols)
    narrow = read_records_pandas(path, columns=cols + ["no_such_column"])
    assert list(narrow.columns) == [c for c in cols if c in records.columns]
    pd.testing.assert_frame_equal(narrow, records[list(narrow.columns)], check_dtype=False)
    write_records_parquet(records.iloc[:10], path)                 # start 0 replaces the folder
    assert len(read_records_pandas(path)) == 10


@needs_spark
def test_cli_run_with_the_spark_engine_writes_the_local_outputs(spark, tmp_path, monkeypatch):
    """`linker run --engine spark` (on the running session) links on Spark and writes what the local engine writes."""
    import linker.spark as spark_module

    calls = []
    original = spark_module.link_records_spark

    def counted(*args, **kwargs):
        calls.append(1)
        return original(*args, **kwargs)

    monkeypatch.setattr(spark_module, "link_records_spark", counted)
    cfg = str(ROOT / "configs" / "sample.toml")
    assert main(["run", cfg, "--out", str(tmp_path / "local"), "--quiet"]) == 0
    assert calls == []
    assert main(["run", cfg, "--out", str(tmp_path / "spark"), "--quiet", "--engine", "spark",
                 "--spark-master", "local[2]"]) == 0
    assert calls == [1]                                   # the linkage stage ran on Spark, once
    for name in ("records.csv", "pairs.csv", "entities.csv", "blocking.csv", "findings.csv"):
        assert (tmp_path / "spark" / name).read_bytes() == (tmp_path / "local" / name).read_bytes(), name


def test_spark_engine_without_pyspark_says_how_to_install(monkeypatch, tmp_path, capsys):
    """No traceback, a non-zero exit and the install command, before any input is read."""
    monkeypatch.setitem(sys.modules, "pyspark", None)     # import pyspark now raises ImportError
    rc = main(["run", str(ROOT / "configs" / "sample.toml"), "--out", str(tmp_path / "out"), "--quiet",
               "--engine", "spark"])
    err = capsys.readouterr().err
    assert rc == 2
    assert "pip install linker[spark]" in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()


def test_spark_master_without_the_spark_engine_is_a_usage_error(tmp_path, capsys):
    rc = main(["run", str(ROOT / "configs" / "sample.toml"), "--out", str(tmp_path / "out"), "--quiet",
               "--spark-master", "local[2]"])
    assert rc == 2
    assert "--engine spark" in capsys.readouterr().err

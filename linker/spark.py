"""The linkage stage on Apache Spark: the local engine's own stage functions, run on a cluster.

:func:`link_records_spark` returns the same :class:`~linker.link.LinkResult` as
:func:`linker.link.link_records` (same candidate pairs and rule bitmask, same
comparison levels, the same fitted model and weights, the same entities), with
the work that grows with the number of *pairs* done by Spark:

blocking
    Spark joins on each rule's key columns (``pos_l < pos_r``).  Keys are
    cleaned by the very rules of :mod:`linker.blocking` (text stripped, empty
    and NA missing; one pandas function run per partition), block caps are
    applied and reported as :func:`linker.blocking.block` does (same blocks,
    same key text, same order, same warning).  ``near_id`` joins the variant
    keys of :func:`linker.blocking._variant_keys` (the same key text, made
    by Spark SQL string functions from the distinct identifiers); ``sorted_window`` ranks the records by (key,
    position) -- the local engine's stable order -- with a range-partitioned
    sort and pairs each rank with the ``window - 1`` ranks after it.  The rule
    bitmask is a ``bit_or`` over the union of the rules' pairs.
comparison and scoring
    ``mapInPandas`` over the pairs calling :func:`linker.compare.compare` and
    the fitted model's :meth:`~linker.model.FellegiSunter.score` per batch.
    The prepared tables (:func:`linker.compare.prepare_fields`) and the
    per-record term-frequency weights
    (:meth:`~linker.model.FellegiSunter.record_weights`), made once on the
    driver, are broadcast, so levels and weights are the local ones exactly.
fitting
    u from the same random pairs (:meth:`FellegiSunter.random_pairs`, same
    seed) compared in Spark; the comparison-pattern counts of the candidates
    and of the random pairs (split by whether they are candidates) are
    ``groupBy`` counts over the level columns; the driver fits on them with
    :meth:`FellegiSunter.fit_counts`, which gives the model :meth:`fit` gives.
entities
    Decisions are made in Spark.  When the links fit on the driver (at most
    ``max_driver_links``), :func:`linker.cluster.constrained_entities` runs
    there as in the local engine.  Otherwise connected components are found in
    Spark by large-star / small-star (Kiveris, Lattanzi, Mirrokni, Rastogi,
    Vassilvitskii: "Connected Components in MapReduce and Beyond", SoCC 2014),
    and only the links of components holding two or more trusted
    registration numbers (or a reviewer's cannot-link) are brought to the
    driver, where those components are split exactly as
    :func:`~linker.cluster.constrained_entities` splits them.

The driver holds what grows with the number of *records*: the prepared
comparison tables and the columns the clustering reads (registration number
and status), and in the end the scored pairs (the LinkResult holds them).

Records come as a pandas frame (row order = positions) or as a Spark
DataFrame with a position column (``pos``: 0..n-1), e.g. read by
:func:`read_records` from the Parquet that :func:`write_records_parquet`
writes: the two engines meet at Parquet.

pyspark and pyarrow are an optional extra (``pip install linker[spark]``);
without them :func:`require_spark` raises :class:`SparkUnavailable`.
"""

from __future__ import annotations

import os
import shutil
import sys
import time
import warnings
from functools import partial
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from .blocking import BlockRule, OversizedBlockWarning, reduction_ratio
from .cluster import constrained_entities, relabel_by_first
from .compare import FieldComparison, compare, prepare_fields
from .errors import LinkerError
from .link import (LinkageSettings, LinkResult, _unlinked, apply_reviews, linkage_columns, person_fields,
                   person_rules, threshold_decisions, trusted_ids)
from .model import DEFAULT_PERSON_GUARDS, FellegiSunter

__all__ = ["SparkUnavailable", "require_spark", "spark_session", "link_records_spark", "link_stage", "block_spark",
           "compare_spark", "candidate_patterns", "fit_spark", "spark_components", "write_records_parquet",
           "read_records", "read_records_pandas", "POSITION"]

POSITION = "pos"          # the position column of records handed to Spark (0..n-1, the local row order)
INSTALL_HINT = "pip install linker[spark]"


class SparkUnavailable(LinkerError):
    """The Spark engine was asked for but pyspark (or pyarrow) is not installed."""

    exit_code = 2


def require_spark() -> None:
    """Raise :class:`SparkUnavailable` naming the install command when pyspark or pyarrow is missing."""
    missing = []
    for name in ("pyspark", "pyarrow"):
        try:
            __import__(name)
        except ImportError:
            missing.append(name)
    if missing:
        raise SparkUnavailable(f"the Spark engine needs {' and '.join(missing)}, which "
                               f"{'is' if len(missing) == 1 else 'are'} not installed: {INSTALL_HINT}")


def _quiet(message: str) -> None:
    pass


# ---------------------------------------------------------------------------
# session and Parquet
# ---------------------------------------------------------------------------

def spark_session(master: str = "local[2]", conf: dict | None = None, app_name: str = "linker"):
    """A Spark session for the engine: UI off, few shuffle partitions, Arrow on, results to the driver unbounded.

    ``conf`` entries override the defaults.  With a ``local`` master the
    driver binds to 127.0.0.1 and the Python workers run this interpreter.
    Returns an existing session when one is running (Spark allows one per process).
    """
    require_spark()
    from pyspark.sql import SparkSession

    settings = {
        "spark.ui.enabled": "false",
        "spark.ui.showConsoleProgress": "false",
        "spark.sql.shuffle.partitions": "4",
        "spark.default.parallelism": "4",
        "spark.sql.execution.arrow.pyspark.enabled": "true",
        "spark.sql.execution.arrow.pyspark.fallback.enabled": "false",
        "spark.sql.execution.arrow.maxRecordsPerBatch": "100000",
        "spark.driver.memory": "4g",
        # the engine brings what grows with the records (prepared tables) and the scored pairs to the
        # driver by design: spark.driver.memory is the bound, not Spark's 1 GiB default on results
        "spark.driver.maxResultSize": "0",
    }
    if master.startswith("local"):
        settings.update({"spark.driver.bindAddress": "127.0.0.1", "spark.driver.host": "127.0.0.1",
                         "spark.pyspark.python": sys.executable, "spark.pyspark.driver.python": sys.executable})
    settings.update({str(k): str(v) for k, v in (conf or {}).items()})
    if SparkSession.getActiveSession() is None and not (os.environ.get("JAVA_HOME") or shutil.which("java")):
        raise SparkUnavailable("the Spark engine needs Java (17 or later): no java on the PATH and no JAVA_HOME")
    builder = SparkSession.builder.master(master).appName(app_name)
    for k, v in settings.items():
        builder = builder.config(k, v)
    try:
        spark = builder.getOrCreate()
    except Exception as err:   # the JVM did not start or the master is unreachable: say so, no traceback
        raise SparkUnavailable(f"could not start Spark with master {master!r}: {type(err).__name__}: "
                               f"{str(err).strip().splitlines()[0] if str(err).strip() else 'no detail'}") from None
    spark.sparkContext.setLogLevel("ERROR")
    return spark


def _arrow_table(frame: pd.DataFrame):
    """pyarrow table of a frame (pandas types kept in its metadata); an object column holding values of
    several types is written as text."""
    import pyarrow as pa

    fixed = {}
    for c in frame.columns:
        s = frame[c]
        if s.dtype != object:
            continue
        try:
            pa.Array.from_pandas(s)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            fixed[c] = s.astype(object).where(s.notna(), None).map(lambda v: v if v is None else str(v))
    if fixed:
        frame = frame.assign(**fixed)
    return pa.Table.from_pandas(frame, preserve_index=False)


def write_records_parquet(records: pd.DataFrame, path, rows_per_file: int = 250_000, start: int = 0) -> Path:
    """Write ``records`` (row order = positions) as a Parquet folder with the position column ``pos``.

    Files ``part-<first position>.parquet`` of at most ``rows_per_file``
    records, so Spark reads them side by side.  Column types are kept
    (pyarrow); an object column mixing value types is written as text.

    ``start`` > 0 adds the records to the folder as the records from
    position ``start`` on (a large delivery written a part at a time, say a
    file at a time); ``start`` = 0 replaces what the folder held.  Returns the folder.
    """
    require_spark()
    import pyarrow.parquet as pq

    if POSITION in records.columns:
        raise ValueError(f"write_records_parquet: records already have a column {POSITION!r}")
    if int(start) < 0:
        raise ValueError(f"write_records_parquet: start must be >= 0, got {start}")
    out = Path(path)
    out.mkdir(parents=True, exist_ok=True)
    if int(start) == 0:
        for old in out.glob("part-*.parquet"):
            old.unlink()
    rec = records.reset_index(drop=True)
    rec.insert(0, POSITION, np.arange(int(start), int(start) + len(rec), dtype=np.int64))
    step = max(int(rows_per_file), 1)
    for first in range(0, max(len(rec), 1), step):
        target = out / f"part-{int(start) + first:012d}.parquet"
        if target.exists():
            raise ValueError(f"write_records_parquet: {target.name} already exists in {out.name}: "
                             "positions overlap what was written before")
        tmp = target.with_suffix(".parquet.tmp")
        pq.write_table(_arrow_table(rec.iloc[first:first + step]), tmp)
        os.replace(tmp, target)
    return out


def read_records(spark, path, position: str = POSITION):
    """Records as a Spark DataFrame: a Parquet folder or file (:func:`write_records_parquet`), or a CSV
    file with a header (every column text, the position column cast to long)."""
    path = str(path)
    if path.lower().endswith(".csv"):
        from pyspark.sql import functions as F

        df = spark.read.csv(path, header=True, inferSchema=False)
        return df.withColumn(position, F.col(position).cast("long"))
    return spark.read.parquet(path)


def read_records_pandas(path, position: str = POSITION, columns: Sequence[str] | None = None) -> pd.DataFrame:
    """The records of a Parquet folder as the local engine takes them: ordered by position, without it
    (``columns``: only these, e.g. :func:`linker.link.linkage_columns`)."""
    require_spark()
    import pyarrow.parquet as pq

    p = Path(path)
    files = sorted(p.glob("*.parquet")) if p.is_dir() else [p]
    def columns_of(f):          # the asked-for columns this file has (an absent one is simply not read)
        if columns is None:
            return None
        have = set(pq.read_schema(f).names)
        return [c for c in dict.fromkeys([position, *columns]) if c in have]

    frame = pd.concat([pq.read_table(f, columns=columns_of(f)).to_pandas() for f in files], ignore_index=True)
    frame = frame.sort_values(position, kind="stable").reset_index(drop=True)
    return frame.drop(columns=[position])


def _to_spark(spark, frame: pd.DataFrame):
    """A Spark DataFrame of a pandas frame through Arrow."""
    table = _arrow_table(frame)
    try:
        return spark.createDataFrame(table)            # pyspark >= 4 takes a pyarrow table
    except (TypeError, ValueError):
        return spark.createDataFrame(table.to_pandas())


# ---------------------------------------------------------------------------
# records: pandas frame or Spark DataFrame
# ---------------------------------------------------------------------------

class _Records:
    """The records as the engine sees them: a driver frame (pandas, row = position) of the columns the
    driver needs, the Spark frame (when given one) and ``n``."""

    def __init__(self, spark, records, position: str):
        from pyspark.sql import DataFrame as SparkFrame

        self.spark = spark
        self.position = position
        if isinstance(records, SparkFrame):
            self.sdf = records
            if position not in records.columns:
                raise ValueError(f"records: the Spark DataFrame has no position column {position!r}")
            from pyspark.sql import functions as F

            row = records.agg(F.count(F.lit(1)).alias("n"), F.min(position).alias("lo"),
                              F.max(position).alias("hi"),
                              F.countDistinct(position).alias("distinct")).collect()[0]
            self.n = int(row["n"])
            if self.n and (row["lo"] != 0 or row["hi"] != self.n - 1 or row["distinct"] != self.n):
                raise ValueError(f"records: the position column {position!r} must hold 0..{self.n - 1} once each")
            self.pdf = None
            self.columns = [c for c in records.columns if c != position]
        else:
            self.sdf = None
            self.pdf = records.reset_index(drop=True)
            self.n = len(self.pdf)
            self.columns = list(self.pdf.columns)

    def driver_frame(self, columns: Sequence[str]) -> pd.DataFrame:
        """The named columns (those present) for every record, in position order."""
        cols = [c for c in dict.fromkeys(columns) if c in self.columns]
        if self.pdf is not None:
            return self.pdf
        if not cols:
            return pd.DataFrame(index=pd.RangeIndex(self.n))
        frame = self.sdf.select(self.position, *cols).toPandas()
        order = np.argsort(frame[self.position].to_numpy(dtype=np.int64), kind="stable")
        frame = frame.iloc[order].reset_index(drop=True).drop(columns=[self.position])
        return _integral_as_int(frame, self.sdf.schema, cols)

    def rows(self, positions: Sequence[int], columns: Sequence[str]) -> pd.DataFrame:
        """A few records' columns (index = position), values as the local engine's frame holds them."""
        positions = sorted({int(p) for p in positions})
        if self.pdf is not None:
            return self.pdf.iloc[positions][list(columns)].set_axis(positions)
        from pyspark.sql import functions as F

        frame = self.sdf.where(F.col(self.position).isin(positions)).select(self.position, *columns).toPandas()
        frame = _integral_as_int(frame, self.sdf.schema, list(columns))
        return frame.set_index(self.position).loc[positions]


def _integral_as_int(frame: pd.DataFrame, schema, columns) -> pd.DataFrame:
    """Integer Spark columns with nulls come to pandas as floats; make them nullable integers again
    (as pandas reads the same Parquet), so their text is ``1980``, not ``1980.0``."""
    from pyspark.sql.types import ByteType, IntegerType, LongType, ShortType

    types = {f.name: f.dataType for f in schema.fields}
    for c in columns:
        if isinstance(types.get(c), (ByteType, ShortType, IntegerType, LongType)) and frame[c].dtype.kind == "f":
            frame[c] = pd.array(frame[c], dtype="Int64")
    return frame


def _clean_key(values: pd.Series, text: bool = False) -> pd.Series:
    """One blocking key column as :func:`linker.blocking._column_codes` sees it: text stripped, empty
    text and NA missing (None); other types as they are (NA missing).  ``text``: non-text values as
    their ``str`` (the identifiers of ``near_id``)."""
    values = pd.Series(values).reset_index(drop=True)
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    u = pd.Series(uniques)
    if u.dtype == object or pd.api.types.is_string_dtype(u.dtype) or text:
        u = u.astype(object).astype(str).str.strip()
        u = u.where(u != "", None)
        return pd.Series(np.append(u.to_numpy(dtype=object), None)[codes], dtype=object)
    return values


def _key_columns(rules: Sequence[BlockRule]) -> dict[tuple[str, bool], str]:
    """(record column, as text) -> name of its cleaned key column."""
    out: dict[tuple[str, bool], str] = {}
    for r in rules:
        for c in r.columns:
            key = (c, r.kind == "near_id")
            if key not in out:
                out[key] = f"k{len(out)}"
    return out


def _clean_partition(spec: list, position: str, batches):
    for b in batches:
        out = pd.DataFrame({position: b[position].to_numpy(dtype=np.int64)})
        for col, text, name in spec:
            out[name] = _clean_key(b[col], text=text).to_numpy()
        yield out


def _keys_frame(rec: _Records, rules: Sequence[BlockRule]):
    """Spark frame of ``pos`` and every rule's cleaned key columns."""
    from pyspark.sql import functions as F
    from pyspark.sql.types import DoubleType, FloatType, LongType, StringType, StructField, StructType

    names = _key_columns(rules)
    pos = rec.position
    if rec.pdf is not None:
        frame = pd.DataFrame({pos: np.arange(rec.n, dtype=np.int64)})
        for (col, text), name in names.items():
            frame[name] = _clean_key(rec.pdf[col], text=text)
        return _to_spark(rec.spark, frame)
    types = {f.name: f.dataType for f in rec.sdf.schema.fields}
    spec, fields, passthrough = [], [StructField(pos, LongType(), False)], []
    for (col, text), name in names.items():
        if isinstance(types[col], StringType) or text:
            if text and isinstance(types[col], (DoubleType, FloatType)):
                raise ValueError(f"block: near_id column {col!r} must hold text or integers, not floats")
            spec.append((col, text, name))
            fields.append(StructField(name, StringType(), True))
        else:
            passthrough.append((col, name))
    # text keys are cleaned in pandas, per partition; an integer identifier becomes its digits first
    src_cols = [F.col(pos)] + [F.col(c).cast("string").alias(c) if not isinstance(types[c], StringType) else
                               F.col(c) for c in dict.fromkeys(c for c, _, _ in spec)]
    src = rec.sdf.select(*src_cols)
    keyed = src.mapInPandas(partial(_clean_partition, spec, pos), StructType(fields)) if spec else \
        src.select(pos)
    if passthrough:
        extra = rec.sdf.select(pos, *[_numeric_key(F.col(c), types[c]).alias(n) for c, n in passthrough])
        keyed = keyed.join(extra, on=pos)
    return keyed


def _numeric_key(col, dtype):
    from pyspark.sql import functions as F
    from pyspark.sql.types import DoubleType, FloatType

    if isinstance(dtype, (DoubleType, FloatType)):
        return F.when(F.isnan(col), F.lit(None)).otherwise(col)
    return col


# ---------------------------------------------------------------------------
# blocking
# ---------------------------------------------------------------------------

def _pairs_on(members, cols: list[str], pos: str):
    """All pairs (left < right) of members sharing the key ``cols``."""
    from pyspark.sql import functions as F

    a = members.select(F.col(pos).alias("left"), *cols)
    b = members.select(F.col(pos).alias("right"), *cols)
    return a.join(b, on=cols).where(F.col("left") < F.col("right")).select("left", "right")


def _all_not_null(cols):
    from pyspark.sql import functions as F

    cond = F.col(cols[0]).isNotNull()
    for c in cols[1:]:
        cond = cond & F.col(c).isNotNull()
    return cond


# Each rule is worked in two steps so that blocking needs two Spark jobs whatever the rules: first
# every rule's facts for the driver (capped blocks; partition sizes of the window sort) in one
# collect, then every rule's pairs in one union.  A fact row: rule, part (0 block, 1 variant
# group, 2 window partition), first (smallest position, or the partition), size, key, an_id.

def _fact_rows(frame, k: int, part: int, first, size, key=None, an_id=None):
    from pyspark.sql import functions as F

    return frame.select(F.lit(k).alias("rule"), F.lit(part).alias("part"), first.cast("long").alias("first"),
                        size.cast("long").alias("size"),
                        (key if key is not None else F.lit(None)).cast("string").alias("key"),
                        (an_id if an_id is not None else F.lit(None)).cast("string").alias("an_id"))


class _ExactRule:
    def __init__(self, k, keys, rec: _Records, rule: BlockRule, names: dict, keep: list):
        from pyspark import StorageLevel
        from pyspark.sql import Window
        from pyspark.sql import functions as F

        self.rule, self.rec = rule, rec
        pos = rec.position
        self.cols = cols = [names[(c, False)] for c in rule.columns]
        block = Window.partitionBy(*cols)
        # every member with its block's size and first position: one shuffle, kept for both steps
        self.members = keys.select(pos, *cols).where(_all_not_null(cols)) \
            .select(pos, *cols, F.count(F.lit(1)).over(block).alias("size"), F.min(pos).over(block).alias("first")) \
            .where(F.col("size") >= 2).persist(StorageLevel.MEMORY_AND_DISK)
        keep.append(self.members)
        self.facts = None if rule.cap is None else _fact_rows(
            self.members.where(F.col("size") > int(rule.cap)).select("first", "size").distinct(), k, 0,
            F.col("first"), F.col("size"))

    def finish(self, facts: list):
        from pyspark.sql import functions as F

        rule, capped = self.rule, []
        over = sorted((int(r["first"]), int(r["size"])) for r in facts)
        if over:
            raw = self.rec.rows([f for f, _ in over], rule.columns)
            capped = [{"rule": rule.name, "key": "|".join(str(raw.at[f, c]) for c in rule.columns), "size": n}
                      for f, n in over]
        members = self.members if rule.cap is None else self.members.where(F.col("size") <= int(rule.cap))
        return _pairs_on(members, self.cols, self.rec.position), capped


def _variant_frame(ids):
    """The variant keys of :func:`linker.blocking._variant_keys` in Spark SQL: per position p the id with
    its p-th character masked (``12?45678``), per adjacent pair of different characters the id with
    the pair put in order between ``<`` and ``>`` (``12<34>5678``)."""
    from pyspark.sql import functions as F

    subs = F.expr("transform(sequence(0, length(id) - 1), "
                  "p -> concat(substring(id, 1, p), '?', substring(id, p + 2)))")
    swaps = F.expr("filter(transform(sequence(0, greatest(length(id) - 2, 0)), "
                   "p -> CASE WHEN length(id) >= 2 AND substring(id, p + 1, 1) != substring(id, p + 2, 1) "
                   "THEN concat(substring(id, 1, p), '<', least(substring(id, p + 1, 1), substring(id, p + 2, 1)), "
                   "greatest(substring(id, p + 1, 1), substring(id, p + 2, 1)), '>', substring(id, p + 3)) END), "
                   "k -> k IS NOT NULL)")
    return ids.select("id", "n_rec", "first", F.explode(F.concat(subs, swaps)).alias("vkey"))


def _variant_order(vkey: str, an_id: str) -> tuple:
    """Where :func:`linker.blocking._variant_codes` numbers a variant group: by id length, then
    substitutions before transpositions, then by position (the group's first-seen id comes last)."""
    length = len(an_id)
    p = 0
    while p < min(len(vkey), length) and vkey[p] == an_id[p]:
        p += 1
    return (length, 0 if len(vkey) == length else 1, p)


class _NearIdRule:
    def __init__(self, k, keys, rec: _Records, rule: BlockRule, names: dict, keep: list):
        from pyspark import StorageLevel
        from pyspark.sql import Window
        from pyspark.sql import functions as F

        self.rule, self.rec = rule, rec
        pos = rec.position
        col = names[(rule.columns[0], True)]
        self.k = keys.select(pos, F.col(col).alias("id")).where(F.col("id").isNotNull())
        self.ids = self.k.groupBy("id").agg(F.count(F.lit(1)).alias("n_rec"), F.min(pos).alias("first")) \
            .persist(StorageLevel.MEMORY_AND_DISK)
        keep.append(self.ids)
        group = Window.partitionBy("vkey")
        # variant groups of two or more ids, each member with the group's record count and first position
        self.groups = _variant_frame(self.ids).select(
            "vkey", "id", F.count(F.lit(1)).over(group).alias("n_ids"), F.sum("n_rec").over(group).alias("size"),
            F.min("first").over(group).alias("first"), F.min("id").over(group).alias("an_id")) \
            .where(F.col("n_ids") >= 2).persist(StorageLevel.MEMORY_AND_DISK)
        keep.append(self.groups)
        self.facts = None
        if rule.cap is not None:
            cap = int(rule.cap)
            same = _fact_rows(self.ids.where(F.col("n_rec") > cap), k, 0, F.col("first"), F.col("n_rec"),
                              F.col("id"))
            near = _fact_rows(self.groups.where(F.col("size") > cap).select("vkey", "size", "first", "an_id")
                              .distinct(), k, 1, F.col("first"), F.col("size"), F.col("vkey"), F.col("an_id"))
            self.facts = same.unionByName(near)

    def finish(self, facts: list):
        from pyspark.sql import functions as F

        rule, pos, cap = self.rule, self.rec.position, self.rule.cap
        same_rows = sorted((r for r in facts if r["part"] == 0), key=lambda r: int(r["first"]))
        near_rows = sorted((r for r in facts if r["part"] == 1),
                           key=lambda r: _variant_order(r["key"], r["an_id"]) + (int(r["first"]),))
        capped = [{"rule": rule.name, "key": str(r["key"]), "size": int(r["size"])} for r in same_rows + near_rows]
        # identical ids: pairs within the id's own block
        n_rec = F.col("n_rec")
        same_ok = self.ids.where((n_rec >= 2) & (n_rec <= int(cap)) if cap is not None else n_rec >= 2)
        same = _pairs_on(self.k.join(same_ok.select("id"), on="id"), ["id"], pos)
        # distinct ids one edit apart: ids sharing a variant key, then their records
        v = (self.groups if cap is None else self.groups.where(F.col("size") <= int(cap))).select("vkey", "id")
        id_pairs = v.select("vkey", F.col("id").alias("ida")) \
            .join(v.select("vkey", F.col("id").alias("idb")), on="vkey") \
            .where(F.col("ida") < F.col("idb")).select("ida", "idb").distinct()
        ka = self.k.select(F.col(pos).alias("pa"), F.col("id").alias("ida"))
        kb = self.k.select(F.col(pos).alias("pb"), F.col("id").alias("idb"))
        near = id_pairs.join(ka, on="ida").join(kb, on="idb") \
            .select(F.least("pa", "pb").alias("left"), F.greatest("pa", "pb").alias("right"))
        return same.unionByName(near), capped


class _WindowRule:
    """Records ranked by (key, position) -- the local engine's stable order -- by a range-partitioned
    sort: ids increase within each partition, and the partition sizes give each partition's first rank."""

    def __init__(self, k, keys, rec: _Records, rule: BlockRule, names: dict, keep: list):
        from pyspark import StorageLevel
        from pyspark.sql import functions as F

        self.rule, self.rec = rule, rec
        pos = rec.position
        col = names[(rule.columns[0], False)]
        partitions = max(int(rec.spark.conf.get("spark.sql.shuffle.partitions", "4")),
                         int(rec.spark.sparkContext.defaultParallelism))
        s = keys.select(pos, F.col(col).alias("key")).where(F.col("key").isNotNull())
        # persisted: the pairs are built on the very partitioning the sizes were counted on
        self.sorted = s.repartitionByRange(partitions, "key", pos).sortWithinPartitions("key", pos) \
            .withColumn("mid", F.monotonically_increasing_id()).select(pos, "mid") \
            .persist(StorageLevel.MEMORY_AND_DISK)
        keep.append(self.sorted)
        part = F.shiftright("mid", 33)
        per = self.sorted.groupBy(part.alias("part")).agg(F.count(F.lit(1)).alias("size"))
        self.facts = _fact_rows(per, k, 2, F.col("part"), F.col("size"))

    def finish(self, facts: list):
        from pyspark.sql import functions as F

        pos = self.rec.position
        sizes = {int(r["first"]): int(r["size"]) for r in facts}
        top = max(sizes) + 1 if sizes else 1
        offsets = np.concatenate(([0], np.cumsum([sizes.get(p, 0) for p in range(top)])))[:top]
        offset = F.element_at(F.array(*[F.lit(int(o)) for o in offsets]),
                              (F.shiftright("mid", 33) + 1).cast("int"))
        ranked = self.sorted.select(pos, (offset + F.col("mid").bitwiseAND(F.lit((1 << 33) - 1))).alias("rank"))
        steps = F.explode(F.array(*[F.lit(d) for d in range(1, int(self.rule.window))]))
        ahead = ranked.select(F.col(pos).alias("pa"), F.col("rank").alias("r0"), steps.alias("step")) \
            .select("pa", (F.col("r0") + F.col("step")).alias("rank"))
        pairs = ahead.join(ranked.select(F.col(pos).alias("pb"), "rank"), on="rank") \
            .select(F.least("pa", "pb").alias("left"), F.greatest("pa", "pb").alias("right"))
        return pairs, []


_RULES = {"exact": _ExactRule, "near_id": _NearIdRule, "sorted_window": _WindowRule}


def block_spark(spark, records, rules: Sequence[BlockRule], *, position: str = POSITION, _keep=None):
    """Candidate pairs from the union of ``rules``, computed in Spark; as :func:`linker.blocking.block`
    with ``return_capped=True``.

    ``records`` is a pandas frame or a Spark DataFrame with the position
    column.  Returns ``(pairs, report, capped)``: ``pairs`` a Spark DataFrame
    of ``left``, ``right`` (positions, left < right, unique) and ``rules``
    (int64 bitmask), persisted; ``report`` and ``capped`` pandas frames equal
    to block()'s.  The same :class:`~linker.blocking.OversizedBlockWarning` is
    issued per rule with capped blocks.
    """
    require_spark()
    rec = records if isinstance(records, _Records) else _Records(spark, records, position)
    return _block(rec, list(rules), _keep if _keep is not None else [])


def _block(rec: _Records, rules: list[BlockRule], keep: list):
    from pyspark import StorageLevel
    from pyspark.sql import functions as F

    names_ = [r.name for r in rules]
    if len(set(names_)) != len(names_):
        raise ValueError(f"block: rule names must be unique, got {names_}")
    if len(rules) > 63:
        raise ValueError(f"block: at most 63 rules, got {len(rules)}")
    if not rules:
        raise ValueError("block: at least one rule is needed")
    missing = sorted({c for r in rules for c in r.columns} - set(rec.columns))
    if missing:
        raise ValueError(f"block: records lack column(s) {missing} named by the rules")
    names = _key_columns(rules)
    keys = _keys_frame(rec, rules).persist(StorageLevel.MEMORY_AND_DISK)
    keep.append(keys)
    workers = [_RULES[r.kind](k, keys, rec, r, names, keep) for k, r in enumerate(rules)]
    queries = [w.facts for w in workers if w.facts is not None]
    facts = []
    if queries:
        union = queries[0]
        for q in queries[1:]:
            union = union.unionByName(q)
        facts = union.collect()                                   # job 1: what the driver must know
    tagged, rows, capped_all = None, [], []
    for k, (rule, w) in enumerate(zip(rules, workers)):
        pairs, capped = w.finish([r for r in facts if r["rule"] == k])
        t = pairs.select("left", "right", F.lit(1 << k).cast("long").alias("bit"))
        tagged = t if tagged is None else tagged.unionByName(t)
        rows.append({"rule": rule.name, "kind": rule.kind, "capped_blocks": len(capped),
                     "capped_records": int(sum(c["size"] for c in capped))})
        capped_all += capped
        if capped:
            warnings.warn(OversizedBlockWarning(
                f"blocking rule {rule.name!r}: {len(capped)} block(s) over the cap of {rule.cap} records "
                f"left unexpanded (largest {max(c['size'] for c in capped)} records)"), stacklevel=3)
    pairs = tagged.groupBy("left", "right").agg(F.bit_or("bit").alias("rules")) \
        .persist(StorageLevel.MEMORY_AND_DISK)
    keep.append(pairs)
    aggs = [F.count(F.lit(1)).alias("union")]
    for k in range(len(rules)):
        bit, low = 1 << k, (1 << k) - 1
        aggs.append(F.sum(F.col("rules").bitwiseAND(F.lit(bit)).cast("boolean").cast("long")).alias(f"p{k}"))
        aggs.append(F.sum((F.col("rules").bitwiseAND(F.lit(bit | low)) == F.lit(bit)).cast("long"))
                    .alias(f"n{k}"))
    counts = pairs.agg(*aggs).collect()[0]                        # job 2: the pairs, counted per rule
    report_rows = []
    for k, r in enumerate(rows):
        report_rows.append({"rule": r["rule"], "kind": r["kind"], "pairs": int(counts[f"p{k}"] or 0),
                            "new_pairs": int(counts[f"n{k}"] or 0), "capped_blocks": r["capped_blocks"],
                            "capped_records": r["capped_records"]})
    union = int(counts["union"])
    report_rows.append({"rule": "(union)", "kind": "", "pairs": union, "new_pairs": union,
                        "capped_blocks": sum(r["capped_blocks"] for r in rows),
                        "capped_records": sum(r["capped_records"] for r in rows)})
    report = pd.DataFrame(report_rows, columns=["rule", "kind", "pairs", "new_pairs", "capped_blocks",
                                                "capped_records"])
    capped_df = pd.DataFrame(capped_all, columns=["rule", "key", "size"])
    return pairs, report, capped_df


# ---------------------------------------------------------------------------
# comparison, fitting, scoring
# ---------------------------------------------------------------------------

def _level_names(fields) -> list[str]:
    return [f"lv{j}" for j in range(len(fields))]


def _compare_partition(bc, fields, batches):
    state = bc.value
    stub, prepared = state["stub"], state["prepared"]
    names = _level_names(fields)
    for b in batches:
        lev = compare(stub, (b["left"].to_numpy(dtype=np.int64), b["right"].to_numpy(dtype=np.int64)), fields,
                      prepared=prepared, workers=1)
        out = b.copy()
        for j, name in enumerate(names):
            out[name] = lev[:, j]
        yield out


def compare_spark(pairs, bc, fields: Sequence[FieldComparison]):
    """``pairs`` (Spark: ``left``, ``right``, any other columns) with one int8 level column per field
    (``lv0``...), from :func:`linker.compare.compare` on each batch with the broadcast prepared tables
    (``bc.value``: ``{"prepared": ..., "stub": a frame of n rows}``)."""
    from pyspark.sql.types import ByteType, StructField, StructType

    fields = tuple(fields)
    schema = StructType(list(pairs.schema.fields) + [StructField(n, ByteType(), False) for n in _level_names(fields)])
    return pairs.mapInPandas(partial(_compare_partition, bc, fields), schema)


def _pattern_frame(rows: pd.DataFrame, fields) -> tuple[np.ndarray, np.ndarray]:
    names = _level_names(fields)
    if rows.empty:
        return np.zeros((0, len(fields)), dtype=np.int64), np.zeros(0)
    return rows[names].to_numpy(dtype=np.int64), rows["count"].to_numpy(dtype=np.float64)


def candidate_patterns(levels, fields) -> pd.DataFrame:
    """Comparison-pattern counts of the pairs in ``levels`` (a groupBy over the level columns)."""
    return levels.groupBy(*_level_names(fields)).count().toPandas()


def fit_spark(spark, model: FellegiSunter, n_records: int, levels, pairs, bc, tf_frame: pd.DataFrame,
              n_pairs: int, cand: pd.DataFrame | None = None) -> FellegiSunter:
    """Fit ``model`` on Spark aggregates: the candidates' pattern counts (``levels``: Spark frame with
    the level columns, or ``cand`` from :func:`candidate_patterns`), the random pairs compared in Spark
    (split by whether they are candidates: ``pairs`` holds ``left``, ``right``) and the value counts of
    ``tf_frame``; then :meth:`FellegiSunter.fit_counts` on the driver."""
    from pyspark.sql import functions as F

    fields = model.fields
    names = _level_names(fields)
    model._check_settings()
    if cand is None:
        cand = candidate_patterns(levels, fields)
    cand_patterns, cand_counts = _pattern_frame(cand, fields)
    n_levels = [len(f.levels) for f in fields]
    if model.needs_random_pairs():
        rl, rr = model.random_pairs(int(n_records))
        rand = _to_spark(spark, pd.DataFrame({"left": rl, "right": rr}))
        rlev = compare_spark(rand, bc, fields)
        # the random pairs are few (u_sample): broadcast them against the candidates, not the reverse
        hits = pairs.select("left", "right").join(F.broadcast(rand.distinct()), on=["left", "right"]) \
            .select("left", "right", F.lit(True).alias("cand"))
        flagged = rlev.join(F.broadcast(hits), on=["left", "right"], how="left")
        counts = flagged.groupBy(*names, F.coalesce(F.col("cand"), F.lit(False)).alias("cand")).count().toPandas()
        pat, cnt = _pattern_frame(counts, fields)
        random_level_counts = [np.bincount(pat[:, j], weights=cnt, minlength=n_levels[j]).round().astype(np.int64)
                               for j in range(len(fields))]
        other = counts[~counts["cand"].astype(bool)] if len(counts) else counts
        other_patterns, other_counts = _pattern_frame(other, fields)
    else:
        random_level_counts = [np.zeros(0, dtype=np.int64) for _ in fields]
        other_patterns, other_counts = np.zeros((0, len(fields)), dtype=np.int64), np.zeros(0)
    if model.em_pairs != "all":
        other_patterns, other_counts = np.zeros((0, len(fields)), dtype=np.int64), np.zeros(0)
    return model.fit_counts(n_records, cand_patterns, cand_counts, random_level_counts, other_patterns,
                            other_counts, model.tf_value_counts(tf_frame), n_distinct_candidates=n_pairs)


def _score_partition(bc_model, bc_weights, fields, link_at: float, review_at: float, batches):
    # the model reads of the records only their term-frequency weights, made once on the driver
    model, record_weights = bc_model.value, bc_weights.value
    names = _level_names(fields)
    for b in batches:
        levels = b[names].to_numpy(dtype=np.int8)
        s = model.score(None, b[["left", "right"]], levels, record_weights=record_weights)
        p = s["probability"].to_numpy()
        out = b.copy()
        out["weight"] = s["weight"].to_numpy()
        out["probability"] = p
        out["decision"] = threshold_decisions(p, link_at, review_at)
        yield out


def _score_spark(levels, bc_model, bc_weights, fields, settings: LinkageSettings):
    from pyspark.sql.types import DoubleType, StringType, StructField, StructType

    schema = StructType(list(levels.schema.fields) + [StructField("weight", DoubleType(), False),
                                                      StructField("probability", DoubleType(), False),
                                                      StructField("decision", StringType(), False)])
    return levels.mapInPandas(partial(_score_partition, bc_model, bc_weights, tuple(fields), float(settings.link_at),
                                      float(settings.review_at)), schema)


# ---------------------------------------------------------------------------
# connected components: large-star / small-star
# ---------------------------------------------------------------------------

def _star_rounds(spark, edges, max_rounds: int = 200):
    """Connected components by alternating large-star and small-star (Kiveris et al., SoCC 2014).

    ``edges``: Spark frame of ``u``, ``v`` (u > v).  Returns a star forest
    (u, v): every node of a component points to the component's smallest node.
    One Spark job per round: the round's edges are materialized (a local
    checkpoint, which also cuts the plan) by the check that decides convergence.
    """
    from pyspark.sql import functions as F

    e = edges.distinct().localCheckpoint(eager=False)
    held = [e]
    try:
        for _ in range(max_rounds):
            # large-star: each node x links its larger neighbours to m(x) = min(x, neighbours of x)
            both = e.select(F.col("u").alias("x"), F.col("v").alias("y")).unionByName(
                e.select(F.col("v").alias("x"), F.col("u").alias("y")))
            low = both.groupBy("x").agg(F.least(F.min("y"), F.col("x")).alias("m"))
            large = both.join(low, on="x").where(F.col("y") > F.col("x")) \
                .select(F.col("y").alias("u"), F.col("m").alias("v")).distinct()
            # small-star: each node u links itself and its smaller neighbours to the smallest of them
            low = large.groupBy("u").agg(F.min("v").alias("m"))
            small = large.join(low, on="u").where(F.col("v") != F.col("m")) \
                .select(F.col("v").alias("u"), F.col("m").alias("v")) \
                .unionByName(low.select("u", F.col("m").alias("v"))).distinct()
            # the plan of a round names the last round's edges four times: cut it at every round
            small = small.localCheckpoint(eager=False)
            # converged when the edges are stars: every node has one parent and no parent has one
            parents = small.select(F.col("v").alias("p")).distinct()
            stats = small.join(parents, small["u"] == parents["p"], "left").agg(
                F.count(F.lit(1)).alias("edges"), F.countDistinct("u").alias("children"),
                F.count("p").alias("parents_with_parent")).collect()[0]
            e = small
            held.append(e)
            if stats["edges"] == stats["children"] and stats["parents_with_parent"] == 0:
                return e.toPandas()
        raise RuntimeError(f"connected components did not converge in {max_rounds} rounds")
    finally:
        for df in held:
            df.unpersist()


def spark_components(spark, edges, n_records: int, left: str = "left", right: str = "right") -> np.ndarray:
    """Entity label per record (as :func:`linker.cluster.connected_entities`) of the links in the Spark
    frame ``edges`` (record positions ``left``, ``right``), by large-star / small-star in Spark."""
    from pyspark.sql import functions as F

    e = edges.select(F.greatest(left, right).cast("long").alias("u"), F.least(left, right).cast("long").alias("v")) \
        .where(F.col("u") != F.col("v"))
    stars = _star_rounds(spark, e)
    labels = np.arange(int(n_records), dtype=np.int64)
    labels[stars["u"].to_numpy(dtype=np.int64)] = stars["v"].to_numpy(dtype=np.int64)
    return relabel_by_first(labels)


def _entities_spark(spark, n, links, ids, overwhelming, cannot, must, report):
    """constrained_entities at scale: components in Spark; only components holding two or more trusted
    identifiers (or both records of a cannot-link) are brought to the driver and split there."""
    from pyspark.sql import functions as F

    edges = links.select("left", "right")
    if len(must):
        edges = edges.unionByName(_to_spark(spark, pd.DataFrame({"left": must[:, 0].astype(np.int64),
                                                                 "right": must[:, 1].astype(np.int64)})))
    labels = spark_components(spark, edges, n)
    has = ids != ""
    distinct = pd.DataFrame({"label": labels[has], "id": ids[has]}).drop_duplicates()
    multi = distinct["label"].value_counts()
    suspect = set(multi.index[multi.to_numpy() > 1].tolist())
    suspect |= {int(labels[a]) for a, b in cannot if labels[a] == labels[b]}
    if not suspect:
        return labels
    members = np.flatnonzero(np.isin(labels, np.array(sorted(suspect), dtype=np.int64)))
    nodes = _to_spark(spark, pd.DataFrame({"left": members.astype(np.int64)}))
    sub = links.join(F.broadcast(nodes), on="left").select("left", "right", "weight").toPandas()
    order = np.lexsort((sub["right"].to_numpy(), sub["left"].to_numpy()))
    sub = sub.iloc[order]
    inner = constrained_entities(n, sub["left"].to_numpy(), sub["right"].to_numpy(), sub["weight"].to_numpy(),
                                 ids, overwhelming=overwhelming, cannot=cannot, must=must, report=report)
    out = labels.copy()
    out[members] = labels.max() + 1 + inner[members]
    return relabel_by_first(out)


# ---------------------------------------------------------------------------
# the stage
# ---------------------------------------------------------------------------

def link_records_spark(spark, records, settings: LinkageSettings = LinkageSettings(),
                       progress: Callable[[str], None] = _quiet, decisions: pd.DataFrame | None = None, *,
                       rules: Sequence[BlockRule] | None = None, fields: Sequence[FieldComparison] | None = None,
                       max_driver_links: int = 20_000_000, position: str = POSITION) -> LinkResult:
    """:func:`linker.link.link_records` on Spark: block, compare, fit, score, decide and cluster.

    ``records``: a pandas frame (row order = positions) or a Spark DataFrame
    with the position column.  ``rules`` / ``fields`` replace the person
    rules and fields of the settings (for other record schemas).  Links are
    clustered on the driver when there are at most ``max_driver_links`` of
    them, else in Spark (see the module docstring).  Returns the LinkResult
    ``link_records`` returns for the same records (``info`` adds ``engine``
    and ``clustering``).
    """
    require_spark()
    from pyspark import StorageLevel
    from pyspark.sql import functions as F

    fields = tuple(person_fields(settings) if fields is None else fields)
    rules = tuple(person_rules(settings) if rules is None else rules)
    rec = _Records(spark, records, position)
    n = rec.n
    keep: list = []
    broadcasts: list = []
    t: dict[str, float] = {}
    try:
        t0 = time.perf_counter()
        pairs_sdf, report, capped = _block(rec, list(rules), keep)
        n_pairs = int(report["pairs"].iloc[-1])
        t["block_s"] = time.perf_counter() - t0
        need = linkage_columns(settings, rules=False, decisions=decisions is not None)
        if n < 3 or n_pairs == 0:
            pairs = _collect_sorted(pairs_sdf, ["left", "right", "rules"])
            return _unlinked(rec.driver_frame(need), pairs, fields, rules, report, capped, settings)
        progress(f"blocking: {n_pairs} candidate pairs")
        t0 = time.perf_counter()
        frame = rec.driver_frame(need)
        prepared = prepare_fields(frame, fields)
        sc = spark.sparkContext
        bc = sc.broadcast({"prepared": prepared, "stub": pd.DataFrame(index=pd.RangeIndex(n))})
        broadcasts.append(bc)
        levels = compare_spark(pairs_sdf, bc, fields).persist(StorageLevel.MEMORY_AND_DISK)
        keep.append(levels)
        cand = candidate_patterns(levels, fields)           # the job that compares (and keeps) the levels
        t["compare_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        model = FellegiSunter(fields, seed=settings.seed, u_sample=settings.random_pairs,
                              classes=settings.latent_classes, max_iter=settings.max_iter,
                              guards=DEFAULT_PERSON_GUARDS if settings.guards else ())
        tf_cols = list(dict.fromkeys(f.columns[0] for f in fields if f.name in model._tf_names()))
        tf_frame = frame[tf_cols].reset_index(drop=True)
        fit_spark(spark, model, n, levels, pairs_sdf, bc, tf_frame, n_pairs, cand=cand)
        t["fit_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        bc_model, bc_weights = sc.broadcast(model), sc.broadcast(model.record_weights(tf_frame))
        broadcasts += [bc_model, bc_weights]
        scored_sdf = _score_spark(levels, bc_model, bc_weights, fields, settings).persist(StorageLevel.MEMORY_AND_DISK)
        keep.append(scored_sdf)
        names = _level_names(fields)
        # the decisions are the thresholds' on the driver too (not carried over as text: memory at scale)
        s = _collect_sorted(scored_sdf, ["left", "right", "rules", *names, "weight", "probability"])
        t["score_s"] = time.perf_counter() - t0
        progress(f"model: EM {'converged' if model.converged_ else 'did not converge'} "
                 f"after {model.n_iter_} iterations")
        level_matrix = np.empty((len(s), len(names)), dtype=np.int8)
        for j, name in enumerate(names):
            level_matrix[:, j] = s.pop(name).to_numpy(dtype=np.int8)
        scores = pd.DataFrame({"left": s.pop("left").to_numpy(dtype=np.int64),
                               "right": s.pop("right").to_numpy(dtype=np.int64),
                               "weight": s.pop("weight").to_numpy(dtype=np.float64),
                               "probability": s.pop("probability").to_numpy(dtype=np.float64)})
        scores["rules"] = s.pop("rules").to_numpy(dtype=np.int64)
        del s
        scores["decision"] = threshold_decisions(scores["probability"].to_numpy(), settings.link_at,
                                                 settings.review_at)
        dec, must, cannot = apply_reviews(scores, frame, decisions)
        linked = scores["decision"].to_numpy() == "link"
        t0 = time.perf_counter()
        left, right = scores["left"].to_numpy(), scores["right"].to_numpy()
        unresolved: list = []
        ids = trusted_ids(frame)
        n_links = int(linked.sum())
        if n_links <= int(max_driver_links):
            clustering = "driver"
            labels = constrained_entities(n, left[linked], right[linked], scores["weight"].to_numpy()[linked],
                                          ids, overwhelming=settings.override_weight, cannot=cannot, must=must,
                                          report=unresolved)
        else:
            clustering = "spark"
            links = scored_sdf
            if len(dec):
                d = _to_spark(spark, dec[["left", "right", "decision"]].rename(columns={"decision": "reviewed"}))
                links = links.join(F.broadcast(d), on=["left", "right"], how="left").withColumn(
                    "decision", F.when(F.col("reviewed") == "same", "link")
                    .when(F.col("reviewed") == "different", "non-link")
                    .when(F.col("reviewed") == "unsure", "review").otherwise(F.col("decision")))
            links = links.where(F.col("decision") == "link").select("left", "right", "weight")
            labels = _entities_spark(spark, n, links, ids, settings.override_weight,
                                     [tuple(map(int, p)) for p in cannot], must, unresolved)
        held = linked & (labels[left] != labels[right])
        scores.loc[held, "decision"] = "review"
        t["cluster_s"] = time.perf_counter() - t0
        report = report.copy()
        report["reduction_ratio"] = [reduction_ratio(int(k), n) for k in report["pairs"]]
        info = {
            "candidate_pairs": int(len(scores)),
            "pairs_linked": int((linked & ~held).sum()),
            "links_held_apart": int(held.sum()),
            "pairs_for_review": int((scores["decision"] == "review").sum()),
            "entities": int(labels.max() + 1) if labels.size else 0,
            "em_iterations": int(model.n_iter_),
            "em_converged": bool(model.converged_),
            "match_prior": float(model.prior_),
            "relatives_share": float(model.relative_share_),
            "capped_blocks": int(len(capped)),
            "decisions_applied": int(dec["pair_id"].nunique()) if len(dec) else 0,
            "decisions_unresolved": [[int(a), int(b)] for a, b in unresolved],
            "timings": {k: round(v, 3) for k, v in t.items()},
            "engine": "spark",
            "clustering": clustering,
        }
        return LinkResult(scores, level_matrix, labels, model, fields, rules, report, capped, info)
    finally:
        for df in keep:
            df.unpersist()
        for b in broadcasts:
            b.destroy()


def link_stage(spark) -> Callable:
    """The Spark stage with :func:`linker.link.link_records`' signature (records, settings, progress,
    decisions=...), for callers that take the linkage step as a function."""
    def link(records, settings: LinkageSettings = LinkageSettings(), progress: Callable[[str], None] = _quiet,
             decisions: pd.DataFrame | None = None) -> LinkResult:
        return link_records_spark(spark, records, settings, progress, decisions=decisions)

    return link


def _collect_sorted(sdf, columns: list[str]) -> pd.DataFrame:
    """A Spark frame on the driver, rows ordered by (left, right) like the local engine's pairs."""
    frame = sdf.select(*columns).toPandas()
    order = np.lexsort((frame["right"].to_numpy(dtype=np.int64), frame["left"].to_numpy(dtype=np.int64)))
    out = {}
    for c in columns:                    # one column at a time: the frame and its sorted copy never both whole
        out[c] = frame.pop(c).to_numpy()[order]
    return pd.DataFrame(out)

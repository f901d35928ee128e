#!/usr/bin/env python3
"""The local engine against the Spark engine (local[2]) on a generated delivery.

``python benchmarks/bench_spark.py --records 100000`` generates the delivery
(seeded, invented data, :func:`generate.write_delivery`) unless it is already
in ``--workdir``, ingests and normalizes it locally, writes the records as
Parquet (:func:`linker.spark.write_records_parquet`), then links them both
ways, each engine in a fresh process so that its peak memory is its own:

local
    :func:`linker.link.link_records` on the records read back from the Parquet.
spark
    :func:`linker.spark.link_records_spark` on the Parquet read by Spark
    (``local[2]`` by default, ``--master``).

Printed per engine: seconds per stage and in all, and peak memory -- the
largest sum of resident memory over the engine's process tree (Python
driver, Spark's JVM and its Python workers), sampled every 0.2 s.  Then
whether the two agree: candidate pairs, the largest weight difference, the
entities.  Needs ``pip install linker[spark]`` and Java.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))


class PeakMemory:
    """Largest resident memory (MiB) of this process and all its descendants, sampled in a thread."""

    def __init__(self, every: float = 0.2, limit_mib: float | None = None, on_limit=None):
        self.every, self.peak, self._stop = every, 0.0, threading.Event()
        self.limit_mib, self.on_limit = limit_mib, on_limit
        self._thread = threading.Thread(target=self._run, daemon=True)

    @staticmethod
    def _tree_rss(root: int) -> float:
        children: dict[int, list[int]] = {}
        rss: dict[int, int] = {}
        for entry in os.scandir("/proc"):
            if not entry.name.isdigit():
                continue
            try:
                with open(f"/proc/{entry.name}/stat") as fh:
                    fields = fh.read().rsplit(")", 1)[1].split()
                pid, ppid, pages = int(entry.name), int(fields[1]), int(fields[21])
            except (OSError, IndexError, ValueError):
                continue
            children.setdefault(ppid, []).append(pid)
            rss[pid] = pages
        total, todo = 0, [root]
        while todo:
            p = todo.pop()
            total += rss.get(p, 0)
            todo += children.get(p, [])
        return total * os.sysconf("SC_PAGE_SIZE") / 2**20

    def _run(self):
        while not self._stop.is_set():
            self.peak = max(self.peak, self._tree_rss(os.getpid()))
            if self.limit_mib and self.peak > self.limit_mib and self.on_limit:
                self.on_limit(self.peak)
            self._stop.wait(self.every)

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self._tree_rss(os.getpid()))


def prepare(n_records: int, workdir: Path, by_file_above: int = 2_000_000) -> dict:
    """Generated delivery -> normalized records -> Parquet (once per size and workdir)."""
    import generate
    from linker import load_config
    from linker.pipeline import ingest_delivery
    from linker.records import normalize_records
    from linker.spark import write_records_parquet

    work = workdir / f"d{n_records}"
    parquet = work / "records.parquet"
    meta = work / "prepared.json"
    if meta.exists():
        return json.loads(meta.read_text())
    cfg_path = generate.write_delivery(work, n_records)
    cfg = load_config(cfg_path)
    if n_records > by_file_above:
        out = _prepare_by_file(cfg, parquet)
    else:
        t0 = time.perf_counter()
        raw = ingest_delivery(cfg)[0]
        t1 = time.perf_counter()
        records = normalize_records(raw, cfg).reset_index(drop=True)
        t2 = time.perf_counter()
        write_records_parquet(records, parquet)
        t3 = time.perf_counter()
        out = {"records": len(records), "ingest_s": t1 - t0, "normalize_s": t2 - t1, "parquet_s": t3 - t2}
    out.update({"config": str(cfg_path), "parquet": str(parquet)})
    meta.write_text(json.dumps(out))
    return out


def _prepare_by_file(cfg, parquet: Path) -> dict:
    """Ingest, normalize and write the delivery one file at a time (memory of one file, not of all):
    the records and their order are those of the whole-delivery path (normalization is per record)."""
    from linker.ingest import ingest_file
    from linker.io import ReadLimits, list_delivery, read_file
    from linker.records import normalize_records
    from linker.spark import write_records_parquet

    t = {"ingest_s": 0.0, "normalize_s": 0.0, "parquet_s": 0.0}
    start = 0
    for path in list_delivery(cfg.folder, cfg.patterns, cfg.exclude):
        t0 = time.perf_counter()
        # an export of millions of rows: CSV files past the spreadsheet row limit are expected here
        data = read_file(path, cfg.folder, ReadLimits(max_sheet_rows=50_000_000))
        raws = [res.records for res in ingest_file(cfg, data)]
        del data
        raw = pd.concat(raws, ignore_index=True)
        t1 = time.perf_counter()
        records = normalize_records(raw, cfg).reset_index(drop=True)
        del raw, raws
        t2 = time.perf_counter()
        write_records_parquet(records, parquet, start=start)
        t3 = time.perf_counter()
        start += len(records)
        t["ingest_s"] += t1 - t0
        t["normalize_s"] += t2 - t1
        t["parquet_s"] += t3 - t2
        print(f"  {path.name}: {len(records):,} records", flush=True)
        del records
    return {"records": start, **t, "by_file": True}


def stage_figures(spark) -> dict:
    """Shuffle written and read over the application's completed stages, and the largest stages
    (from Spark's status REST interface on the driver's UI port; empty when it cannot be read)."""
    import urllib.request

    try:
        base = spark.sparkContext.uiWebUrl.rstrip("/")
        app = spark.sparkContext.applicationId
        with urllib.request.urlopen(f"{base}/api/v1/applications/{app}/stages?status=complete", timeout=30) as r:
            stages = json.loads(r.read().decode("utf-8"))
    except Exception as err:                 # figures are a bonus: the run stands without them
        return {"error": f"{type(err).__name__}: {err}"}
    rows = [{"name": st.get("name", "")[:80], "tasks": int(st.get("numTasks", 0)),
             "shuffle_write_mib": st.get("shuffleWriteBytes", 0) / 2**20,
             "shuffle_read_mib": st.get("shuffleReadBytes", 0) / 2**20,
             "input_mib": st.get("inputBytes", 0) / 2**20,
             "spill_disk_mib": st.get("diskBytesSpilled", 0) / 2**20} for st in stages]
    rows.sort(key=lambda r: -r["shuffle_write_mib"])
    return {"stages": len(rows), "shuffle_write_mib": sum(r["shuffle_write_mib"] for r in rows),
            "shuffle_read_mib": sum(r["shuffle_read_mib"] for r in rows),
            "spill_disk_mib": sum(r["spill_disk_mib"] for r in rows), "largest": rows[:12]}


def link_once(engine: str, prep: dict, out: Path, master: str, limit_mib: float | None = None,
              driver_memory: str = "8g", conf: dict | None = None) -> dict:
    """Link the Parquet records with one engine (in this process); save weights and labels.

    With ``limit_mib``, a process tree growing past it is stopped (this
    process group killed) after printing what it had reached: the engine does
    not fit in that memory.
    """
    from linker import load_config
    from linker.link import link_records, linkage_columns

    settings = load_config(prep["config"]).linkage
    last = {"stage": "starting", "t0": time.perf_counter()}

    def progress(msg: str) -> None:
        last["stage"] = msg

    def too_big(peak: float) -> None:
        print(json.dumps({"engine": engine, "exceeded_mib": peak, "limit_mib": limit_mib, "stage": last["stage"],
                          "after_s": time.perf_counter() - last["t0"]}), flush=True)
        os.killpg(os.getpgid(0), signal.SIGKILL)

    with PeakMemory(limit_mib=limit_mib, on_limit=too_big) as mem:
        t0 = time.perf_counter()
        if engine == "local":
            from linker.spark import read_records_pandas

            # the columns the linkage reads (as a user at scale would load them; Spark selects them too)
            records = read_records_pandas(prep["parquet"], columns=linkage_columns(settings))
            t_read = time.perf_counter() - t0
            last["stage"] = "records read"
            result = link_records(records, settings, progress)
            t_start = 0.0
        else:
            from linker.spark import link_records_spark, read_records, spark_session

            partitions = max(8, int(prep["records"]) // 250_000)       # one per 250,000 records, at least 8
            # the UI (on loopback: SPARK_LOCAL_IP) only to read the stages' shuffle figures at the end
            spark = spark_session(master, {"spark.sql.shuffle.partitions": str(partitions),
                                           "spark.driver.memory": driver_memory, "spark.ui.enabled": "true",
                                           **(conf or {})})
            t_start = time.perf_counter() - t0
            t1 = time.perf_counter()
            records = read_records(spark, prep["parquet"])
            t_read = time.perf_counter() - t1
            last["stage"] = "records read"
            result = link_records_spark(spark, records, settings, progress)
        total = time.perf_counter() - t0
        shuffle = {}
        if engine == "spark":
            shuffle = stage_figures(spark)
            spark.stop()
    np.savez(out / f"{engine}.npz", left=result.scores["left"].to_numpy(), right=result.scores["right"].to_numpy(),
             rules=result.scores["rules"].to_numpy(), weight=result.scores["weight"].to_numpy(),
             labels=result.labels, levels=result.levels)
    return {"engine": engine, "total_s": total, "session_s": t_start, "read_s": t_read,
            "timings": result.info["timings"], "pairs": result.info["candidate_pairs"],
            "entities": result.info["entities"], "peak_mib": mem.peak,
            "largest_entity": int(np.bincount(result.labels).max()) if result.labels.size else 0,
            "blocking": [[str(r), int(p), int(q)]
                         for r, p, q in result.blocking[["rule", "pairs", "new_pairs"]].itertuples(index=False)],
            "capped_blocks": int(len(result.capped)), "shuffle": shuffle}


WORKDIR = Path(tempfile.gettempdir()) / "linker-bench-spark"


def run(n_records: int = 100_000, workdir: str | Path = WORKDIR, master: str = "local[2]",
        engines: Sequence[str] = ("local", "spark"), limit_mib: float | None = None,
        driver_memory: str = "8g", conf: dict | None = None) -> dict:
    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    prep = prepare(n_records, workdir)
    print(f"{prep['records']:,} normalized records (ingest {prep['ingest_s']:.1f} s, normalize "
          f"{prep['normalize_s']:.1f} s, Parquet {prep['parquet_s']:.1f} s; prepared in "
          f"{time.perf_counter() - t0:.1f} s{', a file at a time' if prep.get('by_file') else ''})", flush=True)
    out = Path(prep["parquet"]).parent
    figures = {}
    for engine in engines:
        cmd = [sys.executable, __file__, "--engine", engine, "--prepared", json.dumps(prep), "--master", master,
               "--driver-memory", driver_memory]
        if limit_mib:
            cmd += ["--limit-mib", str(limit_mib)]
        for k, v in (conf or {}).items():
            cmd += ["--conf", f"{k}={v}"]
        # own process group: a run past the memory limit kills its whole tree (JVM and workers too)
        done = subprocess.run(cmd, capture_output=True, text=True, start_new_session=True)
        lines = done.stdout.strip().splitlines()
        last = json.loads(lines[-1]) if lines and lines[-1].startswith("{") else {}
        if "exceeded_mib" in last:
            figures[engine] = last
            print(f"{engine:>5}: did not fit: {last['exceeded_mib']:,.0f} MiB > limit {last['limit_mib']:,.0f} MiB "
                  f"after {last['after_s']:.0f} s, at stage: {last['stage']}", flush=True)
            continue
        if done.returncode != 0:
            log = out / f"{engine}.stderr.txt"
            log.write_text(done.stderr)
            raise RuntimeError(f"{engine} run failed (whole error output in {log}):\n{done.stderr[-3000:]}")
        figures[engine] = last
        f = figures[engine]
        print(f"{engine:>5}: {f['total_s']:.1f} s in all (session {f['session_s']:.1f} s, read {f['read_s']:.1f} s; "
              f"stages {f['timings']}); {f['pairs']:,} candidate pairs, {f['entities']:,} entities; "
              f"peak memory {f['peak_mib']:,.0f} MiB", flush=True)
        print(f"       blocking {f['blocking']}; largest entity {f['largest_entity']}", flush=True)
        sh = f.get("shuffle") or {}
        if "shuffle_write_mib" in sh:
            print(f"       shuffle written {sh['shuffle_write_mib']:,.0f} MiB, read {sh['shuffle_read_mib']:,.0f} MiB, "
                  f"spilled to disk {sh['spill_disk_mib']:,.0f} MiB over {sh['stages']} stages", flush=True)
    result = {"prepared": prep, **figures}
    (out / "figures.json").write_text(json.dumps(figures, indent=1))
    done_both = all(e in figures and "exceeded_mib" not in figures[e] for e in ("local", "spark"))
    if done_both:
        a, b = np.load(out / "local.npz"), np.load(out / "spark.npz")
        same_pairs = all(np.array_equal(a[k], b[k]) for k in ("left", "right", "rules"))
        same_levels = np.array_equal(a["levels"], b["levels"])
        diff = float(np.abs(a["weight"] - b["weight"]).max()) if same_pairs and a["weight"].size else float("nan")
        same_labels = np.array_equal(a["labels"], b["labels"])
        print(f"agree: pairs and rules {same_pairs}, levels {same_levels}, largest weight difference {diff:.3g}, "
              f"entities {same_labels}")
        result.update({"same_pairs": same_pairs, "same_levels": same_levels, "weight_diff": diff,
                       "same_labels": same_labels})
    return result


@pytest.mark.bench
def test_bench_spark():
    """Local vs Spark local[2] on 100,000 generated records: figures printed, results must agree."""
    pytest.importorskip("pyspark")
    out = run(100_000)
    assert out["same_pairs"] and out["same_levels"] and out["same_labels"]
    assert out["weight_diff"] <= 1e-9


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--records", type=int, default=100_000)
    ap.add_argument("--workdir", default=str(WORKDIR))
    ap.add_argument("--master", default="local[2]")
    ap.add_argument("--engines", default="local,spark", help="engines to run, comma-separated")
    ap.add_argument("--limit-mib", type=float, default=None,
                    help="stop an engine whose process tree grows past this resident memory")
    ap.add_argument("--driver-memory", default="8g", help="spark.driver.memory of the Spark run")
    ap.add_argument("--conf", action="append", default=[], metavar="KEY=VALUE",
                    help="another Spark setting of the Spark run (repeatable)")
    ap.add_argument("--engine", choices=("local", "spark"), help=argparse.SUPPRESS)
    ap.add_argument("--prepared", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    bad = [kv for kv in args.conf if "=" not in kv]
    if bad:
        ap.error(f"--conf takes KEY=VALUE, got {bad[0]!r}")
    conf = dict(kv.split("=", 1) for kv in args.conf)
    if args.engine:                                  # one engine, in a fresh process (see run)
        os.environ.setdefault("SPARK_LOCAL_IP", "127.0.0.1")
        if os.getpgid(0) != os.getpid():             # its own process group: the memory limit kills only this tree
            os.setpgid(0, 0)
        prep = json.loads(args.prepared)
        figures = link_once(args.engine, prep, Path(prep["parquet"]).parent, args.master,
                            args.limit_mib, args.driver_memory, conf)
        (Path(prep["parquet"]).parent / f"{args.engine}.json").write_text(json.dumps(figures, indent=1))
        print(json.dumps(figures))
        return 0
    run(args.records, args.workdir, args.master, tuple(args.engines.split(",")), args.limit_mib, args.driver_memory,
        conf)
    return 0


if __name__ == "__main__":
    sys.exit(main())

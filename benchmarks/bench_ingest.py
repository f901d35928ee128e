"""Ingest speed: rows/s of ingest + normalize on a generated delivery of >= 200,000 rows.

Run:  python benchmarks/bench_ingest.py [--rows 200000]
or    python -m pytest -m bench benchmarks/bench_ingest.py -s

The delivery (fictional, seeded) is written once into benchmarks/data/ and reused:
two workbooks with title rows and two-person rows, and one CSV, in the demo's vocabulary.
"""

from __future__ import annotations

import argparse
import datetime as dt
import random
import resource
import sys
import textwrap
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import pandas as pd  # noqa: E402

from linker import load_config  # noqa: E402
from linker.normalize import luhn_check_digit  # noqa: E402
from linker.pipeline import ingest_delivery  # noqa: E402
from linker.records import normalize_records  # noqa: E402

GIVEN = ["ANA", "TOMAS", "LIDIA", "MARTA", "JOSE", "NGOZI", "OLU", "PIA", "RUI", "SEVE", "IKER",
         "DALIA", "EMRE", "FARAH", "GIO", "HANA", "IVO", "JUNO", "KAI", "LENA"]
FAMILY = ["FERRO", "VELL", "NUNEZ", "GARCIA LOPEZ", "DA SILVA", "OKAFOR", "DE LA CRUZ", "MARRO",
          "QUIL", "TANVIR", "BRESK", "OSSAN", "PELL", "RAVEN", "SOLIS", "TARNO", "UVAL", "WENDT"]

CONFIG = """
[delivery]
folder = "delivery"

[identifier]
digits = 8
prefixes = ["HR", "NM"]
check_digit = "luhn"

[dates]
as_of = "2026-11-01"

[slots.child.columns]
reg_no = ["child reg no"]
given_name = ["child first name"]
family_name = ["child last name"]
birth_date = ["child dob"]
age = ["child age"]
sex = ["child sex"]

[slots.parent.columns]
reg_no = ["parent reg no"]
full_name = ["parent name"]
birth_date = ["parent dob"]

[fields]
intake_date = ["intake date"]
release_date = ["release date"]
location = ["station"]

[[relations]]
child = "child"
parent = "parent"
"""


def _row(rng: random.Random):
    reg = lambda: (p := f"{rng.randrange(10**7):07d}") + luhn_check_digit(p)  # noqa: E731
    born = dt.date(2008, 1, 1) + dt.timedelta(days=rng.randrange(6000))
    pborn = dt.date(1966, 1, 1) + dt.timedelta(days=rng.randrange(12000))
    intake = dt.date(2026, 1, 1) + dt.timedelta(days=rng.randrange(250))
    creg = reg()
    child_reg = rng.choice([creg, "HR-" + creg[:4] + "-" + creg[4:], int(creg), creg + ".0"])
    return [rng.choice(GIVEN), rng.choice(FAMILY),
            rng.choice([born, born.strftime("%d/%m/%Y"), born.isoformat()]),
            child_reg, rng.choice(["", "7", "11 mo", "2 yrs"]), rng.choice("MF"),
            f"{rng.choice(FAMILY)}, {rng.choice(GIVEN)}", reg(), pborn, intake,
            rng.choice(["QUARRY GATE", "LINDEN FORD", "SALTREACH"])]


HEADER = ["Child first name", "Child last name", "Child DOB", "Child Reg No", "Child age",
          "Child sex", "Parent name", "Parent Reg No", "Parent DOB", "Intake date", "Station"]


def make_delivery(folder: Path, rows: int, seed: int = 7) -> Path:
    """Write the benchmark delivery (cached by row count and seed); return the config path."""
    import csv

    import openpyxl

    base = folder / f"ingest_{rows}_{seed}"
    cfg = base / "bench.toml"
    if cfg.exists():
        return cfg
    (base / "delivery").mkdir(parents=True, exist_ok=True)
    rng = random.Random(seed)
    per_book = rows * 2 // 5
    for k in range(2):
        wb = openpyxl.Workbook(write_only=True)
        ws = wb.create_sheet("Log")
        ws.append(["Holding log (benchmark, fictional)"])
        ws.append([])
        ws.append(HEADER)
        for _ in range(per_book - 3):
            ws.append(_row(rng))
        wb.save(base / "delivery" / f"log_{k}.xlsx")
    with open(base / "delivery" / "tracing.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER)
        for _ in range(rows - 2 * per_book):
            w.writerow([c.isoformat() if isinstance(c, dt.date) else c for c in _row(rng)])
    cfg.write_text(textwrap.dedent(CONFIG), encoding="utf-8")
    return cfg


def measure(rows: int) -> dict:
    """Time the ingest and normalize stages only (linking has its own benchmark, bench_link.py)."""
    cfg_path = make_delivery(ROOT / "benchmarks" / "data", rows)
    cfg = load_config(cfg_path)
    t0 = time.perf_counter()
    raw, ledger, *_ = ingest_delivery(cfg)
    t1 = time.perf_counter()
    records = normalize_records(raw, cfg)
    t2 = time.perf_counter()
    elapsed = t2 - t0
    n_rows = int(pd.to_numeric(ledger["row"], errors="coerce").notna().sum())
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"input_rows": n_rows, "records": len(records), "seconds": round(elapsed, 2),
            "rows_per_s": round(n_rows / elapsed), "records_per_s": round(len(records) / elapsed),
            "ingest_s": round(t1 - t0, 3), "normalize_s": round(t2 - t1, 3),
            "peak_rss_mb": round(peak)}


@pytest.mark.bench
def test_bench_ingest():
    """Ingest + normalize of >= 200,000 rows; prints rows/s."""
    figures = measure(200_000)
    print("\ningest benchmark:", figures)
    assert figures["input_rows"] >= 200_000


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=200_000)
    print(measure(parser.parse_args().rows))

"""The commands end to end on the demo delivery: run --truth, explain, evaluate, and their errors."""

from __future__ import annotations

import pandas as pd
import pytest

from linker.cli import main

from conftest import ROOT

TRUTH = ROOT / "sample" / "truth" / "records.csv"


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("run")
    assert main(["run", str(ROOT / "configs" / "sample.toml"), "--out", str(out), "--quiet",
                 "--truth", str(TRUTH)]) == 0
    return out


def _scores(text: str) -> dict:
    found = {}
    for line in text.splitlines():
        head, _, rest = line.partition(":")
        if head.strip() in ("pairwise", "bcubed"):
            words = rest.split()
            found[head.strip()] = dict(zip(words[0::2], map(float, words[1::2])))
    return found


def test_run_with_truth_adds_pair_completeness_and_evaluation(run_dir):
    blocking = pd.read_csv(run_dir / "blocking.csv")
    assert {"true_pairs", "pair_completeness"} <= set(blocking.columns)
    union = blocking.set_index("rule").loc["(union)"]
    assert 0.98 <= union["pair_completeness"] <= 1.0
    # per rule completeness never exceeds the union's
    assert (blocking["pair_completeness"] <= union["pair_completeness"] + 1e-12).all()
    ev = pd.read_csv(run_dir / "evaluation.csv").set_index("measure")
    assert ev.loc["pairwise", "f1"] >= 0.99 and ev.loc["bcubed", "f1"] >= 0.99
    assert ev.loc["pairwise", "records_without_truth"] == 0


def test_evaluate_prints_the_scores_of_the_run(run_dir, capsys):
    assert main(["evaluate", "--truth", str(TRUTH), "--out", str(run_dir)]) == 0
    scores = _scores(capsys.readouterr().out)
    ev = pd.read_csv(run_dir / "evaluation.csv").set_index("measure")
    for m in ("pairwise", "bcubed"):
        assert scores[m]["f1"] == pytest.approx(ev.loc[m, "f1"], abs=1e-4)


def test_evaluate_by_record_id_agrees_with_evaluate_by_provenance(run_dir, tmp_path, capsys):
    records = pd.read_csv(run_dir / "records.csv", dtype=str, keep_default_na=False)
    truth = pd.read_csv(TRUTH, dtype=str, keep_default_na=False)
    by_id = records.merge(truth, on=["source_file", "sheet", "row", "slot"])[["record_id", "person_id"]]
    # drop a tenth of the truth: those records are left out of the score, and said so
    by_id = by_id.iloc[: len(by_id) * 9 // 10]
    path = tmp_path / "truth_by_id.csv"
    by_id.to_csv(path, index=False)
    assert main(["evaluate", "--truth", str(path), "--out", str(run_dir)]) == 0
    out = capsys.readouterr().out
    assert f"{len(by_id)} records scored, {len(records) - len(by_id)} without truth" in out
    assert _scores(out)["pairwise"]["precision"] >= 0.99


def test_explain_prints_weights_that_sum_to_the_pairs_weight(run_dir, capsys):
    pairs = pd.read_csv(run_dir / "pairs.csv", dtype={"record_a": str, "record_b": str})
    review = pairs[pairs["decision"] == "review"]
    p = (review if len(review) else pairs).iloc[0]
    assert main(["explain", p["record_a"], p["record_b"], "--out", str(run_dir)]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    weights = []
    for line in lines[2:]:
        last = line.split()[-1] if line.split() else ""
        if last[:1] in "+-" and last[1:2].isdigit():
            weights.append(float(last))
    assert len(weights) >= 6                     # prior + five person fields
    total = float(next(line for line in lines if line.startswith("match weight")).split()[2])
    assert total == pytest.approx(p["weight"], abs=0.01)
    assert sum(weights) == pytest.approx(total, abs=0.05)    # rounded to 2 decimals per row
    assert "never a determination" in out


@pytest.mark.parametrize("argv, needle", [
    (["explain", "R-nope", "R-none"], "no record with id 'R-nope'"),
    (["evaluate", "--truth", "missing.csv"], "no such truth file"),
])
def test_bad_requests_exit_non_zero_with_one_line(run_dir, argv, needle, capsys):
    argv = argv + ["--out", str(run_dir)]
    assert main(argv) == 3
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err


def test_evaluate_rejects_a_truth_file_without_keys(run_dir, tmp_path, capsys):
    path = tmp_path / "t.csv"
    path.write_text("person_id,name\nP1,x\n", encoding="utf-8")
    assert main(["evaluate", "--truth", str(path), "--out", str(run_dir)]) == 3
    assert "needs a 'record_id' column" in capsys.readouterr().err


def test_explain_without_a_run_names_the_folder(tmp_path, capsys):
    assert main(["explain", "A", "B", "--out", str(tmp_path)]) == 3
    assert "records.csv" in capsys.readouterr().err


def test_a_second_run_writes_byte_identical_outputs(run_dir, tmp_path):
    """Same inputs and config: every output but run.json (timings, finish time) is byte for byte the same."""
    again = tmp_path / "again"
    assert main(["run", str(ROOT / "configs" / "sample.toml"), "--out", str(again), "--quiet",
                 "--truth", str(TRUTH)]) == 0
    names = sorted(p.name for p in run_dir.iterdir() if p.name != "run.json")
    assert {"records.csv", "relations.csv", "findings.csv", "queries.xlsx", "model.json"} <= set(names)
    for name in names:
        assert (run_dir / name).read_bytes() == (again / name).read_bytes(), name


def test_query_workbook_has_a_sheet_per_source_file_with_the_findings(run_dir):
    import openpyxl

    findings = pd.read_csv(run_dir / "findings.csv", dtype=str, keep_default_na=False)
    book = openpyxl.load_workbook(run_dir / "queries.xlsx", read_only=True)
    index = list(book["index"].iter_rows(values_only=True))
    header = index[0]
    by_file = {r[header.index("source file")]: r for r in index[1:]}
    assert set(by_file) == set(findings["source_file"])
    per_file = findings.groupby("source_file").size()
    for source, row in by_file.items():
        assert row[header.index("queries")] == per_file[source]
    assert "not determinations" in " ".join(str(c[0]) for c in book["read me"].iter_rows(values_only=True))


def test_report_is_rebuilt_from_the_run_tables_without_relinking(run_dir, tmp_path, capsys):
    """`linker report DIR` gives the same report.html as the run wrote (tables read back as text)."""
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(run_dir, copy)
    (copy / "report.html").unlink()
    assert main(["report", str(copy)]) == 0
    assert (copy / "report.html").read_bytes() == (run_dir / "report.html").read_bytes()
    assert main(["report", str(tmp_path / "nothing")]) == 3
    assert "records.csv" in capsys.readouterr().err

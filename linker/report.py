"""The descriptive report: people counted once, every statistic with its missing share.

:func:`report_tables` turns a run's records, ledger, entities, relations and
findings into plain DataFrames (pure, no files).  :func:`write_report_html`
writes them as one self-contained HTML page (inline style, charts as embedded
PNG images, no links, no scripts); :func:`write_report_xlsx` writes the same
tables to a workbook.  Both writers give the same bytes for the same tables.

Counting goes through :mod:`linker.counting`: a child who appears in several
sheets is one child, and a value the records do not give is counted as
``unknown``, never dropped.  Every statistic table carries ``n known``,
``n missing`` and ``share missing``.
"""

from __future__ import annotations

import base64
import html
import io
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd

from .counting import UNKNOWN, age_at, age_band, count_entities, entity_first_date, entity_value
from .io import atomic_write_bytes, safe_cell

__all__ = ["DEFAULT_AGE_EDGES", "CAUTIONS", "report_tables", "write_report_html", "write_report_xlsx"]

DEFAULT_AGE_EDGES = (5, 10, 14, 18)
SEPARATION_EVENTS = ("intake_date", "placement_date")
MISSING_COLUMNS = ("n known", "n missing", "share missing")
ALL = "all"

CAUTIONS = (
    "Links between records and relations between people are leads for qualified staff to verify "
    "through official procedures. They are never determinations of identity or family relation.",
    "This report holds sensitive personal information about children and families. Keep it under "
    "the protective orders and privacy law that apply; share it only with people entitled to see it.",
)

TITLES = {
    "totals": "Totals",
    "age_by_sex": "Children by age at separation and sex",
    "age_cuts": "Children under each age",
    "location": "People by location",
    "time_separated": "Time separated (days from earliest intake to latest release)",
    "data_quality": "Data quality per source file (worst first)",
}

NOTES = {
    "totals": "Entities are people after linking; each person is counted once however many rows name them.",
    "age_by_sex": "Age in whole years on the child's earliest intake or placement date. 'unknown': no birth "
                  "date or age, no event date, or a stated age that straddles a band edge (never guessed).",
    "age_cuts": "Children known to be under each age; 'n missing' are children whose age cannot be placed "
                "on either side of the cut.",
    "location": "Each person's most frequent location over their records. The missing columns describe the "
                "location field as a whole and repeat on every row.",
    "time_separated": "Only children with both an intake date and a release date later than or on it are "
                      "measured; the others are counted as missing, release-before-intake shown apart.",
    "data_quality": "Rows as read, their ledger outcomes, records made, and findings. Files with the most "
                    "findings per 100 records come first; files that made no records come before all.",
}


# ---------------------------------------------------------------------------
# Tables
# ---------------------------------------------------------------------------
def report_tables(records: pd.DataFrame, ledger: pd.DataFrame, entities: pd.DataFrame | None,
                  relations: pd.DataFrame | None, findings: pd.DataFrame | None,
                  settings=None) -> dict[str, pd.DataFrame]:
    """All report tables, keyed as in :data:`TITLES`.

    ``settings`` (a mapping, or None) may give ``age_edges`` (default 5, 10, 14, 18),
    ``cuts`` (default: the age edges) and ``child_slot`` (default "child").
    """
    opts = _options(settings)
    entities = _frame(entities, ("entity_id",))
    relations = _frame(relations, ("child_entity_id", "parent_entity_id"))
    findings = _frame(findings, ("rule", "severity", "source_file"))
    kids = _children(records, opts["child_slot"])
    ages = age_at(kids, SEPARATION_EVENTS)
    sex = entity_value(kids, "sex").reindex(ages.index, fill_value="")
    return {
        "totals": totals_table(records, entities, relations, findings, opts["child_slot"]),
        "age_by_sex": age_by_sex_table(ages, sex, opts["age_edges"]),
        "age_cuts": age_cuts_table(ages, opts["cuts"]),
        "location": location_table(records),
        "time_separated": time_separated_table(kids, sex),
        "data_quality": data_quality_table(ledger, records, findings),
    }


def _options(settings) -> dict:
    raw = dict(settings or {}) if isinstance(settings, Mapping) or settings is None else \
        dict(getattr(settings, "raw", {}).get("report", {}))
    edges = tuple(sorted(int(e) for e in raw.get("age_edges", DEFAULT_AGE_EDGES)))
    if not edges:
        raise ValueError("report settings: age_edges must hold at least one age")
    cuts = tuple(sorted(int(c) for c in raw.get("cuts", edges)))
    return {"age_edges": edges, "cuts": cuts, "child_slot": str(raw.get("child_slot", "child"))}


def _frame(frame: pd.DataFrame | None, columns) -> pd.DataFrame:
    return pd.DataFrame(columns=list(columns)) if frame is None else frame


def _children(records: pd.DataFrame, child_slot: str) -> pd.DataFrame:
    is_child = (records["slot"].astype(str) == child_slot).groupby(records["entity_id"].astype(str)).any()
    return records[records["entity_id"].astype(str).map(is_child).fillna(False).to_numpy(bool)]


def _missing(known: int, missing: int) -> dict:
    total = known + missing
    return {"n known": int(known), "n missing": int(missing),
            "share missing": round(missing / total, 4) if total else 0.0}


def band_labels(edges) -> list[str]:
    edges = sorted(int(e) for e in edges)
    return ([f"under {edges[0]}"] + [f"{a} to {b - 1}" for a, b in zip(edges, edges[1:])]
            + [f"{edges[-1]} and over"])


def totals_table(records, entities, relations, findings, child_slot="child") -> pd.DataFrame:
    """Counts of records, people, children, relations and findings (each severity)."""
    ents = records["entity_id"].astype(str)
    kids = ents[records["slot"].astype(str) == child_slot].nunique()
    sev = findings["severity"].astype(str).value_counts() if len(findings) else pd.Series(dtype=int)
    rows = [("records", len(records)), ("entities (people)", len(entities) if len(entities) else ents.nunique()),
            ("children", kids), ("relations (child and parent)", len(relations)), ("findings", len(findings))]
    rows += [(f"findings: {s}", int(sev[s])) for s in sorted(sev.index)]
    return pd.DataFrame(rows, columns=["count", "value"])


def age_by_sex_table(ages: pd.DataFrame, sex: pd.Series, edges) -> pd.DataFrame:
    """One row per sex (unknown and all last), one column per age band plus unknown."""
    labels = band_labels(edges)
    bands = age_band(ages, edges)
    sex = sex.replace("", UNKNOWN)
    rows = []
    for name in sorted(set(sex) - {UNKNOWN}) + [UNKNOWN, ALL]:
        picked = bands if name == ALL else bands[sex == name]
        counts = count_entities(picked, labels).set_index("group")["entities"]
        row = {"sex": name, **{lab: int(counts[lab]) for lab in labels}, UNKNOWN: int(counts[UNKNOWN]),
               "children": int(counts.sum())}
        rows.append({**row, **_missing(row["children"] - row[UNKNOWN], row[UNKNOWN])})
    return pd.DataFrame(rows)


def age_cuts_table(ages: pd.DataFrame, cuts) -> pd.DataFrame:
    """Children known to be under each cut, with those whose side of the cut is unknown."""
    rows = []
    for cut in cuts:
        bands = age_band(ages, (cut,))
        under = int((bands == f"under {cut}").sum())
        over = int((bands == f"{cut} and over").sum())
        unknown = int((bands == UNKNOWN).sum())
        rows.append({"age": f"under {cut}", "children": under, "at or over": over,
                     **_missing(under + over, unknown)})
    return pd.DataFrame(rows, columns=["age", "children", "at or over", *MISSING_COLUMNS])


def location_table(records: pd.DataFrame) -> pd.DataFrame:
    """People by their most frequent location, most people first; ``unknown`` (last) when no record
    gives one or two locations tie."""
    where = entity_value(records, "location").replace("", UNKNOWN)
    counts = count_entities(where)
    counts = counts.assign(_u=counts["group"] == UNKNOWN).sort_values(
        ["_u", "entities", "group"], ascending=[True, False, True], kind="mergesort").drop(columns="_u")
    total = int(counts["entities"].sum())
    out = counts.rename(columns={"group": "location"})
    out["share of people"] = (out["entities"] / total).round(4) if total else 0.0
    miss = _missing(total - int(counts.loc[counts["group"] == UNKNOWN, "entities"].sum()),
                    int(counts.loc[counts["group"] == UNKNOWN, "entities"].sum()))
    for k, v in miss.items():
        out[k] = v
    return out.reset_index(drop=True)


def _entity_last_date(records: pd.DataFrame, column: str) -> pd.Series:
    dates = pd.to_datetime(records[column].astype(str).str.strip(), format="%Y-%m-%d", errors="coerce")
    out = dates.groupby(records["entity_id"].astype(str).to_numpy()).max()
    return out.sort_index()


def time_separated_table(kids: pd.DataFrame, sex: pd.Series) -> pd.DataFrame:
    """Days from each child's earliest intake to latest release: median and quartiles, per sex and all."""
    start = entity_first_date(kids, "intake_date")
    end = _entity_last_date(kids, "release_date").reindex(start.index)
    days = (end - start).dt.days
    backwards = days < 0
    days = days.where(~backwards)
    sex = sex.reindex(start.index, fill_value="").replace("", UNKNOWN)
    rows = []
    for name in sorted(set(sex) - {UNKNOWN}) + [UNKNOWN, ALL]:
        pick = pd.Series(True, index=days.index) if name == ALL else sex == name
        d = days[pick].dropna().to_numpy(float)
        q = np.percentile(d, [0, 25, 50, 75, 100]) if len(d) else [np.nan] * 5
        rows.append({"sex": name, "children": int(pick.sum()),
                     "median days": q[2], "first quartile": q[1], "third quartile": q[3],
                     "shortest": q[0], "longest": q[4],
                     "release before intake": int(backwards[pick].sum()),
                     **_missing(len(d), int(pick.sum()) - len(d))})
    return pd.DataFrame(rows)


def data_quality_table(ledger: pd.DataFrame, records: pd.DataFrame, findings: pd.DataFrame) -> pd.DataFrame:
    """Per source file: rows read, ledger outcomes, records, findings and findings per 100 records."""
    files = sorted(set(ledger["source_file"].astype(str)) | set(records["source_file"].astype(str))
                   | set(findings["source_file"].astype(str)))
    idx = pd.Index(files, name="source_file")
    outcomes = pd.crosstab(ledger["source_file"].astype(str), ledger["outcome"].astype(str))
    outcomes = outcomes.reindex(idx, fill_value=0)
    out = pd.DataFrame(index=idx)
    out["rows"] = ledger["source_file"].astype(str).value_counts().reindex(idx, fill_value=0)
    for col in sorted(outcomes.columns):
        out[f"rows: {col}"] = outcomes[col]
    out["records"] = records["source_file"].astype(str).value_counts().reindex(idx, fill_value=0)
    fcount = findings["source_file"].astype(str).value_counts().reindex(idx, fill_value=0)
    for sev in sorted(set(findings["severity"].astype(str))):
        part = findings["severity"].astype(str) == sev
        out[f"findings: {sev}"] = findings.loc[part, "source_file"].astype(str).value_counts() \
            .reindex(idx, fill_value=0)
    out["findings"] = fcount
    out["findings per 100 records"] = (100 * fcount / out["records"].where(out["records"] > 0)).round(2)
    out = out.astype({c: int for c in out.columns if c != "findings per 100 records"})
    key = pd.DataFrame({"no_records": (out["records"] == 0).astype(int),
                        "rate": out["findings per 100 records"].fillna(0.0), "findings": out["findings"]},
                       index=idx)
    order = key.reset_index().sort_values(["no_records", "rate", "findings", "source_file"],
                                          ascending=[False, False, False, True], kind="mergesort")
    return out.loc[order["source_file"]].reset_index()


# ---------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------
STYLE = """
body{font-family:Helvetica,Arial,sans-serif;margin:2em;color:#222;max-width:72em}
h1{font-size:1.6em}h2{font-size:1.2em;margin-top:2em;border-bottom:1px solid #ccc}
.caution{border:3px solid #b00;background:#fff3f3;padding:.8em 1.2em;margin:1em 0}
.caution p{margin:.4em 0;font-weight:bold}
table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
th,td{border:1px solid #bbb;padding:.25em .6em;text-align:right}
th{background:#eee}td:first-child,th:first-child{text-align:left}
.note{color:#555;font-size:.9em}img{display:block;margin:.6em 0;max-width:100%}
""".strip()

FIG_SIZE = (7.0, 3.2)
FIG_DPI = 100
CHART_STYLE = {"svg.hashsalt": "linker", "font.family": "DejaVu Sans", "path.simplify": True}
BLUE, GREY = "#1f77b4", "#9a9a9a"


def write_report_html(tables: dict[str, pd.DataFrame], path: str | Path,
                      title: str = "Descriptive report") -> Path:
    """One self-contained HTML file (inline style, embedded PNG charts, no links), written atomically."""
    path = Path(path)
    atomic_write_bytes(path, report_html(tables, title).encode("utf-8"))
    return path


def report_html(tables: dict[str, pd.DataFrame], title: str = "Descriptive report") -> str:
    charts = report_charts(tables)
    esc = html.escape
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{esc(title)}</title>", f"<style>{STYLE}</style></head><body>",
             f"<h1>{esc(title)}</h1>", '<div class="caution">']
    parts += [f"<p>{esc(c)}</p>" for c in CAUTIONS]
    parts.append("</div>")
    for key, frame in tables.items():
        parts.append(f"<h2>{esc(TITLES.get(key, key))}</h2>")
        if key in NOTES:
            parts.append(f'<p class="note">{esc(NOTES[key])}</p>')
        if key in charts:
            data = base64.b64encode(charts[key]).decode("ascii")
            parts.append(f'<img alt="{esc("chart: " + TITLES.get(key, key))}" '
                         f'src="data:image/png;base64,{data}">')
        parts.append(html_table(frame))
    parts.append('<div class="caution">' + "".join(f"<p>{esc(c)}</p>" for c in CAUTIONS) + "</div>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def html_table(frame: pd.DataFrame) -> str:
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    body = ["<tr>" + "".join(f"<td>{html.escape(_text(v))}</td>" for v in row) + "</tr>"
            for row in frame.itertuples(index=False, name=None)]
    return f"<table><thead><tr>{head}</tr></thead><tbody>" + "".join(body) + "</tbody></table>"


def _text(value) -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return ""
    if isinstance(value, (float, np.floating)):
        return f"{value:.4f}".rstrip("0").rstrip(".") if value != int(value) else str(int(value))
    return str(value)


def report_charts(tables: dict[str, pd.DataFrame]) -> dict[str, bytes]:
    """PNG bytes of the bar charts (age by sex, location, data quality), same bytes every time."""
    charts = {}
    age = tables.get("age_by_sex")
    if age is not None and len(age):
        sexes = age[age["sex"] != ALL]
        bands = [c for c in age.columns if c not in ("sex", "children", *MISSING_COLUMNS)]
        series = {str(s): sexes.loc[sexes["sex"] == s, bands].to_numpy().ravel() for s in sexes["sex"]}
        charts["age_by_sex"] = _bar_png(bands, series, "children")
    loc = tables.get("location")
    if loc is not None and len(loc):
        charts["location"] = _barh_png(loc["location"].astype(str).tolist(), loc["entities"].to_numpy(),
                                       "people", grey=(loc["location"].astype(str) == UNKNOWN).to_numpy())
    dq = tables.get("data_quality")
    if dq is not None and len(dq):
        top = dq.head(15)
        charts["data_quality"] = _barh_png(top["source_file"].astype(str).tolist(),
                                           top["findings per 100 records"].fillna(0).to_numpy(),
                                           "findings per 100 records", grey=(top["records"] == 0).to_numpy())
    return charts


def _figure(height: float = FIG_SIZE[1]):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(FIG_SIZE[0], height), dpi=FIG_DPI)
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot(1, 1, 1)


def _png(fig) -> bytes:
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=FIG_DPI, metadata={"Software": None})
    return buf.getvalue()


def _bar_png(labels: list[str], series: dict[str, np.ndarray], ylabel: str) -> bytes:
    """Grouped vertical bars, one group per label, one bar per series (with a legend when several)."""
    import matplotlib

    with matplotlib.rc_context(CHART_STYLE):
        fig, ax = _figure()
        x = np.arange(len(labels))
        width = 0.8 / max(len(series), 1)
        for i, (name, values) in enumerate(series.items()):
            ax.bar(x + (i - (len(series) - 1) / 2) * width, np.asarray(values, float), width, label=name,
                   color=GREY if name == UNKNOWN else None)
        ax.set_xticks(x)
        ax.set_xticklabels(labels, fontsize=8)
        ax.set_ylabel(ylabel)
        if len(series) > 1:
            ax.legend(fontsize=8)
        return _png(fig)


def _barh_png(labels: list[str], values: np.ndarray, xlabel: str, grey=None) -> bytes:
    """Horizontal bars, first label on top, full labels (long file names stay readable);
    bars flagged in ``grey`` (unknown, no records) drawn grey and the value written at each bar's end."""
    import matplotlib

    values = np.asarray(values, float)
    grey = np.zeros(len(labels), bool) if grey is None else np.asarray(grey, bool)
    with matplotlib.rc_context(CHART_STYLE):
        fig, ax = _figure(max(1.6, 0.6 + 0.28 * len(labels)))
        y = np.arange(len(labels))[::-1]
        ax.barh(y, values, 0.7, color=[GREY if g else BLUE for g in grey])
        ax.set_yticks(y)
        ax.set_yticklabels(labels, fontsize=8)
        ax.set_xlabel(xlabel)
        top = values.max() if len(values) and values.max() > 0 else 1.0
        ax.set_xlim(0, top * 1.12)
        for yy, v in zip(y, values):
            ax.text(v + top * 0.01, yy, _text(float(v)), va="center", fontsize=7)
        return _png(fig)


# ---------------------------------------------------------------------------
# Workbook
# ---------------------------------------------------------------------------
def write_report_xlsx(tables: dict[str, pd.DataFrame], path: str | Path) -> Path:
    """The report tables in a workbook (a "read me" sheet first), formula-safe, same bytes every time."""
    from openpyxl import Workbook
    from openpyxl.styles import Font

    from .queries import save_book

    book = Workbook()
    readme = book.active
    readme.title = "read me"
    lines = [("caution", c) for c in CAUTIONS] + [(TITLES.get(k, k), NOTES.get(k, "")) for k in tables]
    _fill(readme, pd.DataFrame(lines, columns=["about", "text"]), Font(bold=True))
    for key, frame in tables.items():
        _fill(book.create_sheet(_sheet_title(key)), frame, Font(bold=True))
    return save_book(book, path)


def _sheet_title(key: str) -> str:
    return "".join(ch for ch in key.replace("_", " ") if ch not in "[]:*?/\\")[:31]


def _fill(sheet, frame: pd.DataFrame, bold) -> None:
    for c, name in enumerate(frame.columns, start=1):
        cell = sheet.cell(row=1, column=c, value=safe_cell(str(name)))
        cell.data_type, cell.font = "s", bold
    for r, row in enumerate(frame.itertuples(index=False, name=None), start=2):
        for c, value in enumerate(row, start=1):
            cell = sheet.cell(row=r, column=c, value=_cell(value))
            if isinstance(cell.value, str):
                cell.data_type = "s"
    sheet.freeze_panes = "B2"


def _cell(value):
    if value is None or (isinstance(value, (float, np.floating)) and np.isnan(value)):
        return ""
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    if isinstance(value, (int, float)):
        return value
    return safe_cell(str(value))

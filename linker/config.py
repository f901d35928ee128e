"""Reading and validating a linker config (TOML), once, at the boundary.

The code below :func:`load_config` trusts the :class:`LinkConfig` it gets:
every key has been checked against the declared table ``_SCHEMA`` and every
error names the file and the key.  The config format is documented in
``docs/config.md``; ``configs/sample.toml`` is a complete commented example.
"""

from __future__ import annotations

import datetime as dt
import fnmatch
import hashlib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import ConfigError
from .checks import CheckSettings
from .link import LinkageSettings
from .normalize import DEFAULT_SEX_CODES, IdScheme, fold_header, fold_text
from .schema import CANONICAL_FIELDS, EVENT_FIELDS, PERSON_FIELDS

DATE_ORDERS = ("auto", "dmy", "mdy", "ymd")
CHECK_DIGITS = ("none", "luhn", "verhoeff", "damm")
FULL_NAME_ORDERS = ("given_first", "family_first")


@dataclass(frozen=True)
class SheetRule:
    """Settings for the sheets whose file and sheet names match the patterns."""

    file: str = "*"
    sheet: str = "*"
    slot: str | None = None                     # every row describes this slot
    slot_column: str | None = None              # folded header whose value decides the slot
    slot_values: dict[str, str] = field(default_factory=dict)  # folded value -> slot
    date_order: str | None = None
    sex_codes: dict[str, str] = field(default_factory=dict)
    full_name_order: str | None = None
    header_row: int | None = None               # force the header row (1-based)
    skip: bool = False                          # leave matching sheets out (ledgered)
    family_column: str | None = None            # folded header: rows sharing its value are one family
    columns: dict[str, dict[str, tuple[str, ...]]] = field(default_factory=dict)
    # columns: slot name (or "" for generic) -> field -> folded header names

    def matches(self, source_file: str, sheet: str) -> bool:
        name = source_file.rsplit("/", 1)[-1]
        file_ok = fnmatch.fnmatchcase(source_file.lower(), self.file.lower()) or \
            fnmatch.fnmatchcase(name.lower(), self.file.lower())
        return file_ok and fnmatch.fnmatchcase(sheet.lower(), self.sheet.lower())


@dataclass(frozen=True)
class SheetSettings:
    """The merged settings that apply to one sheet (see :meth:`LinkConfig.settings_for`)."""

    slot: str | None
    slot_column: str | None
    slot_values: dict[str, str]
    date_order: str
    sex_codes: dict[str, str]
    full_name_order: str
    header_row: int | None
    skip: bool
    slot_columns: dict[str, dict[str, tuple[str, ...]]]   # slot -> field -> folded headers
    generic_columns: dict[str, tuple[str, ...]]           # field -> folded headers
    family_column: str | None = None                      # folded header grouping rows into families


@dataclass(frozen=True)
class RosterConfig:
    file: Path
    sheet: str | None
    columns: dict[str, tuple[str, ...]]


@dataclass(frozen=True)
class LinkConfig:
    """A validated config.  Build it with :func:`load_config` or :func:`parse_config`."""

    source: str
    config_hash: str
    folder: Path
    patterns: tuple[str, ...]
    exclude: tuple[str, ...]
    skip_unreadable: bool
    scheme: IdScheme
    id_label: str
    date_order: str
    fallback_order: str
    min_year: int
    as_of: dt.date
    age_reference: tuple[str, ...]
    sex_codes: dict[str, str]
    full_name_order: str
    slots: dict[str, dict[str, tuple[str, ...]]]
    fields: dict[str, tuple[str, ...]]
    relations: tuple[tuple[str, str], ...]
    sheets: tuple[SheetRule, ...]
    roster: RosterConfig | None
    cutoff_date: dt.date | None
    min_parent_age_gap: float
    min_header_matches: int
    linkage: LinkageSettings = field(default_factory=LinkageSettings)
    checks: CheckSettings = field(default_factory=CheckSettings)
    reported_totals: tuple = ()                 # totals agencies reported, to set beside computed counts
    queries_by: str = "file"                    # one query sheet per source "file" or per top "folder"
    store: Path | None = None                   # the project store (SQLite): decisions and entity IDs
    corrections: Path | None = None             # corrections file applied at normalization
    spark: dict[str, Any] = field(default_factory=dict)   # [spark]: master (str) and conf (key -> str)
    raw: dict[str, Any] = field(repr=False, default_factory=dict)

    def settings_for(self, source_file: str, sheet: str) -> SheetSettings:
        """Merge the config defaults with every sheet rule matching this sheet."""
        slot = slot_column = None
        slot_values: dict[str, str] = {}
        date_order = self.date_order
        sex_codes = dict(self.sex_codes)
        full_name_order = self.full_name_order
        header_row = None
        skip = False
        family_column = None
        slot_cols = {s: dict(cols) for s, cols in self.slots.items()}
        generic = dict(self.fields)
        decided = False
        for rule in self.sheets:
            if not rule.matches(source_file, sheet):
                continue
            if not decided and (rule.slot or rule.slot_column):
                slot, slot_column, slot_values = rule.slot, rule.slot_column, rule.slot_values
                decided = True
            date_order = rule.date_order or date_order
            sex_codes.update(rule.sex_codes)
            full_name_order = rule.full_name_order or full_name_order
            header_row = rule.header_row or header_row
            skip = skip or rule.skip
            family_column = rule.family_column or family_column
            for owner, cols in rule.columns.items():
                target = generic if owner == "" else slot_cols.setdefault(owner, {})
                for fld, names in cols.items():
                    target[fld] = names          # a sheet's own vocabulary replaces the default
        return SheetSettings(slot, slot_column, slot_values, date_order, sex_codes,
                             full_name_order, header_row, skip, slot_cols, generic, family_column)


# ---------------------------------------------------------------------------
# Declared schema: section -> key -> (type check, description)
# ---------------------------------------------------------------------------
_STR = (str,)
_BOOL = (bool,)
_INT = (int,)
_NUM = (int, float)
_LIST = (list,)
_TABLE = (dict,)

_SCHEMA: dict[str, dict[str, tuple]] = {
    "delivery": {"folder": _STR, "patterns": _LIST, "exclude": _LIST, "skip_unreadable": _BOOL,
                 "min_header_matches": _INT},
    "identifier": {"label": _STR, "digits": _INT, "prefixes": _LIST, "separators": _LIST,
                   "check_digit": _STR},
    "dates": {"order": _STR, "fallback_order": _STR, "min_year": _INT, "as_of": (str, dt.date),
              "age_reference": _LIST},
    "sex": {"codes": _TABLE},
    "names": {"full_name_order": _STR},
    "slots": None,      # slot name -> {"columns": field -> [headers]}
    "fields": None,     # field -> [headers]
    "relations": None,  # [{child, parent}]
    "sheets": None,     # [{...}] checked by _SHEET_KEYS
    "roster": {"file": _STR, "sheet": _STR, "columns": _TABLE},
    "queries": {"group_by": _STR},
    "reported_totals": None,   # [{category, value, reported, source, who}]
    "report": {"age_edges": _LIST, "cuts": _LIST, "child_slot": _STR},
    "store": {"path": _STR},
    "corrections": {"file": _STR},
    "rules": {"cutoff_date": (str, dt.date), "min_parent_age_gap": _NUM, "birth_date_tolerance_days": _INT,
              "max_parents": _INT},
    "linkage": {"link_at": _NUM, "review_at": _NUM, "override_weight": _NUM, "seed": _INT,
                "random_pairs": _INT, "latent_classes": _INT, "name_high": _NUM, "name_medium": _NUM,
                "date_days": _INT, "block_cap": _INT, "name_window": _INT, "guards": _BOOL, "max_iter": _INT,
                "memory_mb": _INT},
    "spark": {"master": _STR, "conf": _TABLE},   # used by `linker run --engine spark` only
}
_SHEET_KEYS = {"file": _STR, "sheet": _STR, "slot": _STR, "slot_column": _STR,
               "slot_values": _TABLE, "date_order": _STR, "sex_codes": _TABLE,
               "full_name_order": _STR, "header_row": _INT, "skip": _BOOL, "columns": _TABLE,
               "family_column": _STR}


def load_config(path: str | Path) -> LinkConfig:
    """Read, validate and resolve a TOML config file.

    Raises
    ------
    ConfigError
        Naming the file and the offending key.
    """
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ConfigError(path, "", f"cannot read config ({exc.strerror or exc})") from None
    try:
        doc = tomllib.loads(data.decode("utf-8"))
    except UnicodeDecodeError:
        raise ConfigError(path, "", "config is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", f"not valid TOML: {exc}") from None
    return parse_config(doc, source=path, base=path.parent,
                        config_hash=hashlib.sha256(data).hexdigest())


def parse_config(doc: dict, source: str | Path = "<config>", base: str | Path = ".",
                 config_hash: str = "") -> LinkConfig:
    """Validate a config already parsed into a dict (paths relative to ``base``)."""
    v = _Validator(str(source))
    base = Path(base)
    for section in doc:
        if section not in _SCHEMA:
            v.fail(section, f"unknown section; known: {', '.join(sorted(_SCHEMA))}")
    for section, keys in _SCHEMA.items():
        if keys is None or section not in doc:
            continue
        table = v.table(doc[section], f"[{section}]")
        v.keys(table, keys, f"[{section}]")

    delivery = doc.get("delivery")
    if delivery is None:
        v.fail("[delivery]", "missing section: the config must name the delivery folder")
    if "folder" not in delivery:
        v.fail("[delivery] folder", "missing key")
    folder = (base / delivery["folder"]).resolve()
    patterns = tuple(v.strings(delivery.get("patterns", ["**/*.xlsx", "**/*.csv"]),
                               "[delivery] patterns"))
    exclude = tuple(v.strings(delivery.get("exclude", []), "[delivery] exclude"))

    ident = doc.get("identifier", {})
    digits = ident.get("digits", 8)
    if digits < 1 or digits > 30:
        v.fail("[identifier] digits", f"must be between 1 and 30, got {digits}")
    check = v.choice(ident.get("check_digit", "none"), CHECK_DIGITS, "[identifier] check_digit")
    scheme = IdScheme(digits=digits,
                      prefixes=tuple(p.upper() for p in v.strings(ident.get("prefixes", []),
                                                                   "[identifier] prefixes")),
                      separators=tuple(v.strings(ident.get("separators", ["-", " ", "/", "."]),
                                                 "[identifier] separators")),
                      check_digit=check)

    dates = doc.get("dates", {})
    order = v.choice(dates.get("order", "auto"), DATE_ORDERS, "[dates] order")
    fallback = v.choice(dates.get("fallback_order", "dmy"), DATE_ORDERS[1:], "[dates] fallback_order")
    as_of = v.date(dates.get("as_of", dt.date.today().isoformat()), "[dates] as_of")
    age_ref = tuple(v.strings(dates.get("age_reference", ["intake_date", "placement_date"]),
                              "[dates] age_reference"))
    for name in age_ref:
        if name not in EVENT_FIELDS:
            v.fail("[dates] age_reference", f"unknown event field {name!r}; known: {', '.join(EVENT_FIELDS)}")

    sex_codes = dict(DEFAULT_SEX_CODES)
    sex_codes.update(v.sex_codes(doc.get("sex", {}).get("codes", {}), "[sex] codes"))
    full_order = v.choice(doc.get("names", {}).get("full_name_order", "given_first"),
                          FULL_NAME_ORDERS, "[names] full_name_order")

    slots: dict[str, dict[str, tuple[str, ...]]] = {}
    for slot, body in v.table(doc.get("slots", {}), "[slots]").items():
        body = v.table(body, f"[slots.{slot}]")
        v.keys(body, {"columns": _TABLE}, f"[slots.{slot}]")
        slots[slot] = v.vocabulary(body.get("columns", {}), f"[slots.{slot}.columns]", PERSON_FIELDS)
    if not slots:
        v.fail("[slots]", "at least one person slot (e.g. [slots.child.columns]) is required")
    fields = v.vocabulary(doc.get("fields", {}), "[fields]", CANONICAL_FIELDS)

    relations = []
    for i, rel in enumerate(v.array(doc.get("relations", []), "[[relations]]")):
        rel = v.table(rel, f"[[relations]] #{i + 1}")
        v.keys(rel, {"child": _STR, "parent": _STR}, f"[[relations]] #{i + 1}")
        for role in ("child", "parent"):
            if rel.get(role) not in slots:
                v.fail(f"[[relations]] #{i + 1} {role}",
                       f"unknown slot {rel.get(role)!r}; slots: {', '.join(sorted(slots))}")
        relations.append((rel["child"], rel["parent"]))

    sheets = []
    for i, rule in enumerate(v.array(doc.get("sheets", []), "[[sheets]]")):
        where = f"[[sheets]] #{i + 1}"
        rule = v.table(rule, where)
        v.keys(rule, _SHEET_KEYS, where)
        if rule.get("slot") and rule.get("slot_column"):
            v.fail(where, "give either slot or slot_column, not both")
        if rule.get("slot") and rule["slot"] not in slots:
            v.fail(f"{where} slot", f"unknown slot {rule['slot']!r}; slots: {', '.join(sorted(slots))}")
        slot_values = {}
        for value, slot in v.table(rule.get("slot_values", {}), f"{where} slot_values").items():
            if slot not in slots:
                v.fail(f"{where} slot_values", f"value {value!r} maps to unknown slot {slot!r}")
            slot_values[fold_text(value).lower()] = slot
        if rule.get("slot_column") and not slot_values:
            v.fail(f"{where} slot_values", "slot_column needs slot_values (column value -> slot)")
        columns = {}
        for owner, cols in v.table(rule.get("columns", {}), f"{where} columns").items():
            if owner == "generic":
                columns[""] = v.vocabulary(cols, f"{where} columns.generic", CANONICAL_FIELDS)
            elif owner in slots:
                columns[owner] = v.vocabulary(cols, f"{where} columns.{owner}", PERSON_FIELDS)
            else:
                v.fail(f"{where} columns.{owner}", f"unknown slot; use a slot name or 'generic'")
        if "header_row" in rule and rule["header_row"] < 1:
            v.fail(f"{where} header_row", f"must be a row number >= 1 (as the spreadsheet shows it), "
                                          f"got {rule['header_row']}")
        sheets.append(SheetRule(
            file=rule.get("file", "*"), sheet=rule.get("sheet", "*"), slot=rule.get("slot"),
            slot_column=fold_header(rule["slot_column"]) if rule.get("slot_column") else None,
            slot_values=slot_values,
            date_order=v.choice(rule["date_order"], DATE_ORDERS, f"{where} date_order")
            if "date_order" in rule else None,
            sex_codes=v.sex_codes(rule.get("sex_codes", {}), f"{where} sex_codes"),
            full_name_order=v.choice(rule["full_name_order"], FULL_NAME_ORDERS,
                                     f"{where} full_name_order") if "full_name_order" in rule else None,
            header_row=rule.get("header_row"), skip=rule.get("skip", False), columns=columns,
            family_column=fold_header(rule["family_column"]) if rule.get("family_column") else None))

    roster = None
    if "roster" in doc:
        r = doc["roster"]
        if "file" not in r:
            v.fail("[roster] file", "missing key")
        roster = RosterConfig(file=(base / r["file"]).resolve(), sheet=r.get("sheet"),
                              columns=v.vocabulary(r.get("columns", {}), "[roster] columns",
                                                   CANONICAL_FIELDS))

    rules = doc.get("rules", {})
    cutoff = v.date(rules["cutoff_date"], "[rules] cutoff_date") if "cutoff_date" in rules else None
    gap = float(rules.get("min_parent_age_gap", 12))
    try:
        checks = CheckSettings(cutoff_date=cutoff, min_parent_age_gap=gap,
                               birth_date_tolerance_days=rules.get("birth_date_tolerance_days", 0),
                               max_parents=rules.get("max_parents", 2))
    except ValueError as exc:
        v.fail("[rules]", str(exc))

    totals = []
    for i, t in enumerate(v.array(doc.get("reported_totals", []), "[[reported_totals]]")):
        where = f"[[reported_totals]] #{i + 1}"
        t = v.table(t, where)
        v.keys(t, {"category": _STR, "value": _STR, "reported": _INT, "source": _STR, "who": _STR}, where)
        for key in ("category", "value", "reported"):
            if key not in t:
                v.fail(f"{where} {key}", "missing key")
        v.choice(t["category"], ("sex", "location", "status", "age_band"), f"{where} category")
        v.choice(t.get("who", "children"), ("children", "everyone"), f"{where} who")
        totals.append({"category": t["category"], "value": t["value"], "reported": t["reported"],
                       "source": t.get("source", ""), "who": t.get("who", "children")})
    queries_by = v.choice(doc.get("queries", {}).get("group_by", "file"), ("file", "folder"),
                          "[queries] group_by")
    try:
        linkage = LinkageSettings(**doc.get("linkage", {}))
    except ValueError as exc:
        v.fail("[linkage]", str(exc).removeprefix("linkage: "))
    spark = _spark_section(v, doc.get("spark", {}))

    return LinkConfig(
        linkage=linkage, source=str(source), config_hash=config_hash, folder=folder, patterns=patterns,
        exclude=exclude, skip_unreadable=delivery.get("skip_unreadable", False), scheme=scheme,
        id_label=ident.get("label", "registration number"), date_order=order,
        fallback_order=fallback, min_year=dates.get("min_year", 1900), as_of=as_of,
        age_reference=age_ref, sex_codes=sex_codes, full_name_order=full_order, slots=slots,
        fields=fields, relations=tuple(relations), sheets=tuple(sheets), roster=roster,
        cutoff_date=cutoff, min_parent_age_gap=gap, checks=checks, queries_by=queries_by,
        reported_totals=tuple(totals),
        store=(base / doc["store"]["path"]).resolve() if "path" in doc.get("store", {}) else None,
        corrections=(base / doc["corrections"]["file"]).resolve() if "file" in doc.get("corrections", {}) else None,
        min_header_matches=delivery.get("min_header_matches", 2), spark=spark, raw=doc)


def _spark_section(v: "_Validator", section: dict) -> dict[str, Any]:
    """[spark] master = "local[2]" and conf = {"spark.x" = value}: conf values must be plain scalars."""
    master = section.get("master")
    if master is not None and not master.strip():
        v.fail("[spark] master", "must name a Spark master, e.g. \"local[2]\" or \"spark://host:7077\"")
    conf = {}
    for key, value in v.table(section.get("conf", {}), "[spark] conf").items():
        if isinstance(value, dict):
            v.fail(f"[spark] conf {key}", "write each Spark setting as one quoted key, "
                   "e.g. \"spark.sql.shuffle.partitions\" = 8")
        if not key.startswith("spark."):
            v.fail(f"[spark] conf {key}", "Spark settings start with \"spark.\"")
        if isinstance(value, bool):
            value = "true" if value else "false"
        elif not isinstance(value, (str, int, float)):
            v.fail(f"[spark] conf {key}", f"must be a string, number or boolean, got {type(value).__name__}")
        conf[key] = str(value)
    return {"master": master, "conf": conf}


class _Validator:
    """Small checks that raise :class:`ConfigError` naming the file and key."""

    def __init__(self, source: str):
        self.source = source

    def fail(self, key: str, problem: str):
        raise ConfigError(self.source, key, problem)

    def table(self, value, key) -> dict:
        if not isinstance(value, dict):
            self.fail(key, f"must be a table, got {type(value).__name__}")
        return value

    def array(self, value, key) -> list:
        if not isinstance(value, list):
            self.fail(key, f"must be an array of tables, got {type(value).__name__}")
        return value

    def keys(self, table: dict, allowed: dict, where: str):
        for key, value in table.items():
            if key not in allowed:
                self.fail(f"{where} {key}", f"unknown key; known: {', '.join(sorted(allowed))}")
            types = allowed[key]
            if types and (not isinstance(value, types) or
                          (isinstance(value, bool) and bool not in types)):
                names = " or ".join(t.__name__ for t in types)
                self.fail(f"{where} {key}", f"must be {names}, got {type(value).__name__}")

    def strings(self, value, key) -> list[str]:
        if not isinstance(value, list) or not all(isinstance(x, str) for x in value):
            self.fail(key, "must be a list of strings")
        return value

    def choice(self, value, options, key) -> str:
        if value not in options:
            self.fail(key, f"unknown value {value!r}; choose one of: {', '.join(options)}")
        return value

    def date(self, value, key) -> dt.date:
        if isinstance(value, dt.datetime):
            return value.date()
        if isinstance(value, dt.date):
            return value
        try:
            return dt.date.fromisoformat(str(value))
        except ValueError:
            self.fail(key, f"must be a date written YYYY-MM-DD, got {value!r}")

    def sex_codes(self, value, key) -> dict[str, str]:
        out = {}
        for code, sex in self.table(value, key).items():
            if sex not in ("M", "F", ""):
                self.fail(f"{key} {code}", f"must map to \"M\", \"F\" or \"\" (unknown), got {sex!r}")
            out[fold_text(code).lower()] = sex
        return out

    def vocabulary(self, value, key, allowed_fields) -> dict[str, tuple[str, ...]]:
        out = {}
        for fld, names in self.table(value, key).items():
            if fld not in allowed_fields:
                self.fail(f"{key} {fld}", f"unknown field; known: {', '.join(allowed_fields)}")
            if isinstance(names, str):
                names = [names]
            names = self.strings(names, f"{key} {fld}")
            out[fld] = tuple(dict.fromkeys(fold_header(n) for n in names if fold_header(n)))
        return out

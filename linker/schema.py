"""The column contract between pipeline stages.

Every stage takes and returns plain pandas DataFrames.  This module names the
columns each frame carries so that stages (and tests) agree without importing
one another.

Conventions
-----------
* Missing text is the empty string ``""`` (never NaN) so CSV output is stable.
* Dates are ISO strings ``YYYY-MM-DD`` or ``""``.
* ``row`` is 1-based as a spreadsheet shows it; for CSV it is the record
  number with the file's first line as 1.
"""

from __future__ import annotations

# Canonical person fields a slot may carry (header vocabularies map to these).
PERSON_FIELDS = (
    "reg_no",
    "given_name",
    "family_name",
    "full_name",
    "birth_date",
    "age",
    "sex",
)
# Event fields: they describe the case on the row rather than the person.
EVENT_FIELDS = (
    "intake_date",
    "placement_date",
    "release_date",
    "location",
    "status",
)
CANONICAL_FIELDS = PERSON_FIELDS + EVENT_FIELDS
DATE_FIELDS = ("birth_date", "intake_date", "placement_date", "release_date")

# Provenance carried by every record and every finding.
PROVENANCE = ("source_file", "sheet", "row", "slot")

# Columns of records.csv, in order.  ``*_raw`` keep the value as delivered.
RECORD_COLUMNS = (
    "record_id",          # stable id: hash of provenance
    "row_key",            # id of the input row (shared by the persons on one row)
    *PROVENANCE,
    "reg_no",             # digits only, normalized ("" when unusable)
    "reg_no_prefix",      # letter prefix seen, if any
    "reg_no_status",      # valid | check_failed | wrong_length | unrecoverable | invalid | missing
    "reg_no_shared",      # True when the row shows this same reg_no for another person too
    "given_name",         # folded, upper case, particles kept
    "family_name",        # folded, upper case, particles kept
    "given_key",          # given names without particles
    "family_key",         # family names without particles (all parts, space separated)
    "name_key",           # sorted unique tokens of given + family (order-insensitive)
    "given_soundex",      # American Soundex of the first given token
    "family_soundex",     # American Soundex of the first family token
    "birth_date",         # ISO date or ""
    "birth_year",         # nullable integer
    "birth_date_min",     # earliest birth date consistent with the stated age (ISO or "")
    "birth_date_max",     # latest birth date consistent with the stated age (ISO or "")
    "age_months",         # stated age in months (float, NaN when none)
    "sex",                # M | F | ""
    "intake_date",
    "placement_date",
    "release_date",
    "location",
    "status",
    "notes",              # normalization notes, "; " separated (ambiguous date order, zeros restored, ...)
    "corrections",        # corrections applied from the corrections file, " | " separated ("" when none)
    "reg_no_raw",
    "given_name_raw",
    "family_name_raw",
    "full_name_raw",
    "birth_date_raw",
    "age_raw",
    "sex_raw",
    "intake_date_raw",
    "placement_date_raw",
    "release_date_raw",
    "location_raw",
    "status_raw",
    "extras",             # JSON object of unmapped columns on the row: {header: value}
)

# Columns of ledger.csv: one line per input row (and per empty sheet / skipped file).
LEDGER_COLUMNS = ("source_file", "sheet", "row", "outcome", "reason", "records")

# Ledger outcomes.
OUTCOME_RECORD = "record"        # the row produced one or more person-records
OUTCOME_HEADER = "header"        # the header row
OUTCOME_SKIPPED = "skipped"      # title/notes/blank/repeated header/total row, or no person data
OUTCOME_EMPTY_SHEET = "empty sheet"
OUTCOME_FILE_SKIPPED = "file skipped"

# Relation claims: from rows naming several persons (basis "row"), or from rows of one sheet
# sharing a family column's value (basis "family <value>"; ``row`` is the child's row).
CLAIM_COLUMNS = ("child_record_id", "parent_record_id", "source_file", "sheet", "row", "basis", "parent_row")

# Columns of files.csv.
FILE_COLUMNS = ("source_file", "kind", "size_bytes", "sha256", "modified", "sheets", "encoding", "status")

# Columns of relations.csv: one line per (child entity, parent entity) pair that some row claims.
RELATION_COLUMNS = (
    "child_entity_id", "parent_entity_id",
    "sources",            # independent sources: distinct source files with a claim
    "claims",             # rows with a claim
    "first_seen", "last_seen",   # earliest / latest event date on the claiming rows (ISO or "")
    "evidence",           # the claiming rows: "source_file | sheet | row", "; " separated
)

# Columns of findings.csv: one line per row involved in a finding.
FINDING_COLUMNS = ("rule", "severity", "entity_id", "record_id", *PROVENANCE, "detail")
SEVERITIES = ("error", "warning")

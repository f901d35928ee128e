#!/usr/bin/env python3
"""Seeded generator of the fictional Northern March demo delivery and its ground truth.

Everything written here is invented: the Northern March, its agencies (the
Northern March Holding Authority, the Office for Minors in Care, the Family
Tracing Desk, a legal-aid clinic, a court monitor), its places, its people and
the "holding register number" scheme (7 payload digits + a Luhn check digit).

``python sample/generate.py`` rewrites ``sample/delivery``, ``sample/roster``
and ``sample/truth`` byte for byte.  :func:`write_delivery` writes the same
kind of delivery anywhere, in the demo vocabulary (the headers
``configs/sample.toml`` lists) or in an ``alternate`` vocabulary that the demo
config does not know, together with a matching ``alternate.toml``.

The people, the rows and the injected defects depend only on ``seed`` and
``n_families``; the vocabulary only changes header names, file names, sheet
titles and the member-type values of the tracing file.

Besides the messiness (``truth/defects.csv``) the delivery carries labelled
impossible or contradictory records, one set per check rule
(``truth/injected.csv``, :class:`InjectionPlanner`): a dry render shows which
cells are clean, the injections are placed there, and the final render gives
the same messiness.

:func:`write_production2` (``--production 2 --out DIR``) writes the next
week's delivery of the same people: the files re-exported (rows shuffled,
sheets reordered, one file renamed), about 10% of the defects written right, a
few rows new and a few dropped, with its own truth and ``truth/changes.csv``.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import io
import json
import math
import re
import shutil
import unicodedata
import zipfile
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
import random

import openpyxl

SEED = 20260315
N_FAMILIES = 350
HERE = Path(__file__).resolve().parent

FIXED_TIME = dt.datetime(2026, 11, 1, 0, 0, 0)          # workbook created/modified stamps
ZIP_TIME = (2026, 11, 1, 0, 0, 0)                        # zip member timestamps
FIRST_INTAKE = dt.date(2025, 6, 1)
LAST_INTAKE = dt.date(2026, 8, 31)
LAST_EVENT = dt.date(2026, 10, 25)                       # events stay before the cutoff (2026-10-31)
EXCEL_EPOCH = dt.date(1899, 12, 30)                      # 1900 system, valid from 1900-03-01

STATIONS = ["Quarry Gate", "Linden Ford", "Port Emberly", "Saltreach", "Vell Crossing"]
SHELTERS = ["Alder House", "Bramble Court", "Cinder Lane Home", "Driftwood Lodge", "Eastmere House"]
EMPTY_SHELTER = "Fenwick (closed)"
MONTHS = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"]

# ---------------------------------------------------------------------------
# Name pools (invented people are built from these; the combinations are random)
# ---------------------------------------------------------------------------
ORIGINS = {
    "hispanic": dict(
        weight=24, double=0.45, particle_share=0.12,
        F=["María", "María José", "Lucía", "Sofía", "Inés", "Begoña", "Mónica", "Ana Belén", "Ximena",
           "Valentina", "Camila", "Guadalupe", "Rocío", "Ángela", "Marisol", "Itzel", "Yésica"],
        M=["José", "José Luis", "Juan Carlos", "Andrés", "Raúl", "Joaquín", "Iñaki", "Ángel", "Héctor",
           "Óscar", "Matías", "Tomás", "Rubén", "Jesús", "Martín", "Efraín", "Nicolás"],
        family=["García", "López", "Martínez", "Núñez", "Ibáñez", "Hernández", "Pérez", "González",
                "Rodríguez", "Muñoz", "Jiménez", "Gómez", "Díaz", "Ramírez", "Sánchez", "Castañeda",
                "Peña", "Ordóñez", "Quiñones", "Báez", "Suárez", "Vázquez", "Fernández", "Álvarez",
                "Domínguez", "Cortés", "Montaño"],
        particle=["de la Cruz", "del Río", "de León", "de los Santos", "de la Peña"]),
    "lusophone": dict(
        weight=8, double=0.25, particle_share=0.35,
        F=["Conceição", "Graça", "Luísa", "Beatriz", "Fernanda", "Joana", "Márcia", "Lúcia"],
        M=["João", "António", "Sebastião", "Luís", "Gonçalo", "Caio", "Vinícius", "Otávio"],
        family=["Gonçalves", "Magalhães", "Simões", "Araújo", "Brandão", "Lobato", "Figueira", "Assunção"],
        particle=["da Silva", "dos Santos", "da Costa", "do Nascimento", "da Rocha"]),
    "west_african": dict(
        weight=16, double=0.08, particle_share=0.0, double_sep="-",
        F=["Ngozi", "Adaeze", "Ifeoma", "Chiamaka", "Amara", "Abena", "Ama", "Esi", "Fatoumata",
           "Aïssata", "Mariam", "Oluwaseun", "Folasade", "Yetunde", "Adjoa"],
        M=["Oluwaseun", "Chidi", "Emeka", "Tunde", "Kwame", "Kofi", "Yaw", "Mamadou", "Ibrahima",
           "Amadou", "Oumar", "Seydou", "Moussa", "Babatunde", "Chinedu", "Kwabena"],
        family=["Okafor", "Adeyemi", "Okonkwo", "Balogun", "Eze", "Nwosu", "Mensah", "Owusu", "Boateng",
                "Asante", "Diallo", "Traoré", "Keïta", "Coulibaly", "Ndiaye", "Sow", "Bello", "Adébáyọ̀"],
        particle=[]),
    "vietnamese": dict(
        weight=10, double=0.0, particle_share=0.0,
        F=["Thi Lan", "Thị Hoa", "Ngọc Anh", "Mai", "Thu Hà", "Hương", "Thảo", "Kim Liên"],
        M=["Văn Minh", "Quốc Bảo", "Đức Anh", "Minh", "Thanh", "Dũng", "Tuấn", "Hoàng Nam"],
        family=["Nguyễn", "Trần", "Lê", "Phạm", "Hoàng", "Vũ", "Đặng", "Bùi", "Đỗ"],
        particle=[]),
    "francophone": dict(
        weight=9, double=0.05, particle_share=0.15, double_sep="-",
        F=["Hélène", "Anaïs", "Chloé", "Mégane", "Nadège", "Guerline", "Marie-Ange", "Rosemène"],
        M=["François", "Gaël", "Noé", "Jérôme", "Wilnès", "Frantz", "Jean-Baptiste", "Loïc"],
        family=["Lefèvre", "Joseph", "Pierre-Louis", "Saint-Fleur", "Désir", "Thélus", "Brézault",
                "Chérestal"],
        particle=["de la Fontaine", "du Pré", "de Saint-Aubin"]),
    "dutch": dict(
        weight=5, double=0.0, particle_share=0.6,
        F=["Sanne", "Anouk", "Femke", "Maaike", "Eline"],
        M=["Joris", "Bram", "Sjoerd", "Maarten", "Thijs"],
        family=["Verhoeven", "Bakker", "Smit", "Mulder"],
        particle=["van der Berg", "van Dijk", "de Vries", "ter Horst", "van den Heuvel"]),
    "turkish": dict(
        weight=8, double=0.0, particle_share=0.0,
        F=["Ayşe", "Elif", "Zeynep", "Şebnem", "Gül", "Hülya", "Özlem"],
        M=["Mehmet", "Gökhan", "Emre", "Barış", "Yusuf", "Çağlar", "İsmail"],
        family=["Yılmaz", "Öztürk", "Şahin", "Demir", "Çelik", "Kılıç", "Aydın", "Doğan"],
        particle=[]),
    "polish": dict(
        weight=6, double=0.05, particle_share=0.0, double_sep="-",
        F=["Małgorzata", "Zofia", "Łucja", "Agnieszka", "Katarzyna", "Jadwiga"],
        M=["Wojciech", "Łukasz", "Paweł", "Jakub", "Bartłomiej", "Grzegorz"],
        family=["Wójcik", "Kowalczyk", "Kamiński", "Wiśniewski", "Zieliński", "Dąbrowski", "Nowak"],
        particle=[]),
    "arabic": dict(
        weight=9, double=0.0, particle_share=0.0,
        F=["Nour", "Rania", "Layla", "Hana", "Yasmin", "Dalia", "Fátima", "Rüya"],
        M=["Omar", "Karim", "Samir", "Yusuf", "Khalil", "Tariq", "Anas", "Bilal"],
        family=["Haddad", "Khoury", "Mansour", "Al-Amin", "El-Sayed", "Nasser", "Saleh", "Azzam"],
        particle=[]),
    "anglophone": dict(
        weight=5, double=0.0, particle_share=0.0,
        F=["Grace", "Emily", "Chloe", "Hannah", "Zoë", "Siobhán"],
        M=["Liam", "Noah", "Connor", "Seán", "Declan"],
        family=["O'Brien", "O'Connor", "McKenna", "Byrne", "Walsh", "Ó Súilleabháin"],
        particle=[]),
}
ORIGIN_NAMES = list(ORIGINS)

# ---------------------------------------------------------------------------
# Header vocabularies.  "demo" entries all fold to names listed in
# configs/sample.toml; "alternate" entries fold to none of them.
# ---------------------------------------------------------------------------
VOCAB = {
    "demo": {
        "child": {
            "reg_no": ["Child Reg No", "Child HR Number", "Minor Reg", "Child Register No"],
            "given_name": ["Child First Name", "Child Given Name", "Minor First Name"],
            "family_name": ["Child Last Name", "Child Family Name", "Minor Surname"],
            "full_name": ["Child Name", "Child Full Name", "Minor Name"],
            "birth_date": ["Child DOB", "Child Date of Birth", "Minor DOB"],
            "age": ["Child Age", "Age of Minor"],
            "sex": ["Child Sex", "Child Gender", "Minor Sex"],
        },
        "parent": {
            "reg_no": ["Parent Reg No", "Guardian Reg", "Adult HR Number", "Parent Register No"],
            "given_name": ["Parent First Name", "Guardian First Name", "Adult Given Name"],
            "family_name": ["Parent Last Name", "Guardian Surname", "Adult Family Name"],
            "full_name": ["Parent Name", "Guardian Name", "Adult Full Name"],
            "birth_date": ["Parent DOB", "Guardian DOB", "Adult Date of Birth"],
            "age": ["Parent Age", "Adult Age"],
            "sex": ["Parent Sex", "Guardian Sex", "Adult Gender"],
        },
        "fields": {
            "reg_no": ["Reg No", "HR Number", "Register No", "Registration Number", "Reg #"],
            "given_name": ["First Name", "Given Name", "Given names"],
            "family_name": ["Last Name", "Surname", "Family Name"],
            "full_name": ["Name", "Full Name"],
            "birth_date": ["DOB", "Date of birth", "Birth Date"],
            "age": ["Age"],
            "sex": ["Sex", "Gender"],
            "intake_date": ["Intake date", "Date of intake", "Arrival date"],
            "placement_date": ["Placement date", "Date placed"],
            "release_date": ["Release date", "Reunification date", "Date released"],
            "location": ["Location", "Facility", "Station", "Shelter"],
            "status": ["Status", "Case status"],
        },
        "unmapped": {
            "remarks": "Officer remarks", "caseworker": "Caseworker", "case_id": "Case ID",
            "clinic_file": "Clinic file", "children_named": "Children named",
            "interpreter": "Interpreter", "escort": "Escort", "released_to": "Released to",
        },
        "slot_column": "Member Type",
        "member_values": {"child": ["Child", "Minor"], "parent": ["Parent", "Adult"],
                          "guardian": ["Guardian"]},
        "roster": {"reg_no": "Register number", "family_name": "Family name",
                   "given_name": "Given name", "birth_date": "Date of birth", "sex": "Sex"},
        "roster_sheet": "Class list",
        "files": {
            "custody": "nmha/nmha_custody_log_2026.xlsx",
            "omc": "omc_placements_2026.xlsx",
            "tracing": "family_tracing_2026.csv",
            "legal": "legal_aid_intake_2026.xlsx",
            "transfers:h1": "stations/station_transfers_2026_h1.csv",
            "transfers:h2": "stations/station_transfers_2026_h2.csv",
            "releases": "nmha/nmha_releases_2026.xlsx",
        },
        "roster_file": "class_list.xlsx",
    },
    "alternate": {
        "child": {
            "reg_no": ["Kid Holding ID", "Juvenile File Number", "Youngster ID", "Kid Holding Ref"],
            "given_name": ["Kid Given Name", "Juvenile Forename", "Youngster Forename"],
            "family_name": ["Kid Family Part", "Juvenile Second Name", "Youngster Family Part"],
            "full_name": ["Kid Whole Name", "Juvenile Names", "Youngster Called"],
            "birth_date": ["Kid Date Born", "Juvenile Born On", "Youngster Birthday"],
            "age": ["Kid Years", "Juvenile Age Now"],
            "sex": ["Kid M/F", "Juvenile Sex Code", "Youngster M/F"],
        },
        "parent": {
            "reg_no": ["Carer ID", "Caregiver Holding ID", "Accompanying Adult ID", "Carer Holding Ref"],
            "given_name": ["Carer Forename", "Caregiver Given", "Accompanying Adult Forename"],
            "family_name": ["Carer Family Part", "Caregiver Second Name", "Accompanying Adult Family Part"],
            "full_name": ["Carer Whole Name", "Caregiver Names", "Accompanying Adult Called"],
            "birth_date": ["Carer Date Born", "Caregiver Born On", "Accompanying Adult Birthday"],
            "age": ["Carer Years", "Caregiver Age Now"],
            "sex": ["Carer M/F", "Caregiver Sex Code", "Accompanying Adult M/F"],
        },
        "fields": {
            "reg_no": ["Holding ID", "ID Ref", "File Ref", "Holding Ref", "Holding ID Nbr"],
            "given_name": ["Forename", "Forenames", "Christian Name"],
            "family_name": ["Second Name", "Family Part", "Household Name"],
            "full_name": ["Whole Name", "Person Called"],
            "birth_date": ["Date Born", "Born On", "Birthday"],
            "age": ["Years Old"],
            "sex": ["M/F", "Sex Code"],
            "intake_date": ["Entered Custody", "Booked In", "Date Booked"],
            "placement_date": ["Date Housed", "Housed On"],
            "release_date": ["Let Out On", "Date Reunited", "Date Freed"],
            "location": ["Site", "Border Post", "Post", "Care Home"],
            "status": ["Progress", "State of Case"],
        },
        "unmapped": {
            "remarks": "Duty notes", "caseworker": "Key worker", "case_id": "Family file",
            "clinic_file": "Clinic ref", "children_named": "Dependants mentioned",
            "interpreter": "Language help", "escort": "Escorted by", "released_to": "Handed to",
        },
        "slot_column": "Person Kind",
        "member_values": {"child": ["Kid", "Youngster"], "parent": ["Carer", "Caregiver"],
                          "guardian": ["Kin carer"]},
        "roster": {"reg_no": "Listed Holding ID", "family_name": "Listed Family Part",
                   "given_name": "Listed Forename", "birth_date": "Listed Date Born",
                   "sex": "Listed M/F"},
        "roster_sheet": "Members",
        "files": {
            "custody": "holding/holding_book_2026.xlsx",
            "omc": "minors_office_placements_2026.xlsx",
            "tracing": "tracing_desk_2026.csv",
            "legal": "clinic_parents_2026.xlsx",
            "transfers:h1": "posts/post_manifest_2026_h1.csv",
            "transfers:h2": "posts/post_manifest_2026_h2.csv",
            "releases": "holding/discharges_2026.xlsx",
        },
        "roster_file": "members.xlsx",
    },
}

# ---------------------------------------------------------------------------
# Source profiles: how each agency writes values, and how often each defect
# is injected (rates are per person-record unless said otherwise).
# ---------------------------------------------------------------------------
PROFILES = {
    "custody": dict(
        reg_styles={"number": 33, "hr_dash": 30, "plain": 15, "hr_space_lower": 7, "float_text": 7,
                    "sci": 6, "nm_space": 1, "sci_lossy": 1},
        reg_missing=0.05, reg_digit=0.02, reg_swap=0.015, accent_drop=0.25, drop_second=0.30,
        typo=0.03, swap_names=0.02, dob_missing=0.03, dob_swap=0.02, dob_off=0.025,
        sex_missing=0.04, unknown_sex="", parent_reg_both=0.015,
        sex_styles=[(92, ("M", "F")), (5, ("Male", "Female")), (3, ("masc", "fem"))]),
    "omc": dict(
        reg_styles={"grouped_space": 40, "number": 30, "hr_dash": 20, "sci": 5, "float_text": 5},
        reg_missing=0.10, reg_digit=0.02, reg_swap=0.015, accent_drop=0.35, drop_second=0.35,
        typo=0.04, swap_names=0.02, dob_missing=0.05, dob_swap=0.03, dob_off=0.03,
        sex_missing=0.05, unknown_sex="", age_instead=0.22,
        sex_styles=[(93, ("1", "2")), (7, ("M", "F"))]),
    "tracing": dict(
        reg_styles={"hr_dash": 40, "plain": 30, "stripped_text": 20, "hr_space_lower": 10},
        reg_missing=0.08, reg_digit=0.02, reg_swap=0.015, accent_drop=0.10, drop_second=0.20,
        typo=0.03, swap_names=0.03, dob_missing=0.04, dob_swap=0.02, dob_off=0.025,
        sex_missing=0.05, unknown_sex="Unknown",
        sex_styles=[(85, ("Male", "Female")), (15, ("M", "F"))]),
    "legal": dict(
        reg_styles={"hr_space_lower": 30, "hr_plain": 20, "grouped_space": 30, "number": 20},
        reg_missing=0.15, reg_digit=0.03, reg_swap=0.02, accent_drop=0.05, drop_second=0.10,
        typo=0.02, swap_names=0.015, dob_missing=0.06, dob_swap=0.02, dob_off=0.03,
        sex_missing=0.03, unknown_sex="",
        sex_styles=[(70, ("M", "F")), (20, ("Masc", "Fem")), (10, ("Male", "Female"))]),
    "transfers": dict(
        reg_styles={"nm_dash": 40, "plain": 40, "sci": 10, "float_text": 10},
        reg_missing=0.06, reg_digit=0.02, reg_swap=0.015, accent_drop=0.15, drop_second=0.30,
        typo=0.03, swap_names=0.02, dob_missing=0.03, dob_swap=0.02, dob_off=0.025,
        sex_missing=0.04, unknown_sex="u", parent_reg_both=0.015,
        sex_styles=[(100, ("m", "f"))]),
    "releases": dict(
        reg_styles={"hr_slash": 30, "number": 40, "hr_dash": 30},
        reg_missing=0.05, reg_digit=0.015, reg_swap=0.01, accent_drop=0.30, drop_second=0.25,
        typo=0.03, swap_names=0.02, dob_missing=0.03, dob_swap=0.02, dob_off=0.02,
        sex_missing=0.04, unknown_sex="U", parent_reg_both=0.015,
        sex_styles=[(90, ("Male", "Female")), (10, ("M", "F"))]),
}

# Custody log: one sheet per station, each with its own header habits.
CUSTODY_SHEETS = {
    "Quarry Gate": dict(names="split", v=0, style="title", age=False, repeat_header=True,
                        gap_row=False, full_style="", dob_text=0.0),
    "Linden Ford": dict(names="split", v=1, style="title", age=True, repeat_header=False,
                        gap_row=True, full_style="", dob_text=0.10),
    "Port Emberly": dict(names="full", v=0, style="dotted", age=False, repeat_header=True,
                         gap_row=False, full_style="FAMILY, Given", dob_text=0.0),
    "Saltreach": dict(names="full", v=1, style="upper", age=True, repeat_header=False,
                      gap_row=False, full_style="Family, Given", dob_text=0.10),
    "Vell Crossing": dict(names="split", v=2, style="title", age=False, repeat_header=True,
                          gap_row=True, full_style="", dob_text=0.0),
}
REMARKS = ["", "", "", "", "", "interpreter requested", "medical check done", "property bag logged",
           "awaiting OMC", "see file note", "held in family unit", "transferred in", "phone call made"]


# ---------------------------------------------------------------------------
# Small pure helpers
# ---------------------------------------------------------------------------
def luhn_check_digit(payload: str) -> str:
    """Luhn check digit of a digit string (double every second digit from the right)."""
    total = 0
    for i, ch in enumerate(reversed(payload)):
        d = int(ch)
        if i % 2 == 0:
            d *= 2
            if d > 9:
                d -= 9
        total += d
    return str((10 - total % 10) % 10)


def luhn_valid(number: str) -> bool:
    """True when the last digit of ``number`` is the Luhn check digit of the others."""
    return number.isdigit() and len(number) >= 2 and luhn_check_digit(number[:-1]) == number[-1]


_SPECIAL_ASCII = {"Ł": "L", "ł": "l", "Đ": "D", "đ": "d", "ı": "i", "Ø": "O", "ø": "o",
                  "ß": "ss", "Æ": "AE", "æ": "ae", "Œ": "OE", "œ": "oe", "Þ": "Th", "þ": "th"}


def strip_accents(text: str) -> str:
    """Text with accents dropped, as an ASCII-only system would store it."""
    decomposed = unicodedata.normalize("NFKD", text)
    out = "".join(ch for ch in decomposed if not unicodedata.combining(ch))
    return "".join(_SPECIAL_ASCII.get(ch, ch) for ch in out)


def to_cp1252(text: str) -> str:
    """Text a cp1252 export can hold: characters outside cp1252 lose their accents."""
    out = []
    for ch in text:
        try:
            ch.encode("cp1252")
            out.append(ch)
        except UnicodeEncodeError:
            out.append(strip_accents(ch))
    return unicodedata.normalize("NFC", "".join(out))


def fold(text: str) -> str:
    """Header folding for comparisons: lower case, no accents, no punctuation or spaces."""
    return re.sub(r"[^0-9a-z]", "", strip_accents(str(text)).lower())


def excel_serial(d: dt.date) -> int:
    """1900-system serial number of a date (after 1900-03-01)."""
    return (d - EXCEL_EPOCH).days


def age_text_years_months(dob: dt.date, on: dt.date) -> tuple[int, int]:
    """Whole years and whole months of age on a date."""
    months = (on.year - dob.year) * 12 + (on.month - dob.month) - (1 if on.day < dob.day else 0)
    return months // 12, months


def add_years(d: dt.date, years: int) -> dt.date:
    """Same day ``years`` later (29 Feb becomes 28 Feb)."""
    try:
        return d.replace(year=d.year + years)
    except ValueError:
        return d.replace(year=d.year + years, day=28)


def format_reg(reg8: str, style: str):
    """Write an 8-digit register number in one of the delivery's habits."""
    a, b = reg8[:4], reg8[4:]
    stripped = reg8.lstrip("0") or "0"
    if style == "hr_dash":
        return f"HR-{a}-{b}"
    if style == "nm_dash":
        return f"NM-{a}-{b}"
    if style == "nm_space":
        return f"NM {a} {b}"
    if style == "hr_space_lower":
        return f"hr {reg8}"
    if style == "hr_slash":
        return f"HR/{a}/{b}"
    if style == "hr_plain":
        return f"HR{reg8}"
    if style == "grouped_space":
        return f"{a} {b}"
    if style == "plain":
        return reg8
    if style == "number":
        return int(reg8)
    if style == "stripped_text":
        return stripped
    if style == "float_text":
        return f"{stripped}.0"
    if style in ("sci", "sci_lossy"):
        mant = stripped[1:].rstrip("0") if style == "sci" else stripped[1:3]
        return f"{stripped[0]}.{mant}E+{len(stripped) - 1:02d}" if mant else \
            f"{stripped[0]}E+{len(stripped) - 1:02d}"
    raise ValueError(f"unknown register number style {style!r}")


def fmt_date(d: dt.date, style: str) -> str:
    """Text date in a named style."""
    if style == "dmy":
        return f"{d.day:02d}/{d.month:02d}/{d.year}"
    if style == "dmy_short":
        return f"{d.day}/{d.month}/{d.year}"
    if style == "mdy":
        return f"{d.month}/{d.day}/{d.year}"
    if style == "mdy_pad":
        return f"{d.month:02d}/{d.day:02d}/{d.year}"
    if style == "iso":
        return d.isoformat()
    if style == "d_mon_y":
        return f"{d.day} {MONTHS[d.month - 1]} {d.year}"
    raise ValueError(f"unknown date style {style!r}")


def display_header(name: str, style: str) -> str:
    """A header as a sheet writes it (case and punctuation only; the folded name is unchanged)."""
    if style == "upper":
        return name.upper()
    if style == "lower":
        return name.lower()
    if style == "dotted":
        name = re.sub(r"\bNo\b", "No.", name)
        return re.sub(r"\bDOB\b", "D.O.B.", name)
    return name


def weighted(rng: random.Random, table: dict | list):
    """Draw a key from {key: weight} or a value from [(weight, value)]."""
    if isinstance(table, dict):
        items = list(table.items())
        return rng.choices([k for k, _ in items], weights=[w for _, w in items])[0]
    return rng.choices([v for _, v in table], weights=[w for w, _ in table])[0]


# ---------------------------------------------------------------------------
# The scenario: families, persons, their case events
# ---------------------------------------------------------------------------
@dataclass
class Person:
    pid: str
    fid: str
    role: str                 # child | parent | guardian
    given: str
    family: str
    family_parts: tuple       # two parts for a double family name, else one
    dob: dt.date
    sex: str
    reg: str                  # 8 digits, last one a Luhn check digit
    placement: dt.date | None = None
    shelter: str = ""


@dataclass
class Family:
    fid: str
    origin: str
    station: str
    intake: dt.date
    adults: list = field(default_factory=list)
    children: list = field(default_factory=list)
    held_with: dict = field(default_factory=dict)     # child pid -> adult pid
    reunified: dt.date | None = None
    case_id: str = ""


@dataclass
class Row:
    source: str
    sheet: str
    slots: dict               # slot -> pid
    events: dict
    extras: dict
    order: tuple
    kind: str = ""
    added: bool = False       # added by a labelled injection (rendered with its own random stream)
    new: bool = False         # new in production 2 (rendered last in its sheet, with its own stream)


class Scenario:
    """Families and persons drawn from one seed."""

    def __init__(self, seed: int, n_families: int):
        self.rng = random.Random(f"{seed}-people")
        self.persons: dict[str, Person] = {}
        self.families: list[Family] = []
        self.used_regs: set[str] = set()
        self._pn = 0
        for i in range(n_families):
            self.families.append(self._family(i + 1))
        self._namesakes()

    # -- building blocks --------------------------------------------------
    def new_reg(self) -> str:
        rng = self.rng
        while True:
            r = rng.random()
            if r < 0.40:
                payload = "0" + str(rng.randint(100000, 999999))
            elif r < 0.45:
                payload = "00" + str(rng.randint(10000, 99999))
            else:
                payload = str(rng.randint(1000000, 9999999))
            reg = payload + luhn_check_digit(payload)
            if reg not in self.used_regs:
                self.used_regs.add(reg)
                return reg

    def family_name(self, origin: str) -> tuple[str, tuple]:
        pool = ORIGINS[origin]
        r = self.rng.random()
        if pool["particle"] and r < pool["particle_share"]:
            name = self.rng.choice(pool["particle"])
            return name, (name,)
        if r < pool["particle_share"] + pool["double"]:
            a, b = self.rng.sample(pool["family"], 2)
            sep = pool.get("double_sep", " ")
            return f"{a}{sep}{b}", (a, b)
        name = self.rng.choice(pool["family"])
        return name, (name,)

    def given_name(self, origin: str, sex: str, taken: list) -> str:
        pool_origin = origin if self.rng.random() < 0.85 else self.rng.choice(ORIGIN_NAMES)
        options = [g for g in ORIGINS[pool_origin][sex] if g not in taken]
        if not options:
            options = [g for o in ORIGIN_NAMES for g in ORIGINS[o][sex] if g not in taken]
        return self.rng.choice(options)

    def person(self, fam: Family, role: str, given: str, fname: tuple, dob: dt.date, sex: str) -> Person:
        self._pn += 1
        p = Person(f"P{self._pn:04d}", fam.fid, role, given, fname[0], fname[1], dob, sex, self.new_reg())
        self.persons[p.pid] = p
        return p

    def _family(self, n: int) -> Family:
        rng = self.rng
        origin = rng.choices(ORIGIN_NAMES, weights=[ORIGINS[o]["weight"] for o in ORIGIN_NAMES])[0]
        span = (LAST_INTAKE - FIRST_INTAKE).days
        fam = Family(f"F{n:03d}", origin, rng.choice(STATIONS),
                     FIRST_INTAKE + dt.timedelta(days=rng.randint(0, span)))
        fam.case_id = f"FT-{fam.intake.year % 100:02d}-{n * 7 + 1000:04d}"
        n_kids = rng.choices([1, 2, 3, 4], weights=[35, 30, 22, 13])[0]
        kid_ages = sorted((rng.randint(0, 17) for _ in range(n_kids)), reverse=True)
        n_adults = rng.choices([1, 2], weights=[70, 30])[0]
        guardian = n_adults == 1 and rng.random() < 0.08
        # adult sexes and names
        if n_adults == 2:
            sexes = ["M", "F"]
        else:
            sexes = ["F" if rng.random() < 0.75 else "M"]
        adult_names = [self.family_name(origin) for _ in sexes]
        if n_adults == 2 and rng.random() < 0.5 and origin != "hispanic":
            adult_names[1] = adult_names[0]
        if n_adults == 2 and origin == "hispanic" and len(adult_names[0][1]) == 2 == len(adult_names[1][1]):
            a, b = adult_names[0][1][0], adult_names[1][1][0]
            kids_name = (f"{a} {b}", (a, b))
        elif guardian and rng.random() < 0.6:
            kids_name = self.family_name(origin)
        elif n_adults == 1 and rng.random() < 0.15:
            kids_name = self.family_name(origin)
        else:
            kids_name = adult_names[0]
        # children
        taken: list = []
        kid_dobs = []
        for i, age in enumerate(kid_ages):
            dob = fam.intake - dt.timedelta(days=age * 365 + rng.randint(15, 350))
            kid_dobs.append(dob)
        twins = n_kids >= 2 and rng.random() < 0.07
        if twins:
            kid_dobs[1] = kid_dobs[0]
        for i, dob in enumerate(kid_dobs):
            sex = rng.choice("MF")
            given = self.given_name(origin, sex, taken)
            taken.append(given)
            fam.children.append(self.person(fam, "child", given, kids_name, dob, sex).pid)
        oldest = min(kid_dobs)
        youngest = max(kid_dobs)
        oldest_age = (fam.intake - oldest).days // 365
        youngest_age = (fam.intake - youngest).days // 365
        for sex, fname in zip(sexes, adult_names):
            lo = max(18, oldest_age + 16)
            hi = max(lo, min(60, youngest_age + 45))
            age = rng.randint(lo, hi)
            dob = fam.intake - dt.timedelta(days=age * 365 + rng.randint(10, 350))
            latest = add_years(oldest, -15)
            if dob > latest:
                dob = latest - dt.timedelta(days=rng.randint(0, 300))
            given = self.given_name(origin, sex, taken)
            taken.append(given)
            role = "guardian" if guardian else "parent"
            fam.adults.append(self.person(fam, role, given, fname, dob, sex).pid)
        # who each child was held with; separation and placement
        for c in fam.children:
            fam.held_with[c] = fam.adults[1] if len(fam.adults) == 2 and rng.random() < 0.35 else fam.adults[0]
        shelter = rng.choice(SHELTERS)
        base = fam.intake + dt.timedelta(days=rng.randint(1, 8))
        for c in fam.children:
            p = self.persons[c]
            p.shelter = shelter if rng.random() < 0.8 else rng.choice(SHELTERS)
            p.placement = base + dt.timedelta(days=rng.choice([0, 0, 0, 1, 2]))
        if rng.random() < 0.45:
            latest = (LAST_EVENT - base).days
            if latest > 25:
                fam.reunified = base + dt.timedelta(days=rng.randint(20, min(240, latest)))
        return fam

    def _namesakes(self):
        """Make a few persons in different families share given name, family name and birth year."""
        rng = self.rng
        made = 0
        tries = 0
        fams = self.families
        while made < 12 and tries < 2000:
            tries += 1
            a, b = rng.sample(fams, 2)
            ca = self.persons[rng.choice(a.children)]
            cb = self.persons[rng.choice(b.children)]
            if ca.sex != cb.sex or len(ca.family_parts) != 1 or len(cb.family_parts) != 1:
                continue
            if abs(ca.dob.year - cb.dob.year) > 2 or ca.dob == cb.dob:
                continue
            new_dob = cb.dob.replace(year=ca.dob.year) if not (cb.dob.month == 2 and cb.dob.day == 29) \
                else cb.dob.replace(year=ca.dob.year, day=28)
            if new_dob >= b.intake or new_dob == ca.dob or (b.intake - new_dob).days > 17 * 365:
                continue
            adults = [self.persons[x] for x in b.adults]
            if any(add_years(ad.dob, 15) > new_dob for ad in adults):
                continue
            sibs = [self.persons[x] for x in b.children if x != cb.pid]
            if any(s.given == ca.given for s in sibs):
                continue
            old_family = cb.family
            for x in b.children + b.adults:
                px = self.persons[x]
                if px.family == old_family:
                    px.family, px.family_parts = ca.family, ca.family_parts
            cb.given, cb.dob = ca.given, new_dob
            made += 1
        made = 0
        tries = 0
        while made < 4 and tries < 2000:
            tries += 1
            a, b = rng.sample(fams, 2)
            pa = self.persons[a.adults[0]]
            pb = self.persons[b.adults[0]]
            if pa.sex != pb.sex or abs(pa.dob.year - pb.dob.year) > 3 or pa.family == pb.family:
                continue
            new_dob = pb.dob.replace(year=pa.dob.year, day=min(pb.dob.day, 28))
            if any(add_years(new_dob, 15) > self.persons[c].dob for c in b.children):
                continue
            pb.given, pb.family, pb.family_parts, pb.dob = pa.given, pa.family, pa.family_parts, new_dob
            made += 1


# ---------------------------------------------------------------------------
# Which rows each agency file holds
# ---------------------------------------------------------------------------
def plan_rows(sc: Scenario, seed: int) -> list[Row]:
    """Rows of every agency file, with the persons each names (2-5 records per person)."""
    rng = random.Random(f"{seed}-rows")
    P = sc.persons
    rows: list[Row] = []
    for fam in sc.families:
        in_tracing = rng.random() < 0.5
        kids_custody = [c for c in fam.children if rng.random() < 0.92] if rng.random() < 0.85 else []
        for k, c in enumerate(kids_custody):
            parent = fam.held_with[c]
            release = P[c].placement if rng.random() < 0.85 else None
            rows.append(Row("custody", fam.station, {"child": c, "parent": parent},
                            {"intake_date": fam.intake, "release_date": release, "location": fam.station},
                            {"remarks": rng.choice(REMARKS)}, (fam.intake, fam.fid, k)))
        separated = rng.random() < 0.85
        for k, c in enumerate(fam.children):
            if not (separated and rng.random() < 0.88):
                continue
            p = P[c]
            status = "released to parent" if fam.reunified else rng.choice(["placed", "placed", "in care"])
            rows.append(Row("omc", p.shelter, {"child": c}, {"placement_date": p.placement,
                                                           "location": p.shelter, "status": status},
                            {"caseworker": rng.choice(["K.M.", "A.R.", "T.O.", "S.B.", "L.V.", ""])},
                            (p.placement, fam.fid, k)))
            if rng.random() < 0.06:
                other = rng.choice([s for s in SHELTERS if s != p.shelter])
                moved = p.placement + dt.timedelta(days=rng.randint(10, 60))
                rows.append(Row("omc", other, {"child": c}, {"placement_date": moved, "location": other,
                                                           "status": "transferred in"},
                                {"caseworker": rng.choice(["K.M.", "A.R.", "T.O."])},
                                (moved, fam.fid, k), kind="transfer"))
        if in_tracing:
            members = [a for a in fam.adults if rng.random() < 0.9] + \
                      [c for c in fam.children if rng.random() < 0.9]
            for k, pid in enumerate(members):
                rows.append(tracing_row(sc, fam, pid, k))
        for k, a in enumerate(fam.adults):
            if rng.random() < (0.72 if k == 0 else 0.5):
                rows.append(legal_row(sc, fam, a, rng))
                if rng.random() < 0.04:
                    rows.append(legal_row(sc, fam, a, rng, later=True))
        if fam.intake.year == 2026 and rng.random() < 0.4:
            half = "h1" if fam.intake.month <= 6 else "h2"
            arrival = fam.intake + dt.timedelta(days=rng.randint(1, 4))
            facility = rng.choice([s for s in STATIONS if s != fam.station])
            for k, c in enumerate(fam.children):
                if rng.random() < 0.9:
                    rows.append(Row("transfers", half, {"child": c, "parent": fam.held_with[c]},
                                    {"intake_date": arrival, "location": facility},
                                    {"escort": rng.choice(["NMHA van 3", "NMHA van 7", "escort team B", ""])},
                                    (arrival, fam.fid, k)))
        if fam.reunified:
            for k, c in enumerate(fam.children):
                if rng.random() < 0.9:
                    rows.append(release_row(fam, c, fam.held_with[c], fam.reunified, k))
    # three releases booked after the cutoff date (planned, not yet done)
    late = [r for r in rows if r.source == "releases"][:3]
    for i, r in enumerate(late):
        r.events["release_date"] = dt.date(2026, 11, 4 + 5 * i)
        r.events["status"] = "scheduled"
        r.sheet = "2026-Q4"
        r.kind = "after cutoff"
    balance_counts(sc, rows, rng)
    return rows


def tracing_row(sc: Scenario, fam: Family, pid: str, k: int) -> Row:
    status = "reunified" if fam.reunified else "open"
    return Row("tracing", "tracing", {"member": pid}, {"status": status, "release_date": fam.reunified},
               {"case_id": fam.case_id}, (fam.case_id, 0 if sc.persons[pid].role != "child" else 1, k))


def legal_row(sc: Scenario, fam: Family, pid: str, rng: random.Random, later: bool = False) -> Row:
    when = fam.intake + dt.timedelta(days=rng.randint(3, 60) + (rng.randint(30, 90) if later else 0))
    when = min(when, LAST_EVENT)
    kids = [c for c in fam.children if fam.held_with[c] == pid or rng.random() < 0.5]
    return Row("legal", str(when.year), {"parent": pid}, {"intake_date": when, "location": fam.station},
               {"children_named": ", ".join(sc.persons[c].given.split()[0] for c in kids),
                "named_pids": kids, "interpreter": rng.choice(["", "", "yes", "no"])},
               (when, fam.fid, pid), kind="repeat visit" if later else "")


def release_row(fam: Family, child: str, adult: str, when: dt.date, k: int) -> Row:
    quarter = f"{when.year}-Q{(when.month - 1) // 3 + 1}"
    return Row("releases", quarter, {"child": child, "parent": adult},
               {"release_date": when, "status": "reunified"}, {"released_to": "parent"},
               (when, fam.fid, k))


def extra_parent_rows(sc: Scenario, rows: list[Row], seed: int, n_children: int = 16) -> list[Row]:
    """too_many_parents: for a few children, two release rows that each name an unrelated adult as parent.

    The children already have a row naming their own parent, so with these they show three parents.
    Children with at most 3 records and adults with at most 4 are chosen, so everyone stays within
    2-5 records; each adult is at least 16 years older than the child and from another family.
    """
    rng = random.Random(f"{seed}-inject-rows")
    P = sc.persons
    counts = person_counts(rows)
    claimed = {r.slots["child"] for r in rows if "child" in r.slots and "parent" in r.slots}
    kids = [pid for pid, p in P.items() if p.role == "child" and pid in claimed and counts[pid] <= 3]
    adults = [pid for pid, p in P.items() if p.role != "child" and counts[pid] <= 4]
    taken: set = set()
    out = []
    for c in rng.sample(kids, min(n_children, len(kids))):
        child = P[c]
        options = [a for a in adults if a not in taken and P[a].fid != child.fid
                   and add_years(P[a].dob, 16) <= child.dob]
        if len(options) < 2:
            continue
        for j, a in enumerate(rng.sample(options, 2)):
            taken.add(a)
            when = min(child.placement + dt.timedelta(days=rng.randint(20, 150)), LAST_EVENT)
            quarter = f"{when.year}-Q{(when.month - 1) // 3 + 1}"
            out.append(Row("releases", quarter, {"child": c, "parent": a},
                           {"release_date": when, "status": "released"},
                           {"released_to": rng.choice(["parent", "relative", "sponsor"])},
                           (when, child.fid, f"x{j}"), kind="extra parent", added=True))
    return out


def person_counts(rows: list[Row]) -> Counter:
    return Counter(pid for r in rows for pid in r.slots.values())


def balance_counts(sc: Scenario, rows: list[Row], rng: random.Random) -> None:
    """Cap every person at 5 records and lift everyone to at least 2."""
    counts = person_counts(rows)
    # parents named on many sibling rows: blank the repeats (later rows first)
    for pid in sc.persons:
        if counts[pid] <= 5:
            continue
        mine = [r for r in rows if r.slots.get("parent") == pid and "child" in r.slots]
        seen = Counter()
        repeats = []
        for r in sorted(mine, key=lambda r: (r.source, r.order)):
            seen[(r.source, r.sheet)] += 1
            if seen[(r.source, r.sheet)] > 1:
                repeats.append(r)
        for r in reversed(repeats):
            if counts[pid] <= 5:
                break
            del r.slots["parent"]
            counts[pid] -= 1
        if counts[pid] > 5:
            for r in reversed([r for r in rows if r.slots.get("parent") == pid and r.source == "legal"]):
                if counts[pid] <= 5:
                    break
                rows.remove(r)
                counts[pid] -= 1
    for pid in sc.persons:
        while counts[pid] > 5:
            r = next(r for r in rows if r.kind == "transfer" and r.slots.get("child") == pid)
            rows.remove(r)
            counts[pid] -= 1
    fams = {f.fid: f for f in sc.families}
    for pid, p in sc.persons.items():
        while counts[pid] < 2:
            fam = fams[p.fid]
            in_tracing = any(r.source == "tracing" and r.slots.get("member") == pid for r in rows)
            if not in_tracing:
                rows.append(tracing_row(sc, fam, pid, 9))
            elif p.role == "child":
                rows.append(Row("omc", p.shelter, {"child": pid},
                                {"placement_date": p.placement, "location": p.shelter, "status": "placed"},
                                {"caseworker": ""}, (p.placement, fam.fid, 9)))
            else:
                rows.append(legal_row(sc, fam, pid, rng))
            counts[pid] += 1


# ---------------------------------------------------------------------------
# Writing values with defects
# ---------------------------------------------------------------------------
class Writer:
    """Turns true values into written cells, logging every injected defect."""

    def __init__(self, seed, sc: Scenario, defects: list | None = None):
        self.rng = random.Random(f"{seed}-mess")
        self.sc = sc
        self.defects: list[dict] = [] if defects is None else defects
        self.where: dict = {}
        self.last_reg: tuple = (None, None)    # (8 digits as written, style) of the last reg() call

    def defect(self, slot: str, pid: str, fld: str, kind: str, written="", true=""):
        self.defects.append({**self.where, "slot": slot, "person_id": pid, "field": fld,
                             "kind": kind, "written": "" if written is None else str(written),
                             "true_value": str(true)})

    # -- register number --------------------------------------------------
    def reg(self, prof: dict, slot: str, p: Person, csv_out: bool, force_reg: str | None = None):
        rng = self.rng
        if force_reg is None and rng.random() < prof["reg_missing"]:
            self.defect(slot, p.pid, "reg_no", "missing", "", p.reg)
            self.last_reg = (None, None)
            return None
        reg = force_reg or p.reg
        if force_reg:
            self.defect(slot, p.pid, "reg_no", "other person's number (parent's)", force_reg, p.reg)
        r = rng.random()
        if r < prof["reg_digit"]:
            i = rng.randrange(8)
            d = rng.choice([x for x in "0123456789" if x != reg[i]])
            reg = reg[:i] + d + reg[i + 1:]
            self.defect(slot, p.pid, "reg_no", "one digit changed", reg, p.reg)
        elif r < prof["reg_digit"] + prof["reg_swap"]:
            pairs = [i for i in range(7) if reg[i] != reg[i + 1]]
            i = rng.choice(pairs)
            reg = reg[:i] + reg[i + 1] + reg[i] + reg[i + 2:]
            self.defect(slot, p.pid, "reg_no", "adjacent digits swapped", reg, p.reg)
        style = weighted(rng, prof["reg_styles"])
        value = format_reg(reg, style)
        self.last_reg = (reg, style)
        if style in ("number", "stripped_text", "float_text", "sci") and reg.startswith("0"):
            self.defect(slot, p.pid, "reg_no", "leading zeros lost", value, p.reg)
        if style == "sci":
            self.defect(slot, p.pid, "reg_no", "scientific notation", value, p.reg)
        if style == "sci_lossy":
            self.defect(slot, p.pid, "reg_no", "scientific notation, digits lost", value, p.reg)
        if csv_out and isinstance(value, int):
            value = str(value)
        return value

    # -- names --------------------------------------------------------------
    def names(self, prof: dict, slot: str, p: Person) -> tuple[str, str, bool]:
        """(given, family, swapped) as written."""
        rng = self.rng
        given, family = p.given, p.family
        if len(p.family_parts) == 2 and rng.random() < prof["drop_second"]:
            family = p.family_parts[0]
            self.defect(slot, p.pid, "family_name", "second family name dropped", family, p.family)
        if rng.random() < prof["accent_drop"] and strip_accents(given + family) != given + family:
            given, family = strip_accents(given), strip_accents(family)
            self.defect(slot, p.pid, "name", "accents dropped", f"{given} | {family}", f"{p.given} | {p.family}")
        if rng.random() < prof["typo"]:
            which = rng.choice(["given", "family"])
            before = given if which == "given" else family
            after = self.typo(before)
            if which == "given":
                given = after
            else:
                family = after
            self.defect(slot, p.pid, f"{which}_name", "one-letter typo", after, before)
        swapped = rng.random() < prof["swap_names"]
        if swapped:
            self.defect(slot, p.pid, "name", "given and family name swapped", f"{family} | {given}",
                        f"{p.given} | {p.family}")
        return given, family, swapped

    def typo(self, text: str) -> str:
        rng = self.rng
        spots = [i for i, ch in enumerate(text) if ch.isalpha()]
        if len(spots) < 3:
            return text + text[-1]
        i = rng.choice(spots[1:])
        op = rng.choice(["sub", "del", "double"])
        if op == "del":
            return text[:i] + text[i + 1:]
        if op == "double":
            return text[:i] + text[i] + text[i:]
        letter = rng.choice([c for c in "aeioulnrstmk" if c != text[i].lower()])
        return text[:i] + (letter.upper() if text[i].isupper() else letter) + text[i + 1:]

    # -- birth date -----------------------------------------------------------
    def dob(self, prof: dict, slot: str, p: Person) -> dt.date | None:
        rng = self.rng
        d = p.dob
        if rng.random() < prof["dob_missing"]:
            self.defect(slot, p.pid, "birth_date", "missing", "", d.isoformat())
            return None
        if rng.random() < prof["dob_swap"] and d.day <= 12 and d.day != d.month:
            w = d.replace(day=d.month, month=d.day)
            self.defect(slot, p.pid, "birth_date", "day and month swapped", w.isoformat(), d.isoformat())
            return w
        if rng.random() < prof["dob_off"]:
            part = rng.choice(["day", "month", "year"])
            step = rng.choice([-1, 1])
            if part == "day":
                w = d + dt.timedelta(days=step)
            elif part == "month":
                m = d.month + step
                w = d.replace(month=12 if m == 0 else 1 if m == 13 else m, day=min(d.day, 28))
            else:
                w = add_years(d, step)
            self.defect(slot, p.pid, "birth_date", f"{part} off by one", w.isoformat(), d.isoformat())
            return w
        return d

    # -- sex ------------------------------------------------------------------
    def sex(self, prof: dict, slot: str, p: Person, styles=None) -> str:
        rng = self.rng
        if rng.random() < prof["sex_missing"]:
            value = prof["unknown_sex"] if rng.random() < 0.5 else ""
            self.defect(slot, p.pid, "sex", "missing or unknown", value, p.sex)
            return value
        m, f = weighted(rng, styles or prof["sex_styles"])
        return m if p.sex == "M" else f

    # -- age ------------------------------------------------------------------
    def age(self, p: Person, on: dt.date, as_text: bool):
        rng = self.rng
        years, months = age_text_years_months(p.dob, on)
        if years < 2:
            value = rng.choice([f"{months} mo", f"{months} months", f"{months} m"])
        elif as_text:
            value = rng.choice([str(years), f"{years} yrs", f"{years} years"])
        else:
            value = years if rng.random() < 0.7 else f"{years} yrs"
        return value


# ---------------------------------------------------------------------------
# Files
# ---------------------------------------------------------------------------
def header_name(vocab: dict, owner: str, fld: str, v: int, style: str) -> str:
    """Display header of (owner, field) in variant ``v``."""
    if owner == "unmapped":
        return display_header(vocab["unmapped"][fld], style)
    if owner == "slot_column":
        return display_header(vocab["slot_column"], style)
    table = vocab["fields"] if owner in ("generic", "event") else vocab[owner]
    names = table[fld]
    return display_header(names[v % len(names)], style)


def full_name(given: str, family: str, style: str) -> str:
    if style == "FAMILY, Given":
        return f"{family.upper()}, {given}"
    if style == "Family, Given":
        return f"{family}, {given}"
    return f"{given} {family}"


class Delivery:
    """Renders the planned rows into files and collects the truth."""

    def __init__(self, out_dir: Path, vocabulary: str, seed: int, n_families: int,
                 plan: dict | None = None, dry: bool = False, reexport: "Reexport | None" = None):
        """``plan``: cell overrides of the labelled injections, {(file, sheet, row, slot): {field: value}}
        (slot "" for the row's event dates).  ``dry``: render without writing files.
        ``reexport``: production 2 (:class:`Reexport`): its new rows are rendered too, and files
        are saved re-exported (rows dropped and shuffled, sheets reordered, a file renamed)."""
        if vocabulary not in VOCAB:
            raise ValueError(f"vocabulary must be one of {', '.join(VOCAB)}, got {vocabulary!r}")
        self.out = Path(out_dir)
        self.mode = vocabulary
        self.seed = seed
        self.vocab = VOCAB[vocabulary]
        self.sc = Scenario(seed, n_families)
        self.rows = plan_rows(self.sc, seed)
        self.rows += extra_parent_rows(self.sc, self.rows, seed)
        self.reexport = reexport
        if reexport is not None:
            self.rows += reexport.new_rows
        self.w_main = Writer(seed, self.sc)
        self.w_added = Writer(f"{seed}-added", self.sc, self.w_main.defects)   # rows added by injections
        self.w_new = Writer(f"{seed}-production2", self.sc)                   # rows new in production 2
        self.stamp = FIXED_TIME if reexport is None else reexport.stamp
        self.w = self.w_main
        self.layout_rng = random.Random(f"{seed}-layout")
        self.truth: list[dict] = []
        self.files: dict[str, int] = {}
        self.plan = plan or {}
        self.dry = dry
        self.seen: dict[tuple, dict] = {}      # (file, sheet, row, slot) -> what was written, in render order
        self.cur: tuple = ()

    # -- injection hooks -----------------------------------------------------------
    def begin(self, row: Row, rel: str, sheet: str, r: int):
        """Start rendering ``row`` at file row ``r``: pick its random stream, set the defect location."""
        self.w = self.w_new if row.new else self.w_added if row.added else self.w_main
        self.w.where = {"source_file": rel, "sheet": sheet, "row": r}
        self.cur = (rel, sheet, r, row)

    def override(self, slot: str, fld: str, value):
        """The planned injection for ``fld`` of ``slot`` on the current row, else ``value``."""
        rel, sheet, r, _ = self.cur
        return self.plan.get((rel, sheet, r, slot), {}).get(fld, value)

    def events(self) -> dict:
        """The current row's event values with planned injections applied."""
        rel, sheet, r, row = self.cur
        return {**row.events, **self.plan.get((rel, sheet, r, ""), {})}

    def noted(self, slot: str, p: Person, cells: dict, dob, age=None):
        """Remember what one person slot shows (the injection planner reads this)."""
        rel, sheet, r, row = self.cur
        self.seen[(rel, sheet, r, slot)] = {
            "pid": p.pid, "row": row, "reg": cells["reg"], "reg_digits": cells["reg_digits"],
            "reg_style": cells["reg_style"], "dob": dob, "age": age, "sex": cells["sex"]}

    # -- helpers ---------------------------------------------------------------
    def rows_of(self, source: str, sheet: str | None = None) -> list[Row]:
        out = [r for r in self.rows if r.source == source and (sheet is None or r.sheet == sheet)]
        return sorted(out, key=lambda r: (r.new, r.order[0], r.order[1], str(r.order[2])))

    def rel(self, key: str) -> str:
        return self.vocab["files"][key]

    def record(self, source_file: str, sheet: str, row: int, slot: str, pid: str):
        self.truth.append({"source_file": source_file, "sheet": sheet, "row": row, "slot": slot,
                           "person_id": pid})

    def person_cells(self, prof: dict, slot: str, p: Person, csv_out: bool, force_reg=None,
                     sex_styles=None) -> dict:
        """Written values of one person: reg, given, family, swapped, dob, sex."""
        reg = self.w.reg(prof, slot, p, csv_out, force_reg)
        given, family, swapped = self.w.names(prof, slot, p)
        dob = self.w.dob(prof, slot, p)
        sex = self.w.sex(prof, slot, p, sex_styles)
        digits, style = self.w.last_reg
        given, family = self.override(slot, "given", given), self.override(slot, "family", family)
        swapped = self.override(slot, "swapped", swapped)
        return {"reg": self.override(slot, "reg", reg), "given": given, "family": family, "swapped": swapped,
                "dob": self.override(slot, "dob", dob), "sex": self.override(slot, "sex", sex),
                "reg_digits": digits, "reg_style": style}

    def parent_reg_for_child(self, prof: dict, row: Row) -> str | None:
        if "parent" in row.slots and self.w.rng.random() < prof.get("parent_reg_both", 0):
            return self.sc.persons[row.slots["parent"]].reg
        return None

    # -- custody log ---------------------------------------------------------------
    def write_custody(self):
        rel = self.rel("custody")
        prof = PROFILES["custody"]
        wb = openpyxl.Workbook()
        wb.remove(wb.active)
        for sheet, lay in CUSTODY_SHEETS.items():
            ws = wb.create_sheet(sheet)
            v, style = lay["v"], lay["style"]
            cols = [("child", "reg_no")]
            cols += [("child", "family_name"), ("child", "given_name")] if lay["names"] == "split" \
                else [("child", "full_name")]
            cols += [("child", "birth_date")] + ([("child", "age")] if lay["age"] else []) + [("child", "sex")]
            cols += [("parent", "reg_no")]
            cols += [("parent", "family_name"), ("parent", "given_name")] if lay["names"] == "split" \
                else [("parent", "full_name")]
            cols += [("parent", "birth_date"), ("parent", "sex"), ("event", "intake_date"),
                     ("event", "release_date"), ("event", "location"), ("unmapped", "remarks")]
            event_v = {"location": 2, "release_date": 0 if v % 2 == 0 else 2}   # "Station", "Release date"
            header = [header_name(self.vocab, o, f, event_v.get(f, v) if o == "event" else v, style)
                      for o, f in cols]
            title = ("Northern March Holding Authority - custody log - " if self.mode == "demo"
                     else "NMHA holding book - ") + f"{sheet} station"
            ws.cell(row=1, column=1, value=title)
            ws.cell(row=2, column=1, value="Extract of 2026-10-05. Entries as keyed at intake; not verified. "
                                           "Times removed.")
            r = 4 if lay["gap_row"] else 3
            for c, h in enumerate(header, 1):
                ws.cell(row=r, column=c, value=h)
            r += 1
            rows = self.rows_of("custody", sheet)
            blanks = sorted(self.layout_rng.sample(range(2, max(3, len(rows))), k=min(2, max(0, len(rows) - 3))))
            repeat_at = len(rows) // 2 if lay["repeat_header"] and len(rows) > 10 else -1
            for i, row in enumerate(rows):
                if i in blanks:
                    r += 1
                if i == repeat_at:
                    for c, h in enumerate(header, 1):
                        ws.cell(row=r, column=c, value=h)
                    r += 1
                self.begin(row, rel, sheet, r)
                values = {}
                force = self.parent_reg_for_child(prof, row)
                for slot in ("child", "parent"):
                    if slot not in row.slots:
                        continue
                    p = self.sc.persons[row.slots[slot]]
                    cells = self.person_cells(prof, slot, p, False, force if slot == "child" else None)
                    g, f = (cells["family"], cells["given"]) if cells["swapped"] else (cells["given"], cells["family"])
                    dob = cells["dob"]
                    if slot == "child" and lay["age"] and self.w.rng.random() < 0.15:
                        values[(slot, "age")] = self.w.age(p, row.events["intake_date"], False)
                        if dob is not None:
                            self.w.defect(slot, p.pid, "birth_date", "age instead of birth date",
                                          values[(slot, "age")], p.dob.isoformat())
                        dob = None
                    if slot == "child" and lay["age"]:
                        values[(slot, "age")] = self.override(slot, "age", values.get((slot, "age")))
                    self.noted(slot, p, cells, dob, values.get((slot, "age")))
                    if dob is not None and self.w.rng.random() < lay["dob_text"]:
                        dob = fmt_date(dob, "dmy")
                    values[(slot, "reg_no")] = cells["reg"]
                    values[(slot, "given_name")] = g
                    values[(slot, "family_name")] = f
                    values[(slot, "full_name")] = full_name(g, f, lay["full_style"] or "FAMILY, Given")
                    values[(slot, "birth_date")] = dob
                    values[(slot, "sex")] = cells["sex"]
                    self.record(rel, sheet, r, slot, p.pid)
                for k, val in self.events().items():
                    values[("event", k)] = val
                values[("unmapped", "remarks")] = row.extras.get("remarks", "")
                for c, key in enumerate(cols, 1):
                    put(ws, r, c, values.get(key), "dd/mm/yyyy")
                r += 1
            ws.cell(row=r, column=1, value="Total")
            kept = len(rows) - (self.reexport.n_dropped(rel, sheet) if self.reexport else 0)
            ws.cell(row=r, column=len(cols), value=f"{kept} entries")
        self.save_xlsx(wb, rel)

    # -- OMC placements ------------------------------------------------------------------
    def write_omc(self):
        rel = self.rel("omc")
        prof = PROFILES["omc"]
        wb = openpyxl.Workbook()
        wb.remove(wb.active)
        cols = [("child", "reg_no", 0), ("child", "family_name", 0), ("child", "given_name", 0),
                ("child", "birth_date", 0), ("child", "age", 1), ("child", "sex", 0),
                ("event", "placement_date", 0), ("event", "location", 3), ("event", "status", 0),
                ("unmapped", "caseworker", 0)]
        for sheet in SHELTERS + [EMPTY_SHELTER]:
            ws = wb.create_sheet(sheet)
            if sheet == EMPTY_SHELTER:
                continue
            title = ("Office for Minors in Care - placements - " if self.mode == "demo"
                     else "Minors office - children housed - ") + sheet
            ws.cell(row=1, column=1, value=title)
            header = [header_name(self.vocab, o, f, v, "title") for o, f, v in cols]
            for c, h in enumerate(header, 1):
                ws.cell(row=3, column=c, value=h)
            r = 4
            for row in self.rows_of("omc", sheet):
                self.begin(row, rel, sheet, r)
                p = self.sc.persons[row.slots["child"]]
                cells = self.person_cells(prof, "child", p, False)
                g, f = (cells["family"], cells["given"]) if cells["swapped"] else (cells["given"], cells["family"])
                dob, age = cells["dob"], None
                if self.w.rng.random() < prof["age_instead"]:
                    age = self.w.age(p, row.events["placement_date"], True)
                    if dob is not None:
                        self.w.defect("child", p.pid, "birth_date", "age instead of birth date", age,
                                      p.dob.isoformat())
                    dob = None
                age = self.override("child", "age", age)
                self.noted("child", p, cells, dob, age)
                events = self.events()
                date_style = weighted(self.w.rng, {"cell": 40, "serial": 25, "text": 35})
                values = {("child", "reg_no"): cells["reg"], ("child", "given_name"): g,
                          ("child", "family_name"): f, ("child", "birth_date"): omc_date(dob, date_style, self.w.rng),
                          ("child", "age"): age, ("child", "sex"): cells["sex"],
                          ("event", "placement_date"): omc_date(events["placement_date"], date_style, self.w.rng),
                          ("event", "location"): events["location"], ("event", "status"): events["status"],
                          ("unmapped", "caseworker"): row.extras.get("caseworker", "")}
                for c, (o, fl, _) in enumerate(cols, 1):
                    put(ws, r, c, values.get((o, fl)), "m/d/yyyy")
                self.record(rel, sheet, r, "child", p.pid)
                r += 1
        self.save_xlsx(wb, rel)

    # -- family tracing CSV (cp1252) -------------------------------------------------------
    def write_tracing(self):
        rel = self.rel("tracing")
        stem = Path(rel).stem
        prof = PROFILES["tracing"]
        cols = [("unmapped", "case_id", 0), ("slot_column", "", 0), ("generic", "reg_no", 0),
                ("generic", "full_name", 0), ("generic", "birth_date", 0), ("generic", "sex", 0),
                ("event", "status", 1), ("event", "release_date", 1)]
        header = [header_name(self.vocab, o, f, v, "dotted") for o, f, v in cols]
        lines = [header]
        members = self.vocab["member_values"]
        for row in self.rows_of("tracing"):
            n = len(lines) + 1
            self.begin(row, rel, stem, n)
            p = self.sc.persons[row.slots["member"]]
            slot = "child" if p.role == "child" else "parent"
            cells = self.person_cells(prof, slot, p, True)
            self.noted(slot, p, cells, cells["dob"])
            g, f = (cells["family"], cells["given"]) if cells["swapped"] else (cells["given"], cells["family"])
            name = full_name(g, f, "FAMILY, Given" if self.w.rng.random() < 0.15 else "Given Family")
            if to_cp1252(name) != name:
                self.w.defect(slot, p.pid, "name", "transliterated for cp1252", to_cp1252(name), name)
                name = to_cp1252(name)
            dob = fmt_date(cells["dob"], "dmy" if self.w.rng.random() < 0.8 else "dmy_short") if cells["dob"] else ""
            rel_date = self.events().get("release_date")
            mtype = self.w.rng.choice(members[p.role])
            lines.append([row.extras["case_id"], mtype, cells["reg"] or "", name, dob, cells["sex"],
                          row.events["status"], fmt_date(rel_date, "dmy") if rel_date else ""])
            self.record(rel, stem, n, slot, p.pid)
        self.save_csv(lines, rel, "cp1252")

    # -- legal-aid intake ------------------------------------------------------------------
    def write_legal(self):
        rel = self.rel("legal")
        prof = PROFILES["legal"]
        wb = openpyxl.Workbook()
        wb.remove(wb.active)
        cols = [("unmapped", "clinic_file", 0), ("generic", "family_name", 1), ("generic", "given_name", 2),
                ("generic", "birth_date", 1), ("generic", "reg_no", 4), ("generic", "sex", 1),
                ("event", "intake_date", 1), ("event", "location", 2), ("unmapped", "children_named", 0),
                ("unmapped", "interpreter", 0)]
        n_file = 0
        for sheet in ("2025", "2026"):
            ws = wb.create_sheet(f"Intake {sheet}")
            name = ws.title
            ws.cell(row=1, column=1, value="Linden Ford Legal Aid Clinic" if self.mode == "demo"
                    else "Border Clinic - parents seen")
            ws.cell(row=2, column=1, value=f"Parent intake sheet {sheet} - confidential, prepared for class counsel")
            header = [header_name(self.vocab, o, f, v, "title") for o, f, v in cols]
            for c, h in enumerate(header, 1):
                ws.cell(row=4, column=c, value=h)
            r = 5
            for row in self.rows_of("legal", sheet):
                n_file += 1
                self.begin(row, rel, name, r)
                p = self.sc.persons[row.slots["parent"]]
                cells = self.person_cells(prof, "parent", p, False)
                self.noted("parent", p, cells, cells["dob"])
                g, f = (cells["family"], cells["given"]) if cells["swapped"] else (cells["given"], cells["family"])
                dob = cells["dob"]
                if dob is not None and self.w.rng.random() < 0.3:
                    dob = fmt_date(dob, "dmy")
                values = {("unmapped", "clinic_file"): f"LA-{sheet[2:]}-{n_file:04d}",
                          ("generic", "family_name"): f, ("generic", "given_name"): g,
                          ("generic", "birth_date"): dob, ("generic", "reg_no"): cells["reg"],
                          ("generic", "sex"): cells["sex"], ("event", "intake_date"): self.events()["intake_date"],
                          ("event", "location"): row.events["location"],
                          ("unmapped", "children_named"): row.extras["children_named"],
                          ("unmapped", "interpreter"): row.extras["interpreter"]}
                for c, (o, fl, _) in enumerate(cols, 1):
                    put(ws, r, c, values.get((o, fl)), "dd/mm/yyyy")
                self.record(rel, name, r, "parent", p.pid)
                r += 1
            r += 1
            for note in ("Notes:", "* Reg # as stated by the client; not checked against NMHA records.",
                         "* Children named as given by the parent at intake."):
                ws.cell(row=r, column=1, value=note)
                r += 1
        self.save_xlsx(wb, rel)

    # -- station transfers (UTF-8 with BOM) ------------------------------------------------
    def write_transfers(self):
        prof = PROFILES["transfers"]
        layouts = {
            "h1": ([("child", "reg_no", 2), ("child", "family_name", 2), ("child", "given_name", 2),
                    ("child", "birth_date", 2), ("child", "sex", 2), ("parent", "reg_no", 1),
                    ("parent", "family_name", 1), ("parent", "given_name", 1), ("parent", "birth_date", 1),
                    ("parent", "sex", 1), ("event", "intake_date", 2), ("event", "location", 1),
                    ("unmapped", "escort", 0)], "dotted", {"child": [(100, ("m", "f"))], "parent": [(100, ("m", "f"))]}),
            "h2": ([("child", "reg_no", 3), ("child", "family_name", 1), ("child", "given_name", 1),
                    ("child", "birth_date", 1), ("child", "sex", 1), ("parent", "reg_no", 3),
                    ("parent", "family_name", 2), ("parent", "given_name", 2), ("parent", "birth_date", 2),
                    ("parent", "sex", 2), ("event", "intake_date", 1), ("event", "location", 0),
                    ("unmapped", "escort", 0)], "lower",
                   {"child": [(100, ("Boy", "Girl"))], "parent": [(100, ("Male", "Female"))]}),
        }
        for half, (cols, style, sexes) in layouts.items():
            rel = self.rel(f"transfers:{half}")
            stem = Path(rel).stem
            lines = [[header_name(self.vocab, o, f, v, style) for o, f, v in cols]]
            for row in self.rows_of("transfers", half):
                n = len(lines) + 1
                self.begin(row, rel, stem, n)
                values = {}
                force = self.parent_reg_for_child(prof, row)
                for slot in ("child", "parent"):
                    if slot not in row.slots:
                        continue
                    p = self.sc.persons[row.slots[slot]]
                    cells = self.person_cells(prof, slot, p, True, force if slot == "child" else None,
                                              sexes[slot])
                    self.noted(slot, p, cells, cells["dob"])
                    g, f = (cells["family"], cells["given"]) if cells["swapped"] else (cells["given"], cells["family"])
                    values.update({(slot, "reg_no"): cells["reg"], (slot, "given_name"): g,
                                   (slot, "family_name"): f,
                                   (slot, "birth_date"): cells["dob"].isoformat() if cells["dob"] else "",
                                   (slot, "sex"): cells["sex"]})
                    self.record(rel, stem, n, slot, p.pid)
                values[("event", "intake_date")] = self.events()["intake_date"].isoformat()
                values[("event", "location")] = row.events["location"]
                values[("unmapped", "escort")] = row.extras["escort"]
                lines.append([values.get((o, f)) or "" for o, f, _ in cols])
            self.save_csv(lines, rel, "utf-8-sig")

    # -- release list -----------------------------------------------------------------
    def write_releases(self):
        rel = self.rel("releases")
        prof = PROFILES["releases"]
        wb = openpyxl.Workbook()
        wb.remove(wb.active)
        cols = [("child", "full_name", 1), ("child", "reg_no", 1), ("child", "birth_date", 1),
                ("child", "sex", 1), ("parent", "full_name", 2), ("parent", "reg_no", 2),
                ("parent", "birth_date", 2), ("parent", "sex", 2), ("event", "release_date", 2),
                ("event", "status", 0), ("unmapped", "released_to", 0)]
        sheets = sorted({r.sheet for r in self.rows if r.source == "releases"})
        for sheet in sheets:
            ws = wb.create_sheet(sheet)
            ws.cell(row=1, column=1, value=("NMHA releases and reunifications, " if self.mode == "demo"
                                            else "Discharges, ") + sheet)
            header = [header_name(self.vocab, o, f, v, "title") for o, f, v in cols]
            for c, h in enumerate(header, 1):
                ws.cell(row=2, column=c, value=h)
            r = 3
            for row in self.rows_of("releases", sheet):
                self.begin(row, rel, sheet, r)
                values = {}
                force = self.parent_reg_for_child(prof, row)
                for slot in ("child", "parent"):
                    if slot not in row.slots:
                        continue
                    p = self.sc.persons[row.slots[slot]]
                    cells = self.person_cells(prof, slot, p, False, force if slot == "child" else None)
                    self.noted(slot, p, cells, cells["dob"])
                    g, f = (cells["family"], cells["given"]) if cells["swapped"] else (cells["given"], cells["family"])
                    values.update({(slot, "full_name"): full_name(g, f, "Given Family"),
                                   (slot, "reg_no"): cells["reg"],
                                   (slot, "birth_date"): fmt_date(cells["dob"], "d_mon_y") if cells["dob"] else None,
                                   (slot, "sex"): cells["sex"]})
                    self.record(rel, sheet, r, slot, p.pid)
                if row.kind == "after cutoff":
                    self.w.defect("", "", "release_date", "event after the cutoff date",
                                  row.events["release_date"].isoformat(), "")
                events = self.events()
                values[("event", "release_date")] = fmt_date(events["release_date"], "d_mon_y")
                values[("event", "status")] = events["status"]
                values[("unmapped", "released_to")] = row.extras["released_to"]
                for c, (o, fl, _) in enumerate(cols, 1):
                    put(ws, r, c, values.get((o, fl)), "dd/mm/yyyy")
                r += 1
        self.save_xlsx(wb, rel)

    # -- roster and truth ---------------------------------------------------------------
    def write_roster(self) -> list[dict]:
        rng = random.Random(f"{self.seed}-roster")
        on_list = {pid: rng.random() < 0.93 for pid in self.sc.persons}
        listed = [p for p in self.sc.persons.values() if on_list[p.pid]]
        missing = [p for p in self.sc.persons.values() if not on_list[p.pid]]
        # a few class members no agency file mentions
        invented = []
        fake_fam = Family("F000", "hispanic", STATIONS[0], dt.date(2026, 1, 15))
        for i in range(8):
            origin = rng.choice(ORIGIN_NAMES)
            sex = rng.choice("MF")
            fname = self.sc.family_name(origin)
            given = self.sc.given_name(origin, sex, [])
            dob = dt.date(rng.randint(1975, 2020), rng.randint(1, 12), rng.randint(1, 28))
            reg = self.sc.new_reg()
            invented.append(Person("", "", "child" if dob.year > 2008 else "parent", given, fname[0],
                                   fname[1], dob, sex, reg))
        entries = [(p, p.pid) for p in listed] + [(p, "") for p in invented]
        entries.sort(key=lambda e: (fold(e[0].family), fold(e[0].given), e[0].dob, e[0].reg))
        wb = openpyxl.Workbook()
        ws = wb.active
        ws.title = self.vocab["roster_sheet"]
        cols = ["reg_no", "family_name", "given_name", "birth_date", "sex"]
        for c, key in enumerate(cols, 1):
            ws.cell(row=1, column=c, value=self.vocab["roster"][key])
        out = []
        for i, (p, pid) in enumerate(entries):
            r = i + 2
            for c, val in enumerate([format_reg(p.reg, "hr_dash"), p.family, p.given, p.dob, p.sex], 1):
                put(ws, r, c, val, "dd/mm/yyyy")
            out.append({"roster_row": r, "person_id": pid, "status": "listed" if pid else "roster only"})
        for p in missing:
            out.append({"roster_row": "", "person_id": p.pid, "status": "not on roster"})
        rel = Path("roster") / self.vocab["roster_file"]
        self.save_xlsx(wb, str(rel), base=self.out)
        return out

    def render(self):
        """Render every agency file (written unless ``dry``)."""
        self.write_custody()
        self.write_omc()
        self.write_tracing()
        self.write_legal()
        self.write_transfers()
        self.write_releases()

    def write_truth(self, roster: list[dict], injected: list[list]):
        tdir = self.out / "truth"
        tdir.mkdir(parents=True, exist_ok=True)
        appearing = {t["person_id"] for t in self.truth}
        persons = [p for p in self.sc.persons.values() if p.pid in appearing]
        write_table(tdir / "persons.csv",
                    ["person_id", "family_id", "role", "given_name", "family_name", "birth_date", "sex", "reg_no"],
                    [[p.pid, p.fid, p.role, p.given, p.family, p.dob.isoformat(), p.sex, p.reg] for p in persons])
        write_table(tdir / "records.csv", ["source_file", "sheet", "row", "slot", "person_id"],
                    [[t["source_file"], t["sheet"], t["row"], t["slot"], t["person_id"]] for t in self.truth])
        pairs = [(c, a) for f in self.sc.families for c in f.children for a in f.adults]
        rel_rows = [[c, a, e] for (c, a), e in zip(pairs, relation_evidence(self.seen, pairs))]
        write_table(tdir / "relations.csv", ["child_person_id", "parent_person_id", "evidence"], rel_rows)
        write_table(tdir / "roster.csv", ["roster_row", "person_id", "status"],
                    [[r["roster_row"], r["person_id"], r["status"]] for r in roster])
        keys = ["source_file", "sheet", "row", "slot", "person_id", "field", "kind", "written", "true_value"]
        write_table(tdir / "defects.csv", keys, [[d.get(k, "") for k in keys] for d in self.w_main.defects])
        write_table(tdir / "injected.csv", INJECTED_COLUMNS, injected)

    # -- output plumbing -----------------------------------------------------------------
    def save_xlsx(self, wb, rel: str, base: Path | None = None):
        if self.dry:
            return
        if self.reexport is not None and base is None:
            wb, rel = self.reexport.workbook(wb, rel, self.truth)
        path = (base or self.out / "delivery") / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        wb.properties.creator = "Northern March sample generator"
        wb.properties.created = self.stamp
        wb.properties.modified = self.stamp
        buf = io.BytesIO()
        wb.save(buf)
        path.write_bytes(repack_zip(buf.getvalue(), self.stamp))

    def save_csv(self, lines: list[list], rel: str, encoding: str):
        if self.dry:
            return
        if self.reexport is not None:
            lines, rel = self.reexport.csv_lines(lines, rel, self.truth)
        path = self.out / "delivery" / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        text = io.StringIO()
        csv.writer(text, lineterminator="\r\n").writerows(lines)
        path.write_bytes(text.getvalue().encode(encoding))

    def write_config(self):
        """alternate.toml: the demo config's structure with this vocabulary."""
        v = self.vocab
        files = v["files"]

        def names(lst):
            return "[" + ", ".join(json.dumps(x.lower(), ensure_ascii=False) for x in lst) + "]"

        def pattern(key):
            stem = Path(files[key]).name.split("_2026")[0]
            return f"{stem}*{Path(files[key]).suffix}"

        lines = [
            "# linker configuration for a generated delivery in the alternate vocabulary",
            "# (fictional scenario: the Northern March Holding Authority and its partner agencies).",
            "# Written by sample/generate.py; paths are relative to this file.",
            "",
            "[delivery]",
            'folder = "delivery"',
            'patterns = ["**/*.xlsx", "**/*.csv"]',
            "exclude = []",
            "skip_unreadable = false",
            "",
            "[identifier]",
            'label = "holding register number"',
            "digits = 8",
            'prefixes = ["HR", "NM"]',
            'separators = ["-", " ", "/", "."]',
            'check_digit = "luhn"',
            "",
            "[dates]",
            'order = "auto"',
            'fallback_order = "dmy"',
            "min_year = 1900",
            'as_of = "2026-11-01"',
            'age_reference = ["intake_date", "placement_date"]',
            "",
            "[sex]",
            'codes = { m = "M", male = "M", boy = "M", masc = "M", h = "M", f = "F", female = "F", '
            'girl = "F", fem = "F", u = "", unknown = "", x = "" }',
            "",
        ]
        for slot in ("child", "parent"):
            lines.append(f"[slots.{slot}.columns]")
            for fld, lst in v[slot].items():
                lines.append(f"{fld} = {names(lst)}")
            lines.append("")
        lines.append("[fields]")
        for fld, lst in v["fields"].items():
            lines.append(f"{fld} = {names(lst)}")
        slot_values = {}
        for role, vals in v["member_values"].items():
            for val in vals:
                slot_values[val.lower()] = "child" if role == "child" else "parent"
        sv = ", ".join(f"{json.dumps(k)} = {json.dumps(s)}" for k, s in slot_values.items())
        lines += [
            "",
            "[[relations]]",
            'child = "child"',
            'parent = "parent"',
            "",
            "[[sheets]]",
            f"file = {json.dumps(pattern('tracing'))}",
            f"slot_column = {json.dumps(v['slot_column'].lower())}",
            f"slot_values = {{ {sv} }}",
            "",
            "[[sheets]]",
            f"file = {json.dumps(pattern('legal'))}",
            'sheet = "*"',
            'slot = "parent"',
            "",
            "[[sheets]]",
            f"file = {json.dumps(pattern('omc'))}",
            'date_order = "mdy"',
            'sex_codes = { "1" = "M", "2" = "F" }',
            "",
            "[roster]",
            f"file = {json.dumps('roster/' + v['roster_file'])}",
            f"sheet = {json.dumps(v['roster_sheet'])}",
            "columns = { " + ", ".join(f"{k} = {names([n])}" for k, n in v["roster"].items()) + " }",
            "",
            "[rules]",
            'cutoff_date = "2026-10-31"',
            "min_parent_age_gap = 12",
            "",
        ]
        (self.out / "alternate.toml").write_text("\n".join(lines), encoding="utf-8")


# ---------------------------------------------------------------------------
# Labelled injections: impossible or contradictory records, one set per check rule
# ---------------------------------------------------------------------------
RULES = ("self_parent", "parent_too_young", "release_before_intake", "event_after_cutoff", "event_before_birth",
         "sex_conflict", "birth_date_conflict", "age_conflict", "too_many_parents", "shared_reg_no")
INJECT_PER_RULE = 18
CUTOFF = dt.date(2026, 10, 31)                           # [rules] cutoff_date of configs/sample.toml
RECOVERABLE_REG = {"leading zeros lost"}    # the digits can still be read back (scientific notation may not)
ZERO_LOSING = ("number", "stripped_text", "float_text", "sci", "sci_lossy")
SEX_FLIP = {"M": "F", "F": "M", "m": "f", "f": "m", "Male": "Female", "Female": "Male", "masc": "fem",
            "fem": "masc", "Masc": "Fem", "Fem": "Masc", "Boy": "Girl", "Girl": "Boy", "1": "2", "2": "1"}
INJECTED_COLUMNS = ["rule", "source_file", "sheet", "row", "slot", "person_id", "field", "written", "true_value"]


def iso(d) -> str:
    return d.isoformat() if d else ""


def years_between(a: dt.date, b: dt.date) -> float:
    return (b - a).days / 365.25


class InjectionPlanner:
    """Chooses the injected cells from what a dry render wrote, so the messiness stays as it was.

    Injections change attributes, not identity: an injected person cell keeps its names, and
    its register number (except for self_parent / shared_reg_no, where the number is the
    injection) is exact and shared with another record of the same person, so linkage can
    still place it.  Each row and each person takes part in at most one injection.
    """

    def __init__(self, d: "Delivery", seed):
        self.d = d
        self.P = d.sc.persons
        self.fams = {f.fid: f for f in d.sc.families}
        self.rng = random.Random(f"{seed}-inject")
        self.seen = d.seen
        self.kinds: dict[tuple, set] = {}
        for x in d.w_main.defects:
            self.kinds.setdefault((x["source_file"], x["sheet"], x["row"], x["slot"]), set()).add(
                (x["field"], x["kind"]))
        self.by_person: dict[str, list] = {}
        self.by_row: dict[tuple, dict] = {}
        for key, info in self.seen.items():
            self.by_person.setdefault(info["pid"], []).append(key)
            self.by_row.setdefault(key[:3], {})[key[3]] = key
        self.used_rows: set = set()
        self.used_persons: set = set()
        self.plan: dict[tuple, dict] = {}
        self.lines: list[list] = []

    # -- what a cell shows ------------------------------------------------------
    def info(self, key) -> dict:
        return self.seen[key]

    def row_of(self, key) -> Row:
        return self.seen[key]["row"]

    def defect_fields(self, key) -> set:
        return {f for f, _ in self.kinds.get(key, ())}

    def clean(self, key) -> bool:
        """No messiness defect at all, and reg, birth date and sex are written."""
        i = self.seen[key]
        return not self.kinds.get(key) and bool(i["reg_digits"]) and i["dob"] is not None and bool(i["sex"])

    def reg_ok(self, key) -> bool:
        """The cell shows the person's own number, readable back to 8 digits."""
        i = self.seen[key]
        bad = {k for f, k in self.kinds.get(key, ()) if f == "reg_no"} - RECOVERABLE_REG
        return bool(i["reg_digits"]) and not bad

    def anchored(self, key) -> bool:
        """Another record of the same person shows the person's own number."""
        return any(k != key and self.reg_ok(k) for k in self.by_person[self.seen[key]["pid"]])

    def free_row(self, rkey) -> bool:
        slots = self.by_row[rkey]
        row = self.seen[next(iter(slots.values()))]["row"]
        return (rkey not in self.used_rows and row.kind not in ("after cutoff", "extra parent")
                and not any(self.seen[k]["pid"] in self.used_persons for k in slots.values()))

    def take_row(self, rkey):
        self.used_rows.add(rkey)
        self.used_persons |= {self.seen[k]["pid"] for k in self.by_row[rkey].values()}

    def pair_rows(self, sources=("custody", "transfers", "releases")) -> list[tuple]:
        return [rk for rk, slots in self.by_row.items() if {"child", "parent"} <= set(slots)
                and self.seen[slots["child"]]["row"].source in sources]

    def rows_of(self, source: str) -> list[tuple]:
        return [rk for rk, slots in self.by_row.items()
                if self.seen[next(iter(slots.values()))]["row"].source == source]

    # -- bookkeeping --------------------------------------------------------------
    def line(self, rule: str, key, fld: str, written, true):
        rel, sheet, r, slot = key
        self.lines.append([rule, rel, sheet, r, slot, self.seen[key]["pid"], fld,
                           "" if written is None else str(written), "" if true is None else str(true)])

    def put(self, key, fld: str, value):
        self.plan.setdefault(key, {})[fld] = value

    def fill(self, candidates: list, n: int, inject) -> int:
        """Try ``inject(candidate)`` on the candidates in a seeded order until ``n`` succeeded."""
        order = list(candidates)
        self.rng.shuffle(order)
        done = 0
        for c in order:
            if done >= n:
                break
            if inject(c):
                done += 1
        return done

    def run(self, n: int = INJECT_PER_RULE) -> tuple[dict, list[list]]:
        self.event_after_cutoff_existing()
        self.self_parent(n)
        self.too_many_parents()
        for rule in (self.parent_too_young, self.release_before_intake, self.event_after_cutoff,
                     self.event_before_birth, self.shared_reg_no, self.sex_conflict, self.birth_date_conflict,
                     self.age_conflict):
            rule(n)
        self.lines.sort(key=lambda x: (RULES.index(x[0]), x[1], x[2], int(x[3]), x[4]))
        return self.plan, self.lines

    # -- the rules ----------------------------------------------------------------
    def self_parent(self, n: int):
        """Rows whose child and parent show one number: the messiness ones, topped up to ``n``."""
        def same(rk):
            c, p = self.seen[self.by_row[rk]["child"]], self.seen[self.by_row[rk]["parent"]]
            return (c["reg_digits"] and c["reg_digits"] == p["reg_digits"]
                    and not {"sci", "sci_lossy"} & {c["reg_style"], p["reg_style"]})

        def label(rk, child_written):
            ck, pk = self.by_row[rk]["child"], self.by_row[rk]["parent"]
            self.line("self_parent", ck, "reg_no", child_written, self.P[self.seen[ck]["pid"]].reg)
            self.line("self_parent", pk, "reg_no", self.seen[pk]["reg"], self.P[self.seen[pk]["pid"]].reg)
            self.take_row(rk)

        existing = [rk for rk in self.pair_rows() if same(rk)]
        for rk in existing:
            label(rk, self.seen[self.by_row[rk]["child"]]["reg"])

        def inject(rk):
            ck, pk = self.by_row[rk]["child"], self.by_row[rk]["parent"]
            if not (self.free_row(rk) and self.clean(ck) and self.anchored(ck) and self.clean(pk)):
                return False
            self.put(ck, "reg", self.seen[pk]["reg"])
            label(rk, self.seen[pk]["reg"])
            return True
        self.fill(self.pair_rows(), n - len(existing), inject)

    def parent_too_young(self, n: int):
        """Change one birth date on a child+parent row so the parent is 10.5-11.5 years older."""
        def inject(rk):
            ck, pk = self.by_row[rk]["child"], self.by_row[rk]["parent"]
            child, parent = self.P[self.seen[ck]["pid"]], self.P[self.seen[pk]["pid"]]
            gap = years_between(parent.dob, child.dob)
            if not self.free_row(rk) or gap >= 20:
                return False
            which = "parent" if self.rng.random() < 0.67 else "child"
            mod, other = (pk, ck) if which == "parent" else (ck, pk)
            if not (self.clean(mod) and self.anchored(mod) and self.seen[other]["dob"] is not None
                    and "birth_date" not in self.defect_fields(other)):
                return False
            k = math.ceil(gap - 11.5)
            new_parent = add_years(parent.dob, k) if which == "parent" else parent.dob
            new_child = add_years(child.dob, -k) if which == "child" else child.dob
            if not 10.0 <= years_between(new_parent, new_child) <= 11.6:
                return False
            new = new_parent if which == "parent" else new_child
            self.put(mod, "dob", new)
            self.line("parent_too_young", mod, "birth_date", iso(new), iso(self.P[self.seen[mod]["pid"]].dob))
            other_dob = iso(self.P[self.seen[other]["pid"]].dob)
            self.line("parent_too_young", other, "birth_date", other_dob, other_dob)
            self.take_row(rk)
            return True
        self.fill(self.pair_rows(), n, inject)

    def release_before_intake(self, n: int):
        """Custody rows (intake and release columns): release 3-45 days before intake."""
        def inject(rk):
            if not self.free_row(rk):
                return False
            slots = self.by_row[rk]
            row = self.row_of(next(iter(slots.values())))
            child = self.P[row.slots["child"]]
            new = row.events["intake_date"] - dt.timedelta(days=self.rng.randint(3, 45))
            if new <= child.dob:
                return False
            self.put(rk + ("",), "release_date", new)
            for key in slots.values():
                self.line("release_before_intake", key, "release_date", iso(new), iso(row.events["release_date"]))
            self.take_row(rk)
            return True
        self.fill(self.rows_of("custody"), n, inject)

    def event_after_cutoff_existing(self):
        """The messiness already books three releases after the cutoff: label them."""
        for rk, slots in self.by_row.items():
            row = self.row_of(next(iter(slots.values())))
            if row.kind == "after cutoff":
                for key in slots.values():
                    self.line("event_after_cutoff", key, "release_date", iso(row.events["release_date"]), "")
                self.take_row(rk)

    def event_after_cutoff(self, n: int):
        """Custody and tracing release dates, legal-aid intake dates 3-100 days after the cutoff."""
        have = len({tuple(x[1:4]) for x in self.lines if x[0] == "event_after_cutoff"})
        plan = [("custody", "release_date"), ("tracing", "release_date"), ("legal", "intake_date")]
        for i, (source, fld) in enumerate(plan):
            def inject(rk, fld=fld):
                if not self.free_row(rk):
                    return False
                slots = self.by_row[rk]
                row = self.row_of(next(iter(slots.values())))
                new = CUTOFF + dt.timedelta(days=self.rng.randint(3, 100))
                self.put(rk + ("",), fld, new)
                for key in slots.values():
                    self.line("event_after_cutoff", key, fld, iso(new), iso(row.events.get(fld)))
                self.take_row(rk)
                return True
            share = (n - have) // len(plan) + (1 if i < (n - have) % len(plan) else 0)
            self.fill(self.rows_of(source), share, inject)

    def event_before_birth(self, n: int):
        """An intake or placement date ten years early (a year typo) on a child's row, before the birth."""
        plan = [("omc", "placement_date"), ("transfers", "intake_date"), ("custody", "intake_date")]
        for i, (source, fld) in enumerate(plan):
            def inject(rk, fld=fld):
                slots = self.by_row[rk]
                if not self.free_row(rk) or "child" not in slots:
                    return False
                ck = slots["child"]
                row, child = self.row_of(ck), self.P[self.seen[ck]["pid"]]
                if any(self.seen[k]["age"] is not None for k in slots.values()) or not self.clean(ck):
                    return False
                new = add_years(row.events[fld], -10)
                if new >= child.dob - dt.timedelta(days=30):
                    return False
                self.put(rk + ("",), fld, new)
                self.line("event_before_birth", ck, fld, iso(new), iso(row.events[fld]))
                self.take_row(rk)
                return True
            self.fill(self.rows_of(source), n // len(plan) + (1 if i < n % len(plan) else 0), inject)

    def one_record(self, n: int, inject, need=lambda key: True):
        """Run ``inject(key)`` on free, clean, anchored single person cells."""
        def wrapped(key):
            if not (self.free_row(key[:3]) and self.clean(key) and self.anchored(key) and need(key)):
                return False
            if not inject(key):
                return False
            self.used_rows.add(key[:3])
            self.used_persons.add(self.seen[key]["pid"])
            return True
        keys = [k for k in self.seen if not self.row_of(k).added]
        self.fill(keys, n, wrapped)

    def sex_conflict(self, n: int):
        """Flip the written sex of one record of a person with 3+ records."""
        def inject(key):
            written = SEX_FLIP[self.seen[key]["sex"]]
            self.put(key, "sex", written)
            self.line("sex_conflict", key, "sex", written, self.P[self.seen[key]["pid"]].sex)
            return True
        self.one_record(n, inject, lambda k: len(self.by_person[self.seen[k]["pid"]]) >= 3
                        and self.seen[k]["sex"] in SEX_FLIP)

    def birth_date_conflict(self, n: int):
        """Write another day (5+ days away) or month (2+ away) of the same year on one record."""
        def inject(key):
            p = self.P[self.seen[key]["pid"]]
            d = p.dob
            if self.rng.random() < 0.5:
                days = [x for x in range(1, 29) if abs(x - d.day) >= 5]
                new = d.replace(day=self.rng.choice(days))
            else:
                months = [x for x in range(1, 13) if abs(x - d.month) >= 2]
                new = d.replace(month=self.rng.choice(months), day=min(d.day, 28))
            if new >= self.fams[p.fid].intake - dt.timedelta(days=30):
                return False
            self.put(key, "dob", new)
            self.line("birth_date_conflict", key, "birth_date", iso(new), iso(d))
            return True
        self.one_record(n, inject)

    def age_conflict(self, n: int):
        """Write a child's age 2-3 years off next to its birth date (OMC and custody age columns)."""
        def has_age_column(key):
            row = self.row_of(key)
            return key[3] == "child" and (row.source == "omc" or (
                row.source == "custody" and CUSTODY_SHEETS[row.sheet]["age"]))

        def inject(key):
            row, p = self.row_of(key), self.P[self.seen[key]["pid"]]
            on = row.events["placement_date" if row.source == "omc" else "intake_date"]
            years, _ = age_text_years_months(p.dob, on)
            offs = [x for x in (2, 3, -2, -3) if years + x >= 1]
            if years < 2 or not offs:
                return False
            new = years + self.rng.choice(offs)
            written = (f"{new} yrs" if self.rng.random() < 0.4 else str(new)) if row.source == "omc" else new
            self.put(key, "age", written)
            self.line("age_conflict", key, "age", written, years)
            return True
        self.one_record(n, inject, has_age_column)

    def too_many_parents(self):
        """Label the release rows that name an unrelated adult as a child's parent."""
        for rk, slots in self.by_row.items():
            row = self.row_of(next(iter(slots.values())))
            if row.kind != "extra parent":
                continue
            text = f"{row.slots['parent']} recorded as parent of {row.slots['child']}"
            for key in slots.values():
                self.line("too_many_parents", key, "relation", text, "unrelated")
            self.take_row(rk)

    def shared_reg_no(self, n: int):
        """One record of person X shows the number of an unrelated person Y (plus the messiness ones).

        X's other records show no number at all (and no other defect), so X's records still form one
        entity on names and birth date; Y is of
        the other sex, 10+ years apart in age, from another family and shows its own number.
        """
        owners = [pid for pid, keys in self.by_person.items() if any(self.reg_ok(k) for k in keys)]
        # the messiness already writes a parent's number for a child; where the row does not show
        # that number for the parent too (else it is self_parent), the number is shared across persons
        existing = []
        for key, info in self.seen.items():
            row = info["row"]
            if (key[3] == "child" and "parent" in row.slots and info["reg_style"] not in ("sci", "sci_lossy")
                    and info["reg_digits"] == self.P[row.slots["parent"]].reg
                    and ("reg_no", "other person's number (parent's)") in self.kinds.get(key, ())
                    and not any(x[0] == "self_parent" and tuple(x[1:5]) == key for x in self.lines)):
                existing.append(key)
        for key in existing:
            self.line("shared_reg_no", key, "reg_no", self.seen[key]["reg"], self.P[self.seen[key]["pid"]].reg)
            self.used_rows.add(key[:3])

        def inject(key):
            x = self.P[self.seen[key]["pid"]]
            others = [k for k in self.by_person[x.pid] if k != key]
            if not (self.free_row(key[:3]) and self.clean(key) and others
                    and all(self.seen[k]["reg_digits"] is None and self.defect_fields(k) == {"reg_no"}
                            for k in others)):
                return False
            style = self.seen[key]["reg_style"]
            ys = [self.P[y] for y in owners if y not in self.used_persons]
            ys = [y for y in ys if y.fid != x.fid and y.sex != x.sex and abs(years_between(y.dob, x.dob)) >= 10
                  and fold(y.family) != fold(x.family) and fold(y.given) != fold(x.given)
                  and not (style in ZERO_LOSING and y.reg.startswith("0"))]
            if not ys:
                return False
            y = self.rng.choice(ys)
            value = format_reg(y.reg, style)
            if isinstance(self.seen[key]["reg"], str):
                value = str(value)
            self.put(key, "reg", value)
            self.line("shared_reg_no", key, "reg_no", value, x.reg)
            self.used_rows.add(key[:3])
            self.used_persons |= {x.pid, y.pid}
            return True
        self.fill([k for k in self.seen if not self.row_of(k).added], n - len(existing), inject)


def relation_evidence(seen: dict, pairs: list[tuple]) -> list[str]:
    """For each (child pid, parent pid): what in the delivery states the relation.

    ``row``: a two-person row names both; ``case``: both have a tracing line under one Case ID;
    ``named``: a legal-aid intake row of the parent names the child; else ``none``.  The first
    that applies, in that order.
    """
    rows: dict[tuple, dict] = {}
    for (rel, sheet, r, slot), info in seen.items():
        rows.setdefault((rel, sheet, r), {})[slot] = info
    on_row, cases, named = set(), {}, set()
    for slots in rows.values():
        info = next(iter(slots.values()))
        if "child" in slots and "parent" in slots:
            on_row.add((slots["child"]["pid"], slots["parent"]["pid"]))
        if info["row"].source == "tracing":
            cases.setdefault(info["pid"], set()).add(info["row"].extras["case_id"])
        if info["row"].source == "legal":
            named |= {(c, info["pid"]) for c in info["row"].extras["named_pids"]}
    out = []
    for c, a in pairs:
        if (c, a) in on_row:
            out.append("row")
        elif cases.get(c, set()) & cases.get(a, set()):
            out.append("case")
        elif (c, a) in named:
            out.append("named")
        else:
            out.append("none")
    return out


def omc_date(d: dt.date | None, style: str, rng: random.Random):
    """A date as the minors' office writes it: date cell, serial number or m/d/y text."""
    if d is None:
        return None
    if style == "cell":
        return d
    if style == "serial":
        return excel_serial(d)
    return fmt_date(d, "mdy" if rng.random() < 0.7 else "mdy_pad")


def put(ws, r: int, c: int, value, date_format: str):
    """Write a cell (None and "" stay empty)."""
    if value is None or value == "":
        return
    cell = ws.cell(row=r, column=c, value=value)
    if isinstance(value, dt.date):
        cell.number_format = date_format


def repack_zip(data: bytes, when: dt.datetime = FIXED_TIME) -> bytes:
    """Rewrite an xlsx archive with fixed timestamps so that saves are byte-identical."""
    src = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    stamp = when.strftime("%Y-%m-%dT%H:%M:%SZ").encode()
    zip_time = ZIP_TIME if when == FIXED_TIME else when.timetuple()[:6]
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            content = src.read(info.filename)
            if info.filename == "docProps/core.xml":
                content = re.sub(rb"(<dcterms:(?:created|modified)[^>]*>)[^<]*(</dcterms:)",
                                 rb"\g<1>" + stamp + rb"\g<2>", content)
            zi = zipfile.ZipInfo(info.filename, date_time=zip_time)
            zi.compress_type = zipfile.ZIP_DEFLATED
            zi.external_attr = 0o600 << 16
            dst.writestr(zi, content)
    return out.getvalue()


def write_table(path: Path, header: list[str], rows: list[list]):
    """UTF-8 CSV with LF line ends."""
    text = io.StringIO()
    w = csv.writer(text, lineterminator="\n")
    w.writerow(header)
    w.writerows(rows)
    path.write_bytes(text.getvalue().encode("utf-8"))


# ---------------------------------------------------------------------------
# Production 2: the next week's delivery of the same people
# ---------------------------------------------------------------------------
PRODUCTION2_STAMP = dt.datetime(2026, 11, 8, 0, 0, 0)     # re-exported a week after production 1
PRODUCTION2_FIX_SHARE = 0.10                               # share of the messiness defects written right
PRODUCTION2_NEW_ROWS = {"omc": 4, "tracing": 4, "legal": 4}
PRODUCTION2_DROPPED = 12
PRODUCTION2_CONFIG = "production2.toml"
CHANGE_COLUMNS = ["change", "source_file", "sheet", "row", "slot", "person_id", "field", "kind",
                  "previous_source_file", "previous_sheet", "previous_row", "written", "true_value"]
CHANGES = ("corrected", "added", "dropped")
# register number styles that keep all 8 digits readable
SAFE_REG_STYLES = ("hr_dash", "nm_dash", "nm_space", "hr_space_lower", "hr_slash", "hr_plain", "grouped_space",
                   "plain")
# defect field -> the cell production 2 may write right
DEFECT_CELL = {"reg_no": "reg_no", "name": "name", "given_name": "name", "family_name": "name",
               "birth_date": "birth_date", "sex": "sex"}
NAME_FIXES = {"accents dropped", "second family name dropped", "one-letter typo", "given and family name swapped"}
DATE_FIXES = {"day and month swapped", "day off by one", "month off by one", "year off by one"}
# files whose birth-date cells take no random draw, so a missing date can be written without
# moving the random stream of the rows after it
DOB_FILLABLE = ("transfers", "releases")


def production2_file(rel: str) -> str:
    """The renamed tracing export: the date of the new extract in its name."""
    return rel.replace("_2026.csv", "_2026-11-08.csv")


class Reexport:
    """How production 2 saves its files: rows dropped and shuffled, sheets reordered, one file renamed.

    The rows are rendered where production 1 has them (the new rows last in their sheet), so
    the random streams, and with them every cell of production 1's rows, stay as they were;
    the files are rearranged only when saved.  ``moved`` maps each rendered
    (file, sheet, row) to where the saved file has it.
    """

    def __init__(self, seed, new_rows: list[Row], dropped: set, renamed: dict[str, str],
                 stamp: dt.datetime = PRODUCTION2_STAMP):
        self.seed = seed
        self.new_rows = new_rows
        self.dropped = dropped                 # (file, sheet, row) as rendered
        self.renamed = renamed                 # file -> file name in production 2
        self.stamp = stamp
        self.moved: dict[tuple, tuple] = {}
        self.sheet_order: dict[str, list[str]] = {}   # saved file -> its sheets in saved order

    def n_dropped(self, rel: str, sheet: str) -> int:
        return sum(1 for k in self.dropped if k[0] == rel and k[1] == sheet)

    def order(self, rel: str, sheet: str, n_rows: int, person_rows: set) -> list[int]:
        """Rendered row numbers in saved order: dropped rows left out, person rows shuffled among
        themselves (titles, headers, blank, repeated-header, total and notes rows keep their place)."""
        kept = [r for r in range(1, n_rows + 1) if (rel, sheet, r) not in self.dropped]
        places = [i for i, r in enumerate(kept) if r in person_rows]
        people = [kept[i] for i in places]
        random.Random(f"{self.seed}-production2-rows-{rel}-{sheet}").shuffle(people)
        for i, r in zip(places, people):
            kept[i] = r
        return kept

    def _note(self, rel: str, sheet: str, rel2: str, sheet2: str, order: list[int]):
        for new, old in enumerate(order, 1):
            self.moved[(rel, sheet, old)] = (rel2, sheet2, new)

    def workbook(self, wb, rel: str, truth: list[dict]):
        """A new workbook with the sheets of ``wb`` in another order and their rows rearranged."""
        rel2 = self.renamed.get(rel, rel)
        titles = list(wb.sheetnames)
        order = titles[:]
        random.Random(f"{self.seed}-production2-sheets-{rel}").shuffle(order)
        if order == titles:
            order.reverse()
        self.sheet_order[rel2] = order
        out = openpyxl.Workbook()
        out.remove(out.active)
        for title in order:
            src, dst = wb[title], out.create_sheet(title)
            persons = {t["row"] for t in truth if t["source_file"] == rel and t["sheet"] == title}
            rows = [list(r) for r in src.iter_rows(min_row=1, max_row=src.max_row)]
            saved = self.order(rel, title, len(rows), persons)
            for new, old in enumerate(saved, 1):
                for c, cell in enumerate(rows[old - 1], 1):
                    if cell.value is None:
                        continue
                    copy = dst.cell(row=new, column=c, value=cell.value)
                    if cell.number_format != "General":
                        copy.number_format = cell.number_format
            self._note(rel, title, rel2, title, saved)
        return out, rel2

    def csv_lines(self, lines: list[list], rel: str, truth: list[dict]):
        """The lines of a CSV file rearranged (the header stays first), and its saved name."""
        rel2 = self.renamed.get(rel, rel)
        sheet, sheet2 = Path(rel).stem, Path(rel2).stem
        persons = {t["row"] for t in truth if t["source_file"] == rel}
        saved = self.order(rel, sheet, len(lines), persons)
        self._note(rel, sheet, rel2, sheet2, saved)
        self.sheet_order[rel2] = [sheet2]
        return [lines[r - 1] for r in saved], rel2


def production2_new_rows(sc: Scenario, rows: list[Row], seed) -> list[Row]:
    """Rows of the next week for persons already in the files: a shelter move (OMC), a family
    member added to a tracing case, a repeat legal-aid visit in 2026.  Nobody passes 5 records."""
    rng = random.Random(f"{seed}-production2-new")
    P = sc.persons
    fams = {f.fid: f for f in sc.families}
    counts = person_counts(rows)
    out: list[Row] = []

    def take(row: Row):
        row.new, row.kind = True, "new in production 2"
        out.append(row)
        for pid in row.slots.values():
            counts[pid] += 1

    kids = [pid for pid, p in P.items() if p.role == "child" and counts[pid] <= 4]
    for c in rng.sample(kids, min(PRODUCTION2_NEW_ROWS["omc"], len(kids))):
        p = P[c]
        other = rng.choice([s for s in SHELTERS if s != p.shelter])
        moved = min(p.placement + dt.timedelta(days=rng.randint(10, 60)), LAST_EVENT)
        take(Row("omc", other, {"child": c}, {"placement_date": moved, "location": other,
                                              "status": "transferred in"},
                 {"caseworker": rng.choice(["K.M.", "A.R.", "T.O."])}, (moved, p.fid, "new")))
    cases = {r.extras["case_id"] for r in rows if r.source == "tracing"}
    listed = {r.slots["member"] for r in rows if r.source == "tracing"}
    members = [pid for pid, p in P.items()
               if fams[p.fid].case_id in cases and pid not in listed and counts[pid] <= 4]
    for pid in rng.sample(members, min(PRODUCTION2_NEW_ROWS["tracing"], len(members))):
        take(tracing_row(sc, fams[P[pid].fid], pid, 9))
    adults = [pid for pid, p in P.items() if p.role != "child" and counts[pid] <= 4]
    rng.shuffle(adults)
    wanted = PRODUCTION2_NEW_ROWS["legal"]
    for pid in adults:
        if wanted == 0:
            break
        row = legal_row(sc, fams[P[pid].fid], pid, rng, later=True)
        if row.sheet == "2026":                # the 2025 sheet is closed
            take(row)
            wanted -= 1
    return out


def written_sex_codes(seen: dict, persons: dict) -> dict:
    """(file, slot, true sex) -> the code that file writes most for it in that slot."""
    tally: Counter = Counter()
    for (rel, _sheet, _r, slot), info in seen.items():
        code = info["sex"]
        if code and code != PROFILES[info["row"].source]["unknown_sex"]:
            tally[(rel, slot, persons[info["pid"]].sex, code)] += 1
    best: dict = {}
    for key, _n in sorted(tally.items(), key=lambda kv: (kv[0][:3], -kv[1], kv[0][3])):
        best.setdefault(key[:3], key[3])
    return best


def true_reg_cell(reg: str, style: str | None, source: str):
    """The person's own number, in the cell's style when that keeps all 8 digits, else the file's
    first such style."""
    if style in SAFE_REG_STYLES or (style == "number" and not reg.startswith("0")):
        keep = style
    else:
        keep = next(s for s in PROFILES[source]["reg_styles"] if s in SAFE_REG_STYLES)
    value = format_reg(reg, keep)
    return str(value) if source in ("tracing", "transfers") and isinstance(value, int) else value


def production2_fixes(p1: "Delivery", injected: list[list], seed,
                      share: float = PRODUCTION2_FIX_SHARE) -> tuple[dict, list[int]]:
    """Cells production 2 writes right, as render overrides {(file, sheet, row, slot): {field: value}},
    and the indices (in ``p1.w_main.defects``) of the defects they undo, about ``share`` of all.

    Rows and persons of the labelled injections are left alone.  Only fixes that take no random
    draw are chosen (a name, a number, a sex code, a shown birth date, a missing birth date where
    the file formats dates without one), so every other cell renders as in production 1.
    """
    rng = random.Random(f"{seed}-production2-fixes")
    P = p1.sc.persons
    busy_rows = {tuple(x[1:4]) for x in injected} | {k[:3] for k in p1.plan}
    busy_persons = {x[5] for x in injected}
    cells: dict[tuple, list[int]] = {}
    for i, x in enumerate(p1.w_main.defects):
        cell = DEFECT_CELL.get(x["field"])
        key = (x["source_file"], x["sheet"], x["row"], x["slot"])
        if cell and x["slot"] and key[:3] not in busy_rows and x["person_id"] not in busy_persons:
            cells.setdefault((key, cell), []).append(i)
    codes = written_sex_codes(p1.seen, P)
    candidates = []
    for (key, cell), idx in cells.items():
        info = p1.seen[key]
        value = _fixed_cell(cell, {p1.w_main.defects[i]["kind"] for i in idx}, info, P[info["pid"]],
                            codes.get((key[0], key[3], P[info["pid"]].sex)))
        if value is not None:
            candidates.append((key, idx, value))
    rng.shuffle(candidates)
    target = round(share * len(p1.w_main.defects))
    overrides: dict[tuple, dict] = {}
    undone: list[int] = []
    for key, idx, value in candidates:
        if len(undone) >= target:
            break
        overrides.setdefault(key, {}).update(value)
        undone += idx
    return overrides, sorted(undone)


def _fixed_cell(cell: str, kinds: set, info: dict, p: Person, sex_code: str | None) -> dict | None:
    source = info["row"].source
    if cell == "reg_no":
        return {"reg": true_reg_cell(p.reg, info["reg_style"], source)}
    if cell == "name":
        if not kinds <= NAME_FIXES:
            return None
        if source == "tracing" and to_cp1252(f"{p.given} {p.family}") != f"{p.given} {p.family}":
            return None                     # cp1252 cannot hold the true name
        return {"given": p.given, "family": p.family, "swapped": False}
    if cell == "birth_date":
        if (kinds <= DATE_FIXES and info["dob"] is not None) or (kinds == {"missing"} and source in DOB_FILLABLE):
            return {"dob": p.dob}
        return None
    return {"sex": sex_code} if sex_code and kinds == {"missing or unknown"} else None


def production2_dropped(p1: "Delivery", new_rows: list[Row], keep: set, seed,
                        n: int = PRODUCTION2_DROPPED) -> set:
    """Rows left out of production 2: not in ``keep``, and everyone on them keeps 2+ records."""
    rng = random.Random(f"{seed}-production2-dropped")
    counts = Counter(t["person_id"] for t in p1.truth) + person_counts(new_rows)
    rows: dict[tuple, list[str]] = {}
    for t in p1.truth:
        rows.setdefault((t["source_file"], t["sheet"], t["row"]), []).append(t["person_id"])
    keys = [k for k in rows if k not in keep]
    rng.shuffle(keys)
    out: set = set()
    for k in keys:
        if len(out) == n:
            break
        if all(counts[pid] > 2 for pid in rows[k]):
            out.add(k)
            for pid in rows[k]:
                counts[pid] -= 1
    return out


def write_production2(out_dir, seed: int = SEED, n_families: int = N_FAMILIES) -> dict:
    """Write production 2, the next week's delivery of the same people, under ``out_dir``.

    The same files as :func:`write_delivery` writes (demo vocabulary), re-exported a week later:
    workbooks saved again with their sheets in another order, the tracing CSV renamed with the
    date of the extract, person rows shuffled within their sheets, about 10% of the messiness
    defects written right, a few new rows for persons already in the files and a few rows left
    out.  The labelled injections stay as they were.  Writes ``delivery/``, ``roster/`` (as in
    production 1), ``truth/`` (``records.csv``, ``changes.csv``, and ``persons.csv``,
    ``relations.csv``, ``roster.csv``, ``defects.csv``, ``injected.csv`` for this production) and
    ``production2.toml`` (``configs/sample.toml`` pointed at this folder).

    Returns
    -------
    dict
        Counts: records, corrected defects and records, new and dropped rows and records, renamed files.
    """
    out = Path(out_dir)
    if out.resolve() == HERE:
        raise ValueError("production 2 is written into a folder of its own, not into sample/")
    for sub in ("delivery", "roster", "truth"):
        if (out / sub).is_dir():
            shutil.rmtree(out / sub)
    out.mkdir(parents=True, exist_ok=True)
    dry = Delivery(out, "demo", seed, n_families, dry=True)
    dry.render()
    plan, injected = InjectionPlanner(dry, seed).run()
    p1 = Delivery(out, "demo", seed, n_families, plan=plan, dry=True)
    p1.render()
    new_rows = production2_new_rows(p1.sc, p1.rows, seed)
    fixes, undone = production2_fixes(p1, injected, seed)
    keep = {tuple(x[1:4]) for x in injected} | {k[:3] for k in plan} | {k[:3] for k in fixes}
    dropped = production2_dropped(p1, new_rows, keep, seed)
    reexport = Reexport(seed, new_rows, dropped, {p1.rel("tracing"): production2_file(p1.rel("tracing"))})
    d = Delivery(out, "demo", seed, n_families, plan={**plan, **fixes}, reexport=reexport)
    d.render()
    if d.w_main.defects != p1.w_main.defects:
        raise RuntimeError("production 2 moved the random stream of production 1's rows")
    rendered = {(t["source_file"], t["sheet"], t["row"], t["slot"], t["person_id"]) for t in d.truth}
    if any((t["source_file"], t["sheet"], t["row"], t["slot"], t["person_id"]) not in rendered for t in p1.truth):
        raise RuntimeError("production 2 rendered a row of production 1 elsewhere")
    roster = d.write_roster()
    changes = write_production2_truth(d, p1, injected, undone, roster)
    (out / PRODUCTION2_CONFIG).write_text(production2_config(), encoding="utf-8")
    kinds = Counter(c[0] for c in changes)
    return {
        "records": sum(1 for t in d.truth if (t["source_file"], t["sheet"], t["row"]) not in dropped),
        "renamed": reexport.renamed,
        "defects_corrected": kinds["corrected"],
        "defects_production1": len(p1.w_main.defects),
        "records_corrected": len({tuple(c[1:5]) for c in changes if c[0] == "corrected"}),
        "rows_added": len(new_rows),
        "records_added": kinds["added"],
        "rows_dropped": len(dropped),
        "records_dropped": kinds["dropped"],
    }


def write_production2_truth(d: "Delivery", p1: "Delivery", injected: list[list], undone: list[int],
                            roster: list[dict]) -> list[list]:
    """truth/ of production 2, in the saved files' coordinates; returns the changes.csv lines."""
    rx = d.reexport
    tdir = d.out / "truth"
    tdir.mkdir(parents=True, exist_ok=True)
    sheet_index = {(f, s): i for f, titles in rx.sheet_order.items() for i, s in enumerate(titles)}
    slot_index = {"child": 0, "parent": 1, "": 2}

    def saved(x: dict) -> tuple:
        return rx.moved[(x["source_file"], x["sheet"], x["row"])]

    def gone(x: dict) -> bool:
        return (x["source_file"], x["sheet"], x["row"]) in rx.dropped

    def order(line: list) -> tuple:
        return (line[0], sheet_index[(line[0], line[1])], int(line[2]), slot_index[line[3]])

    records = sorted(([*saved(t), t["slot"], t["person_id"]] for t in d.truth if not gone(t)), key=order)
    write_table(tdir / "records.csv", ["source_file", "sheet", "row", "slot", "person_id"], records)
    appearing = {r[4] for r in records}
    write_table(tdir / "persons.csv",
                ["person_id", "family_id", "role", "given_name", "family_name", "birth_date", "sex", "reg_no"],
                [[p.pid, p.fid, p.role, p.given, p.family, p.dob.isoformat(), p.sex, p.reg]
                 for p in d.sc.persons.values() if p.pid in appearing])
    pairs = [(c, a) for f in d.sc.families for c in f.children for a in f.adults]
    shown = {k: v for k, v in d.seen.items() if k[:3] not in rx.dropped}
    write_table(tdir / "relations.csv", ["child_person_id", "parent_person_id", "evidence"],
                [[c, a, e] for (c, a), e in zip(pairs, relation_evidence(shown, pairs))])
    write_table(tdir / "roster.csv", ["roster_row", "person_id", "status"],
                [[r["roster_row"], r["person_id"], r["status"]] for r in roster])
    undone_set = set(undone)
    keys = ["slot", "person_id", "field", "kind", "written", "true_value"]
    defects = [[*saved(x), *(x[k] for k in keys)] for i, x in enumerate(d.w_main.defects)
               if i not in undone_set and not gone(x)]
    defects += [[*saved(x), *(x[k] for k in keys)] for x in d.w_new.defects]
    write_table(tdir / "defects.csv", ["source_file", "sheet", "row", *keys], sorted(defects, key=order))
    moved_injected = [[x[0], *rx.moved[tuple(x[1:4])], *x[4:]] for x in injected]
    moved_injected.sort(key=lambda x: (RULES.index(x[0]), x[1], x[2], int(x[3]), x[4]))
    write_table(tdir / "injected.csv", INJECTED_COLUMNS, moved_injected)
    changes = []
    for i in undone:
        x = d.w_main.defects[i]
        changes.append(["corrected", *saved(x), x["slot"], x["person_id"], x["field"], x["kind"],
                        x["source_file"], x["sheet"], x["row"], x["written"], x["true_value"]])
    for t in d.truth:
        if d.seen[(t["source_file"], t["sheet"], t["row"], t["slot"])]["row"].new:
            changes.append(["added", *saved(t), t["slot"], t["person_id"], "", "", "", "", "", "", ""])
    changes.sort(key=lambda c: (CHANGES.index(c[0]), *order(c[1:5])))
    dropped = [["dropped", "", "", "", t["slot"], t["person_id"], "", "", t["source_file"], t["sheet"], t["row"],
                "", ""] for t in p1.truth if gone(t)]
    changes += sorted(dropped, key=lambda c: (c[8], c[9], c[10], slot_index[c[4]]))
    write_table(tdir / "changes.csv", CHANGE_COLUMNS, changes)
    return changes


def production2_config() -> str:
    """configs/sample.toml with its paths into sample/ pointed at the production 2 folder."""
    text = (HERE.parent / "configs" / "sample.toml").read_text(encoding="utf-8")
    head = ("# Production 2 of the demo delivery, written by `python sample/generate.py --production 2`:\n"
            "# configs/sample.toml with its paths into sample/ pointed at this folder.\n")
    return head + text.replace('"../sample/', '"')


# ---------------------------------------------------------------------------
# Public entry points
# ---------------------------------------------------------------------------
def write_delivery(out_dir, seed: int = SEED, n_families: int = N_FAMILIES,
                   vocabulary: str = "demo") -> dict:
    """Write ``delivery/``, ``roster/`` and ``truth/`` under ``out_dir``.

    With ``vocabulary="alternate"`` the headers, file names and member-type
    values are ones ``configs/sample.toml`` does not list, and a matching
    ``out_dir/alternate.toml`` is written too.  Existing ``delivery``,
    ``roster`` and ``truth`` folders under ``out_dir`` are replaced.

    Returns
    -------
    dict
        Counts: families, persons, records per file, defects per kind.
    """
    out = Path(out_dir)
    for sub in ("delivery", "roster", "truth"):
        if (out / sub).is_dir():
            shutil.rmtree(out / sub)
    out.mkdir(parents=True, exist_ok=True)
    # a dry render shows where the messiness fell; the injections are then placed on clean cells
    dry = Delivery(out, vocabulary, seed, n_families, dry=True)
    dry.render()
    plan, injected = InjectionPlanner(dry, seed).run()
    d = Delivery(out, vocabulary, seed, n_families, plan=plan)
    d.render()
    if d.w_main.defects != dry.w_main.defects:
        raise RuntimeError("the injections changed the messiness")
    records = {(t["source_file"], t["sheet"], t["row"], t["slot"]): t["person_id"] for t in d.truth}
    if any(records.get(tuple(x[1:5])) != x[5] for x in injected):
        raise RuntimeError("an injected line names no person-record")
    roster = d.write_roster()
    d.write_truth(roster, injected)
    if vocabulary == "alternate":
        d.write_config()
    per_person = Counter(t["person_id"] for t in d.truth)
    bad = [pid for pid in d.sc.persons if not 2 <= per_person[pid] <= 5]
    if bad:
        raise RuntimeError(f"{len(bad)} persons outside 2-5 records (first: {bad[0]})")
    return {
        "families": len(d.sc.families),
        "persons": len(d.sc.persons),
        "records": len(d.truth),
        "records_per_file": dict(Counter(t["source_file"] for t in d.truth)),
        "records_per_person": dict(sorted(Counter(per_person.values()).items())),
        "defects": dict(sorted(Counter(x["kind"] for x in d.w_main.defects).items())),
        "injected": {rule: n for rule, n in Counter(x[0] for x in injected).items()},
        "roster": dict(Counter(r["status"] for r in roster)),
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Regenerate the fictional Northern March demo delivery.")
    ap.add_argument("--out", default=str(HERE), help="output folder (default: the sample/ folder)")
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--families", type=int, default=N_FAMILIES)
    ap.add_argument("--vocabulary", choices=sorted(VOCAB), default="demo")
    ap.add_argument("--production", type=int, choices=(1, 2), default=1,
                    help="2: the next week's re-export of the same people (demo vocabulary, needs --out)")
    args = ap.parse_args(argv)
    if args.production == 2:
        if Path(args.out).resolve() == HERE:
            ap.error("--production 2 writes into a folder of its own: pass --out DIR")
        if args.vocabulary != "demo":
            ap.error("--production 2 uses the demo vocabulary (its config is a copy of configs/sample.toml)")
        summary = write_production2(args.out, seed=args.seed, n_families=args.families)
        print(json.dumps(summary, indent=2, ensure_ascii=False))
        return 0
    summary = write_delivery(args.out, seed=args.seed, n_families=args.families, vocabulary=args.vocabulary)
    print(json.dumps(summary, indent=2, ensure_ascii=False))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

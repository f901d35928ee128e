"""Shared fixtures: small configs and workbooks built in a temp folder."""

from __future__ import annotations

import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))          # lets tests import sample.generate

BASE_CONFIG = """
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
reg_no = ["reg no"]
full_name = ["name"]
birth_date = ["dob"]
sex = ["sex"]
intake_date = ["intake date"]
location = ["station"]

[[relations]]
child = "child"
parent = "parent"
"""


@pytest.fixture
def project(tmp_path):
    """A temp project folder with a delivery/ subfolder; returns a helper to write the config."""
    (tmp_path / "delivery").mkdir()

    def write_config(extra: str = "", base: str = BASE_CONFIG) -> Path:
        path = tmp_path / "linker.toml"
        path.write_text(textwrap.dedent(base) + textwrap.dedent(extra), encoding="utf-8")
        return path

    return tmp_path, write_config

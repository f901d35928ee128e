"""Config validation: errors name the file and the key; good configs resolve."""

from __future__ import annotations

import pytest

from linker import ConfigError, load_config
from linker.cli import main

from conftest import ROOT


def test_sample_config_loads():
    """The shipped, commented example config is valid and resolves its folder."""
    cfg = load_config(ROOT / "configs" / "sample.toml")
    assert cfg.folder == (ROOT / "sample" / "delivery").resolve()
    assert set(cfg.slots) == {"child", "parent"}
    assert cfg.scheme.check_digit == "luhn" and cfg.scheme.digits == 8
    assert ("child", "parent") in cfg.relations


def test_headers_are_folded(project):
    """Header names in the config are stored folded (case, punctuation, spaces, '#')."""
    _, write = project
    cfg = load_config(write('\n[[sheets]]\nfile = "x*"\nslot = "child"\ncolumns.generic.reg_no = ["Reg. #"]\n'))
    assert "childdob" in cfg.slots["child"]["birth_date"]
    assert cfg.sheets[0].columns[""]["reg_no"] == ("regno",)


@pytest.mark.parametrize("extra, key", [
    ("\n[delivery2]\nx = 1\n", "delivery2"),
    ("\n[rules]\ncutof_date = \"2026-01-01\"\n", "[rules] cutof_date"),
    ("\n[[sheets]]\nfile = \"a\"\nslot = \"grandparent\"\n", "[[sheets]] #1 slot"),
    ("\n[[sheets]]\nfile = \"a\"\ndate_order = \"ddmm\"\n", "[[sheets]] #1 date_order"),
    ("\n[sex]\ncodes = { q = \"Q\" }\n", "[sex] codes q"),
    ("\n[[sheets]]\nfile = \"a\"\ncolumns.child.shoe_size = [\"shoe\"]\n", "columns.child shoe_size"),
    ("\n[queries]\ngroup_by = \"agency\"\n", "[queries] group_by"),
    ("\n[rules]\nmax_parents = 0\n", "[rules]"),
    ("\n[[sheets]]\nfile = \"a\"\nfamily_column = 3\n", "[[sheets]] #1 family_column"),
    ("\n[[sheets]]\nfile = \"a\"\nheader_row = 0\n", "[[sheets]] #1 header_row"),
])
def test_unknown_keys_and_values_name_file_and_key(project, extra, key):
    """An unknown section, key, slot, value or field is an error naming the file and the key."""
    _, write = project
    path = write(extra)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert str(path) in str(info.value)
    assert key in str(info.value)


def test_wrong_type_is_reported(project):
    """A value of the wrong type names the key and both types."""
    _, write = project
    with pytest.raises(ConfigError, match=r"\[identifier\] digits: must be int, got str"):
        load_config(write(base=__import__("conftest").BASE_CONFIG.replace("digits = 8", 'digits = "8"')))


def test_bad_toml_and_missing_file(project, tmp_path):
    """Unparseable TOML and a missing file give errors naming the file."""
    _, write = project
    path = write("\n[rules\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(path)
    with pytest.raises(ConfigError, match="cannot read config"):
        load_config(tmp_path / "nope.toml")


def test_check_config_command(project, capsys):
    """check-config exits 0 on a good config and 2 with a one-line error on a bad one."""
    _, write = project
    assert main(["check-config", str(write())]) == 0
    assert main(["check-config", str(write("\n[rules]\nbogus = 1\n"))]) == 2
    err = capsys.readouterr().err
    assert "bogus" in err and "Traceback" not in err

"""Rule sets (pipeline.rules): the standard, precedence, and every rule-file error.

Errors must be one line naming the file and the dotted key (CONTRACT §3).
"""
from __future__ import annotations

import tomllib

import pandas as pd
import pytest

from pipeline.errors import RuleError
from pipeline.rules import duration, load_rules, rule_set_path, standard_rules


def write_rules(tmp_path, text, name="site-rules.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def assert_one_line_error(excinfo, file, key):
    message = str(excinfo.value)
    assert "\n" not in message
    assert str(file) in message
    assert f"'{key}'" in message
    assert excinfo.value.key == key


def test_standard_loads_and_every_duration_parses():
    """The standard parses; every string value in a duration-like key is a time span."""
    rules = load_rules("standard")
    assert rules["despike"]["z"] == 4.0  # Papale et al. 2006
    assert duration(rules["despike"]["block"]) == pd.Timedelta(days=13)  # Papale et al. 2006
    assert duration(rules["met"]["step_per"]) == pd.Timedelta(minutes=30)
    for var, table in rules["variables"].items():
        if "flat_line" in table:
            assert duration(table["flat_line"]) > pd.Timedelta(0), var
    assert duration(rules["wet"]["dry_after"]) >= pd.Timedelta(0)


def test_standard_every_qc_key_has_a_unit_or_source_comment():
    """Every key of the QC sections in standard.toml carries a trailing comment (unit, source)."""
    text = rule_set_path("standard").read_text(encoding="utf-8")
    section = None
    for line in text.splitlines():
        stripped = line.strip()
        if stripped.startswith("["):
            section = stripped.strip("[]").split(".")[0]
            continue
        if section in ("variables", "despike", "met", "wet", "ustar", "sectors", "snow", "instrument") \
                and stripped and not stripped.startswith("#") and "=" in stripped:
            assert "#" in stripped, stripped


def test_extends_file_and_site_override_precedence(tmp_path):
    """Site override > rule file (extends standard) > standard."""
    path = write_rules(tmp_path, 'extends = "standard"\n[despike]\nz = 5.5\n[variables.ta]\nrange = [-40.0, 45.0]\n')
    rules = load_rules(str(path))
    assert rules["despike"]["z"] == 5.5
    assert rules["variables"]["ta"]["range"] == [-40.0, 45.0]
    assert rules["despike"]["block"] == standard_rules()["despike"]["block"]
    rules = load_rules(str(path), site_overrides={"despike": {"z": 7.0}}, site_file="site.toml")
    assert rules["despike"]["z"] == 7.0
    assert rules["variables"]["ta"]["range"] == [-40.0, 45.0]


def test_relative_rule_file_resolved_against_site_folder(tmp_path):
    """A relative rule path resolves against the site TOML's folder."""
    write_rules(tmp_path, '[ustar]\nthreshold = 0.2\nsource = "invented site study"\n', "strict.toml")
    rules = load_rules("strict.toml", relative_to=tmp_path)
    assert rules["ustar"] == {**standard_rules()["ustar"], "threshold": 0.2, "source": "invented site study"}


@pytest.mark.parametrize("text, key, words", [
    ("[variables.co2_ppm]\nrange = [0.0, 1.0]\n", "variables.co2_ppm", "unknown variable"),
    ("[despike]\nwindow = 5\n", "despike.window", "unknown key"),
    ("[variables.ta]\nrangee = [0.0, 1.0]\n", "variables.ta.rangee", "unknown key"),
    ("[variables.ta]\nrange = [45.0, -40.0]\n", "variables.ta.range", "above max"),
    ("[met]\nlw_in_ratio_range = [1.2, 0.5]\n", "met.lw_in_ratio_range", "above max"),
    ("[variables.ta]\nrange = [1.0]\n", "variables.ta.range", "[min, max]"),
    ('[despike]\nz = "four"\n', "despike.z", "must be a number"),
    ("[ustar]\nnight_only = 1\n", "ustar.night_only", "must be a boolean"),
    ('[ustar]\napply_to = "fc"\n', "ustar.apply_to", "must be a list"),
    ('[despike]\nblock = "13 dayz"\n', "despike.block", "duration"),
    ("[despike]\nblock = 13\n", "despike.block", "duration"),
    ('[despike]\nblock = "13"\n', "despike.block", "duration"),
    ('[wet]\ndry_after = "-2 h"\n', "wet.dry_after", "negative"),
    ('[despike]\nblock = "0 days"\n', "despike.block", "positive"),
    ('[met]\nstep_per = "0 min"\n', "met.step_per", "positive"),
    ('[variables.ta]\nflat_line = "four hours"\n', "variables.ta.flat_line", "duration"),
    ("[ustar]\nmonthly = [0.1, 0.2]\n", "ustar.monthly", "12 monthly"),
    ("[sectors]\nexclude = [[340.0, 400.0]]\n", "sectors.exclude", "[from, to]"),
    ("[sectors]\nexclude = [340.0, 20.0]\n", "sectors.exclude", "[from, to]"),
    ('[ustar]\napply_to = ["fc", "nee"]\n', "ustar.apply_to", "unknown variable"),
    ('[despike]\nvariables = ["le", "latent"]\n', "despike.variables", "unknown variable"),
    ("[instrument.agc]\nbelow = \"low\"\n", "instrument.agc.below", "must be a number"),
])
def test_rule_file_errors_name_file_and_key(tmp_path, text, key, words):
    """Every broken rule file is a one-line RuleError naming the file and the dotted key."""
    path = write_rules(tmp_path, text)
    with pytest.raises(RuleError) as excinfo:
        load_rules(str(path))
    assert_one_line_error(excinfo, path, key)
    assert words in str(excinfo.value)


@pytest.mark.parametrize("override, key", [
    ({"variables": {"nee": {"range": [0.0, 1.0]}}}, "qc.override.variables.nee"),
    ({"despike": {"zz": 4.0}}, "qc.override.despike.zz"),
    ({"variables": {"ta": {"range": [50.0, -50.0]}}}, "qc.override.variables.ta.range"),
    ({"despike": {"z": "4"}}, "qc.override.despike.z"),
    ({"wet": {"dry_after": "soon"}}, "qc.override.wet.dry_after"),
])
def test_site_override_errors_name_site_file_and_key(override, key):
    """A broken [qc.override] names the site TOML and the key under qc.override."""
    with pytest.raises(RuleError) as excinfo:
        load_rules("standard", site_overrides=override, site_file="sites/invented-meadow.toml")
    assert_one_line_error(excinfo, "sites/invented-meadow.toml", key)


def test_not_toml_and_missing_file(tmp_path):
    """A file that is not TOML, or not there, names the file."""
    path = write_rules(tmp_path, "[despike\nz = 4\n")
    with pytest.raises(RuleError, match="not valid TOML") as excinfo:
        load_rules(str(path))
    assert str(path) in str(excinfo.value)
    with pytest.raises(RuleError, match="not found"):
        load_rules(str(tmp_path / "absent.toml"))


def test_circular_extends(tmp_path):
    """Rule sets extending each other in a circle are refused."""
    a = write_rules(tmp_path, 'extends = "b.toml"\n', "a.toml")
    write_rules(tmp_path, 'extends = "a.toml"\n', "b.toml")
    with pytest.raises(RuleError, match="circle"):
        load_rules(str(a))


def test_standard_file_is_valid_toml_with_qc_sections():
    """standard.toml holds the QC stage's sections."""
    with open(rule_set_path("standard"), "rb") as fh:
        data = tomllib.load(fh)
    for section in ("variables", "despike", "met", "wet", "ustar", "sectors", "snow", "instrument"):
        assert section in data

"""Site and network configuration loader (CONTRACT §2): valid files and every error.

All sites are invented. Expected keys and limits come from CONTRACT §2 (site id pattern,
latitude/longitude ranges, intervals, irga and timestamp_marks values) and CONTRACT §1
(canonical names, required variables, unit strings).
"""
from __future__ import annotations

import hashlib
import textwrap

import pandas as pd
import pytest

from pipeline.config import (
    HistoryEntry,
    SiteConfig,
    load_network_config,
    load_site_config,
)
from pipeline.errors import ConfigError, RuleError

BASE = textwrap.dedent('''\
    [site]
    id = "invented-meadow"
    name = "Invented meadow (not a real place)"
    latitude = 46.5
    longitude = 7.9
    elevation_m = 820
    utc_offset_hours = 1
    canopy_height_m = 0.3
    measurement_height_m = 2.0
    irga = "closed-path"
    interval_minutes = 30

    [input]
    match = "*_flux_*.csv"
    timestamp_column = "TIMESTAMP"
    timestamp_format = "%Y-%m-%d %H:%M"
    timestamp_marks = "end"
    interval_minutes = 30
    missing = [-9999, "NAN"]
    skip_rows = [0, 1]

    [input.columns]
    le = "LE"
    h = "H"
    rn = "NETRAD"
    g = ["SHF_1", "SHF_2"]
    ta = "TA"
    rh = "RH"
    wind = "WS"
    ustar = "USTAR"

    [input.units]
    ta = "K"
    rh = "fraction"

    [input.scale]
    rn = 1.02

    [input.offset]
    ta = -0.1

    [input.flags]
    le = { column = "qc_LE", reject = [2] }

    [input.passthrough]
    signal_strength = "AGC"

    [[history]]
    start = "2025-05-01"
    end = "2025-10-01"
    canopy_height_m = 0.8

    [[history]]
    start = "2025-06-03 10:00"
    end = "2025-06-20 14:30"
    correct = { g = { scale = -1.0 } }
    reason = "plates wired the wrong way round"

    [[history]]
    start = "2025-07-01 09:00"
    end = "2025-07-01 13:00"
    exclude = ["le", "h"]
    reason = "site visit: analyser cleaned"

    [qc]
    rules = "standard"

    [conductance]
    aerodynamic = "ustar"
    ''')


def write(tmp_path, text, name="site.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def load_error(tmp_path, text) -> ConfigError:
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_site_config(path)
    return info.value


def test_valid_site_config(tmp_path):
    """The CONTRACT §2 example (adapted) loads into the dataclasses."""
    path = write(tmp_path, BASE)
    cfg = load_site_config(path)
    assert isinstance(cfg, SiteConfig)
    assert cfg.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert cfg.site.id == "invented-meadow"
    assert cfg.site.interval_minutes == 30
    assert cfg.site.tz.utcoffset(None) == pd.Timedelta(hours=1)
    (stream,) = cfg.inputs
    assert stream.name == "main"
    assert stream.timestamp_column == ("TIMESTAMP",)
    assert stream.columns["g"] == ("SHF_1", "SHF_2")
    assert stream.columns["le"] == ("LE",)
    assert stream.units["ta"] == "K" and stream.units["le"] == "W m-2"  # default: canonical unit
    assert stream.scale == {"rn": 1.02} and stream.offset == {"ta": -0.1}
    assert stream.flags["le"].column == "qc_LE" and stream.flags["le"].reject == (2,)
    assert stream.passthrough == {"signal_strength": "AGC"}
    assert stream.missing == (-9999, "NAN") and stream.skip_rows == (0, 1)
    assert len(cfg.history) == 3
    h0, h1, h2 = cfg.history
    assert isinstance(h0, HistoryEntry) and h0.index == 0
    assert h0.parameters == {"canopy_height_m": 0.8}
    assert h0.start == pd.Timestamp("2025-04-30 23:00", tz="UTC")  # local midnight at UTC+1
    assert h1.correct == {"g": {"scale": -1.0}}
    assert h1.start.utcoffset() == pd.Timedelta(hours=1)
    assert h2.exclude == ("le", "h") and h2.reason.startswith("site visit")
    assert cfg.qc == {"rules": "standard"}
    assert cfg.conductance == {"aerodynamic": "ustar"}


def test_multiple_streams_and_extensions(tmp_path):
    text = BASE.split("[input]")[0] + textwrap.dedent('''\
        [[input]]
        timestamp_column = ["DATE", "TIME"]
        timestamp_format = "%Y-%m-%d %H:%M"
        timestamp_marks = "end"
        interval_minutes = 30
        columns = { le = "LE", h = "H", ustar = "USTAR" }

        [[input]]
        name = "met"
        timestamp_column = ["YEAR", "DOY", "HHMM"]
        timestamp_format = "%Y %j %H%M"
        timestamp_marks = "start"
        interval_minutes = 10
        delimiter = ";"
        decimal = ","
        encoding = "latin-1"
        columns = { rn = "Rn", ta = "Tair", vpd = "VPD", wind = "U" }
        units = { vpd = "hPa" }

        [[history]]
        start = 2025-07-01
        end = 2025-07-15T12:00:00
        irrigation = true
        [conductance]
        aerodynamic = "log-profile"
        kb_inverse = 2.0
        ''')
    cfg = load_site_config(write(tmp_path, text))
    assert [s.name for s in cfg.inputs] == ["input-1", "met"]
    assert cfg.inputs[0].timestamp_column == ("DATE", "TIME")
    met = cfg.inputs[1]
    assert met.interval_minutes == 10 and met.delimiter == ";" and met.decimal == "," and met.encoding == "latin-1"
    assert cfg.history[0].irrigation is True
    assert cfg.history[0].end == pd.Timestamp("2025-07-15 12:00", tz=cfg.site.tz)
    assert cfg.conductance == {"aerodynamic": "log-profile", "kb_inverse": 2.0}


def test_site_interval_resolved_from_inputs(tmp_path):
    text = BASE.replace("interval_minutes = 30\n\n[input]", "\n[input]").replace(
        "interval_minutes = 30\nmissing", "interval_minutes = 60\nmissing")
    cfg = load_site_config(write(tmp_path, text))
    assert cfg.site.interval_minutes == 60


def test_qc_override_loaded(tmp_path):
    text = BASE.replace('[qc]\nrules = "standard"\n',
                        '[qc]\nrules = "standard"\n[qc.override.variables.ta]\nrange = [-45.0, 45.0]\n')
    cfg = load_site_config(write(tmp_path, text))
    assert cfg.qc["override"] == {"variables": {"ta": {"range": [-45.0, 45.0]}}}


def R(*pairs):
    return ("replace", *pairs)


def A(text):
    return ("append", text)


ERROR_CASES = {
    # name: (edit, expected key)
    "unknown top-level table": (A("[sites]\nx = 1\n"), "sites"),
    "typo in site key": (R("elevation_m = 820", "elevation = 820"), "site.elevation"),
    "missing site key": (R("latitude = 46.5\n", ""), "site.latitude"),
    "site id escapes folder": (R('id = "invented-meadow"', 'id = "../x"'), "site.id"),
    "site id upper case": (R('id = "invented-meadow"', 'id = "Meadow"'), "site.id"),
    "latitude too big": (R("latitude = 46.5", "latitude = 96.5"), "site.latitude"),
    "latitude not a number": (R("latitude = 46.5", 'latitude = "46.5N"'), "site.latitude"),
    "longitude too small": (R("longitude = 7.9", "longitude = -190"), "site.longitude"),
    "utc offset out of range": (R("utc_offset_hours = 1", "utc_offset_hours = 15"), "site.utc_offset_hours"),
    "site interval 15": (R("interval_minutes = 30\n\n[input]", "interval_minutes = 15\n\n[input]"),
                         "site.interval_minutes"),
    "irga unknown": (R('irga = "closed-path"', 'irga = "openpath"'), "site.irga"),
    "measurement below canopy": (R("canopy_height_m = 0.3", "canopy_height_m = 3.0"), "site.measurement_height_m"),
    "unknown input key": (R('match = "*_flux_*.csv"', 'mach = "*_flux_*.csv"'), "input.mach"),
    "timestamp marks": (R('timestamp_marks = "end"', 'timestamp_marks = "middle"'), "input.timestamp_marks"),
    "timestamp marks missing": (R('timestamp_marks = "end"\n', ''), "input.timestamp_marks"),
    "timestamp format": (R('timestamp_format = "%Y-%m-%d %H:%M"', 'timestamp_format = "YYYY-MM-DD"'),
                         "input.timestamp_format"),
    "stream interval": (R("interval_minutes = 30\nmissing", "interval_minutes = 7\nmissing"), "input.interval_minutes"),
    "unknown canonical column": (R('le = "LE"', 'le = "LE"\ntx = "TX"'), "input.columns.tx"),
    "empty column list": (R('g = ["SHF_1", "SHF_2"]', "g = []"), "input.columns.g"),
    "missing required h": (R('h = "H"\n', ""), "input.columns.h"),
    "missing required ustar": (R('ustar = "USTAR"\n', ""), "input.columns.ustar"),
    "unit for an unmapped variable": (R('rh = "RH"\n', ""), "input.units.rh"),
    "missing humidity": (R('rh = "RH"\n', "", 'rh = "fraction"\n', ""), "input.columns.rh"),
    "unknown unit string": (R('ta = "K"', 'ta = "Kelvin"'), "input.units.ta"),
    "unit of the wrong quantity": (R('ta = "K"', 'ta = "kPa"'), "input.units.ta"),
    "unit for unknown variable": (R('rh = "fraction"', 'rh = "fraction"\nrhx = "%"'), "input.units.rhx"),
    "scale unknown canonical": (R("rn = 1.02", "rnn = 1.02"), "input.scale.rnn"),
    "scale not a number": (R("rn = 1.02", 'rn = "x"'), "input.scale.rn"),
    "offset unknown canonical": (R("ta = -0.1", "tair = -0.1"), "input.offset.tair"),
    "flags unknown canonical": (R('le = { column = "qc_LE"', 'lee = { column = "qc_LE"'), "input.flags.lee"),
    "flags missing column": (R('le = { column = "qc_LE", reject = [2] }', "le = { reject = [2] }"),
                             "input.flags.le.column"),
    "passthrough clashes": (R('signal_strength = "AGC"', 'le = "AGC"'), "input.passthrough.le"),
    "history end before start": (R('end = "2025-10-01"', 'end = "2025-04-01"'), "history[0].end"),
    "history bad date": (R('start = "2025-07-01 09:00"', 'start = "July 1st-ish"'), "history[2].start"),
    "history unknown key": (R("canopy_height_m = 0.8", "canopy_hieght_m = 0.8"), "history[0].canopy_hieght_m"),
    "history correct key": (R("g = { scale = -1.0 }", "g = { factor = -1.0 }"), "history[1].correct.g.factor"),
    "history correct variable": (R("g = { scale = -1.0 }", "gg = { scale = -1.0 }"), "history[1].correct.gg"),
    "history correct unmapped": (R("g = { scale = -1.0 }", "rg = { scale = -1.0 }"), "history[1].correct.rg"),
    "history exclude unknown": (R('exclude = ["le", "h"]', 'exclude = ["le", "hh"]'), "history[2].exclude[1]"),
    "history reason missing": (R('reason = "site visit: analyser cleaned"\n', ""), "history[2].reason"),
    "history does nothing": (A('[[history]]\nstart = "2025-01-01"\nend = "2025-01-02"\n'), "history[3]"),
    "overlapping same parameter": (A('[[history]]\nstart = "2025-09-01"\nend = "2025-11-01"\n'
                                     'canopy_height_m = 0.5\n'), "history[3].start"),
    "overlapping same correction": (A('[[history]]\nstart = "2025-06-19"\nend = "2025-06-25"\n'
                                      'correct = { g = { offset = 2.0 } }\nreason = "drift"\n'), "history[3].start"),
    "qc unknown key": (R('rules = "standard"', 'rules = "standard"\nrule = "x"'), "qc.rule"),
    "qc rules not found": (R('rules = "standard"', 'rules = "strictest"'), "qc.rules"),
    "qc rules file not found": (R('rules = "standard"', 'rules = "rules/mine.toml"'), "qc.rules"),
    "conductance method": (R('aerodynamic = "ustar"', 'aerodynamic = "ustar-based"'), "conductance.aerodynamic"),
    "conductance unknown key": (R('aerodynamic = "ustar"', 'aerodynamic = "ustar"\nkb = 2'), "conductance.kb"),
    "kb_inverse negative": (R('aerodynamic = "ustar"', 'aerodynamic = "log-profile"\nkb_inverse = -1'),
                            "conductance.kb_inverse"),
}


def apply_edit(edit):
    if edit[0] == "replace":
        text = BASE
        pairs = edit[1:]
        for old, new in zip(pairs[::2], pairs[1::2]):
            assert old in text, old
            text = text.replace(old, new, 1)
        return text
    return BASE + "\n" + edit[1]


@pytest.mark.parametrize("case", sorted(ERROR_CASES))
def test_config_errors(tmp_path, case):
    """Each invalid file: ConfigError, one line, naming the file and the dotted key."""
    edit, key = ERROR_CASES[case]
    err = load_error(tmp_path, apply_edit(edit))
    message = str(err)
    assert "\n" not in message
    assert "site.toml" in message
    assert err.key == key, message
    assert repr(key) in message


def test_overlap_of_different_kinds_is_fine(tmp_path):
    """A site-visit exclusion inside a canopy-height period and a correction of another
    variable overlapping a correction are accepted."""
    text = BASE + textwrap.dedent('''
        [[history]]
        start = "2025-06-10"
        end = "2025-06-12"
        correct = { h = { offset = 1.5 } }
        reason = "sonic heating"
        [[history]]
        start = "2025-06-10"
        end = "2025-06-11"
        exclude = ["le"]
        reason = "second visit"
        ''')
    cfg = load_site_config(write(tmp_path, text))
    assert len(cfg.history) == 5


def test_same_variable_mapped_twice_across_streams(tmp_path):
    text = BASE.split("[input]")[0] + textwrap.dedent('''\
        [[input]]
        timestamp_column = "T"
        timestamp_format = "%Y-%m-%d %H:%M"
        timestamp_marks = "end"
        columns = { le = "LE", h = "H", ustar = "USTAR", rn = "RN" }
        [[input]]
        timestamp_column = "T"
        timestamp_format = "%Y-%m-%d %H:%M"
        timestamp_marks = "end"
        columns = { rn = "Rn", ta = "Tair", vpd = "VPD", wind = "U" }
        ''')
    err = load_error(tmp_path, text)
    assert err.key == "input[1].columns.rn"


def test_required_mapping_across_streams(tmp_path):
    text = BASE.split("[input]")[0] + textwrap.dedent('''\
        [[input]]
        timestamp_column = "T"
        timestamp_format = "%Y-%m-%d %H:%M"
        timestamp_marks = "end"
        columns = { le = "LE", h = "H", ustar = "USTAR" }
        [[input]]
        timestamp_column = "T"
        timestamp_format = "%Y-%m-%d %H:%M"
        timestamp_marks = "end"
        columns = { rn = "Rn", ta = "Tair", vpd = "VPD" }
        ''')
    err = load_error(tmp_path, text)
    assert err.key == "input[*].columns.wind" and "wind" in str(err)


def test_qc_override_error_names_key(tmp_path):
    text = BASE.replace('[qc]\nrules = "standard"\n', '[qc]\nrules = "standard"\n[qc.override.despike]\nzz = 5.5\n')
    err = load_error(tmp_path, text)
    assert isinstance(err, RuleError)
    assert err.key == "qc.override.despike.zz" and "site.toml" in str(err)


@pytest.mark.parametrize("content, fragment", [
    (b"[site\nid = 1\n", "not valid TOML"),
    (b"\xff\xfe[site]\n", "not UTF-8"),
])
def test_unreadable_files(tmp_path, content, fragment):
    path = tmp_path / "site.toml"
    path.write_bytes(content)
    with pytest.raises(ConfigError, match=fragment) as info:
        load_site_config(path)
    assert "site.toml" in str(info.value) and "\n" not in str(info.value)


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_site_config(tmp_path / "nope.toml")


def test_no_code_execution(tmp_path):
    """Configuration is data: an expression in a value is text, refused, never evaluated."""
    err = load_error(tmp_path, BASE.replace("latitude = 46.5", 'latitude = "__import__(\'os\').getcwd()"'))
    assert err.key == "site.latitude"


# ------------------------------------------------------------------------- network file
def test_network_config(tmp_path):
    (tmp_path / "sites").mkdir()
    write(tmp_path / "sites", BASE, name="invented-meadow.toml")
    net = write(tmp_path, textwrap.dedent('''\
        [network]
        name = "Invented network"
        rules = "standard"
        [[network.sites]]
        config = "sites/invented-meadow.toml"
        data = "raw/invented-meadow/*.csv"
        '''), name="network.toml")
    cfg = load_network_config(net)
    assert cfg.name == "Invented network" and cfg.rules == "standard"
    (site,) = cfg.sites
    assert site.config == tmp_path / "sites" / "invented-meadow.toml"
    assert site.data == str(tmp_path / "raw" / "invented-meadow" / "*.csv")


@pytest.mark.parametrize("body, key", [
    ('[network]\nname = "N"\n[[network.sites]]\nconfig = "sites/missing.toml"\ndata = "raw/*.csv"\n',
     "network.sites[0].config"),
    ('[network]\nname = "N"\n[[network.sites]]\nconfig = "site.toml"\n', "network.sites[0].data"),
    ('[network]\nname = "N"\nrule = "standard"\n', "network.rule"),
    ('[network]\nname = "N"\nrules = "nonexistent"\n[[network.sites]]\nconfig = "site.toml"\ndata = "x"\n',
     "network.rules"),
    ('[network]\nname = "N"\n', "network.sites"),
    ('[netwrk]\nname = "N"\n', "netwrk"),
])
def test_network_errors(tmp_path, body, key):
    write(tmp_path, BASE)
    net = write(tmp_path, body, name="network.toml")
    with pytest.raises(ConfigError) as info:
        load_network_config(net)
    assert info.value.key == key
    assert "network.toml" in str(info.value) and "\n" not in str(info.value)

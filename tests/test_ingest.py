"""Reading logger exports and building the working frame (pipeline.ingest). All data invented.

Expected values follow by hand arithmetic from the invented inputs and the documented rules
(CONTRACT §2: value = raw * scale + offset, interval starts, fixed UTC offsets; the
aggregation and snapping rules in the pipeline.ingest module notes, "common practice");
oracle libraries are named where they are used (pint, scipy, hashlib).
"""
from __future__ import annotations

import hashlib
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from pipeline import flags as F
from pipeline.config import FlagColumn, HistoryEntry, SiteConfig, SiteInfo, StreamConfig
from pipeline.errors import ConfigError, InputError, TowerflowWarning
from pipeline.ingest import assign_stream, build_working_frame, read_logger_file

# ---------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------
def make_site(offset=1.0, interval=30, **kw) -> SiteInfo:
    base = dict(id="invented-meadow", name="Invented meadow", latitude=46.5, longitude=7.9,
                elevation_m=820.0, utc_offset_hours=offset, canopy_height_m=0.3,
                measurement_height_m=2.0, interval_minutes=interval)
    base.update(kw)
    return SiteInfo(**base)


def make_stream(**kw) -> StreamConfig:
    base = dict(name="main", match=None, timestamp_column=("TIMESTAMP",), timestamp_format="%Y-%m-%d %H:%M",
                timestamp_marks="start", interval_minutes=30, missing=(-9999, "NAN"),
                columns={"le": ("LE",), "ta": ("T_AIR",)})
    base.update(kw)
    return StreamConfig(**base)


def make_cfg(streams, site=None, history=()) -> SiteConfig:
    return SiteConfig(path=Path("invented-meadow.toml"), sha256="0" * 64, site=site or make_site(),
                      inputs=tuple(streams), history=tuple(history))


def write(tmp_path, text, name="invented_flux_2025w23.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding) if isinstance(text, str) else text)
    return path


def read(path, stream, site=None):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = read_logger_file(path, stream, site or make_site())
    return out, [str(w.message) for w in caught if issubclass(w.category, TowerflowWarning)]


def build(raw_by_stream, cfg, **kw):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = build_working_frame(raw_by_stream, cfg, **kw)
    return (*out, [str(w.message) for w in caught if issubclass(w.category, TowerflowWarning)])


def raw_frame(start_utc, n, freq, **columns):
    idx = pd.date_range(start_utc, periods=n, freq=freq, tz="UTC", name="timestamp_start")
    return pd.DataFrame({k: np.asarray(v, dtype=float) for k, v in columns.items()}, index=idx)


def one_line_naming(msg, *needles):
    assert "\n" not in msg
    for needle in needles:
        assert needle in msg, (needle, msg)


GOOD = "TIMESTAMP,LE,T_AIR\n2025-06-01 12:00,101.5,20.5\n2025-06-01 12:30,99.0,21.0\n"


# ---------------------------------------------------------------------------------------
# reading: formats
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("sep", [",", ";", "\t"])
def test_delimiter_detected(tmp_path, sep):
    out, _ = read(write(tmp_path, GOOD.replace(",", sep)), make_stream())
    assert_allclose(out.raw["LE"], [101.5, 99.0])
    assert list(out.raw.columns) == ["LE", "T_AIR"] and out.raw["LE"].dtype == np.float64


def test_decimal_comma_with_semicolons(tmp_path):
    text = "TIMESTAMP;LE;T_AIR\n2025-06-01 12:00;101,5;20,5\n2025-06-01 12:30;99;x\n"
    out, warned = read(write(tmp_path, text), make_stream(decimal=","))
    assert_allclose(out.raw["LE"], [101.5, 99.0])
    assert out.raw["T_AIR"].iloc[0] == 20.5 and np.isnan(out.raw["T_AIR"].iloc[1])
    assert out.n_bad_cells == 1


def test_declared_delimiter_wins(tmp_path):
    text = "TIMESTAMP|LE|T_AIR\n2025-06-01 12:00|1|2\n"
    out, _ = read(write(tmp_path, text), make_stream(delimiter="|"))
    assert out.raw["LE"].iloc[0] == 1.0


def test_skip_rows_units_row_and_line_numbers(tmp_path):
    text = "TIMESTAMP,LE,T_AIR\nTS,W m-2,degC\nsmp,avg,avg\n2025-06-01 12:00,1,2\n2025-06-01 12:30,3,4\n"
    out, _ = read(write(tmp_path, text), make_stream(skip_rows=(0, 1)))
    assert_allclose(out.raw["LE"], [1.0, 3.0])
    assert list(out.rows) == [4, 5]


def test_missing_sentinels_numbers_and_strings(tmp_path):
    text = ("TIMESTAMP,LE,T_AIR\n2025-06-01 12:00,-9999,NAN\n2025-06-01 12:30,-9999.0,\"NAN\"\n"
            "2025-06-01 13:00,5,NA\n")
    out, warned = read(write(tmp_path, text), make_stream())
    assert np.isnan(out.raw["LE"].iloc[:2]).all() and out.raw["LE"].iloc[2] == 5.0
    assert out.raw["T_AIR"].isna().all()
    assert out.n_bad_cells == 0 and not any("non-numeric" in w for w in warned)


def test_non_numeric_cells_counted_one_warning_per_column(tmp_path):
    rows = [f"2025-06-01 {h:02d}:{m:02d},{'ERR' if h % 2 else h},{'--' if h == 3 else 1.5}"
            for h in range(0, 8) for m in (0, 30)]
    out, warned = read(write(tmp_path, "TIMESTAMP,LE,T_AIR\n" + "\n".join(rows) + "\n"), make_stream())
    assert out.n_bad_cells == 8 + 2
    le = [w for w in warned if "'LE'" in w]
    ta = [w for w in warned if "'T_AIR'" in w]
    assert len(le) == 1 and len(ta) == 1
    one_line_naming(le[0], "invented_flux_2025w23.csv", "8 non-numeric cells", "first at row 4", "'ERR'")
    one_line_naming(ta[0], "2 non-numeric cell", "first at row 8")
    assert out.warnings == warned


def test_passthrough_as_read_and_flag_columns_float(tmp_path):
    text = "TIMESTAMP,LE,T_AIR,QC,AGC,NOTE\n2025-06-01 12:00,1,2,0,55,ok\n2025-06-01 12:30,3,4,2,56,wet\n"
    stream = make_stream(flags={"le": FlagColumn("QC", (2,))}, passthrough={"signal": "AGC", "note": "NOTE"})
    out, _ = read(write(tmp_path, text), stream)
    assert out.raw["QC"].dtype == np.float64
    assert list(out.raw["NOTE"]) == ["ok", "wet"]
    assert set(out.raw.columns) == {"LE", "T_AIR", "QC", "AGC", "NOTE"}


def test_sha256_of_file_bytes(tmp_path):
    path = write(tmp_path, GOOD)
    out, _ = read(path, make_stream())
    assert out.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()  # hashlib oracle
    assert out.stream == "main" and out.path == path


def test_utf8_bom_and_crlf(tmp_path):
    path = write(tmp_path, b"\xef\xbb\xbf" + GOOD.replace("\n", "\r\n").encode())
    out, _ = read(path, make_stream())
    assert_allclose(out.raw["LE"], [101.5, 99.0])


def test_declared_latin1_encoding(tmp_path):
    text = "TIMESTAMP,LE,T_AIR,SITE\n2025-06-01 12:00,1,2,Zürichsee-Süd\n"
    path = write(tmp_path, text, encoding="latin-1")
    out, _ = read(path, make_stream(encoding="latin-1", passthrough={"site_label": "SITE"}))
    assert out.raw["SITE"].iloc[0] == "Zürichsee-Süd"


# ---------------------------------------------------------------------------------------
# reading: broken files (each a one-line error naming file and row/column)
# ---------------------------------------------------------------------------------------
def test_non_utf8_bytes_error_names_row(tmp_path):
    path = write(tmp_path, GOOD.encode() + "2025-06-01 13:00,1,2\n2025-06-01 13:30,5,\xb0C\n".encode("latin-1"))
    with pytest.raises(InputError) as info:
        read(path, make_stream())
    one_line_naming(str(info.value), "invented_flux_2025w23.csv", "row 5", "0xb0", "utf-8", "encoding")


@pytest.mark.parametrize("text,needle", [
    ("", "empty"),
    ("\n\n", "empty"),
    ("TIMESTAMP,LE,T_AIR\n", "header only"),
    ("TIMESTAMP,LE,T_AIR\n\n\n", "header only"),
    ("2025-06-01 12:00,101.5,20.5\n2025-06-01 12:30,99.0,21.0\n", "no header"),
    ("TIMESTAMP LE T_AIR\n2025-06-01 12:00 1 2\n", "no comma, semicolon or tab"),
])
def test_structurally_broken_files(tmp_path, text, needle):
    with pytest.raises(InputError) as info:
        read(write(tmp_path, text), make_stream())
    one_line_naming(str(info.value), "invented_flux_2025w23.csv", needle)


def test_mapped_column_absent_names_column(tmp_path):
    with pytest.raises(InputError) as info:
        read(write(tmp_path, GOOD.replace("T_AIR", "TA_1")), make_stream())
    one_line_naming(str(info.value), "invented_flux_2025w23.csv", "row 1", "column 'T_AIR'", "not found")


def test_timestamp_column_absent(tmp_path):
    with pytest.raises(InputError) as info:
        read(write(tmp_path, GOOD.replace("TIMESTAMP", "TS")), make_stream())
    one_line_naming(str(info.value), "column 'TIMESTAMP'")


def test_duplicate_used_column_is_error(tmp_path):
    text = "TIMESTAMP,LE,T_AIR,LE\n2025-06-01 12:00,1,2,3\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, text), make_stream())
    one_line_naming(str(info.value), "invented_flux_2025w23.csv", "column 'LE'", "2 times")


def test_duplicate_unused_column_warns(tmp_path):
    text = "TIMESTAMP,LE,T_AIR,X,X\n2025-06-01 12:00,1,2,3,4\n"
    out, warned = read(write(tmp_path, text), make_stream())
    assert out.raw["LE"].iloc[0] == 1.0
    assert any("duplicate column names" in w and "'X'" in w for w in warned)


@pytest.mark.parametrize("tail", ["2025-06-01 13:00,5", "2025-06-01 13:00,5\n", "2025-06-01 13"])
def test_truncated_last_line_dropped_with_warning(tmp_path, tail):
    out, warned = read(write(tmp_path, GOOD + tail), make_stream())
    assert len(out.raw) == 2
    assert any("truncated" in w and "row 4" in w for w in warned)


def test_row_with_too_many_fields_is_error(tmp_path):
    text = GOOD + "2025-06-01 13:00,1,2,3,4\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, text), make_stream())
    one_line_naming(str(info.value), "invented_flux_2025w23.csv", "row 4", "fields")


def test_short_row_in_middle_gives_missing_values(tmp_path):
    text = "TIMESTAMP,LE,T_AIR\n2025-06-01 12:00,1\n2025-06-01 12:30,3,4\n"
    out, _ = read(write(tmp_path, text), make_stream())
    assert np.isnan(out.raw["T_AIR"].iloc[0]) and out.raw["T_AIR"].iloc[1] == 4.0


# ---------------------------------------------------------------------------------------
# assign_stream
# ---------------------------------------------------------------------------------------
def test_assign_by_glob_and_by_header(tmp_path):
    flux = make_stream(name="flux", match="*_flux_*.csv")
    met = make_stream(name="met", match=None, columns={"rh": ("RH",)}, interval_minutes=10)
    cfg = make_cfg([flux, met])
    assert assign_stream(write(tmp_path, GOOD, "a_flux_1.csv"), cfg).name == "flux"
    met_file = write(tmp_path, "TIMESTAMP,RH\n2025-06-01 12:00,50\n", "tower_met.csv")
    assert assign_stream(met_file, cfg).name == "met"


def test_assign_none_fits(tmp_path):
    cfg = make_cfg([make_stream(name="met", columns={"rh": ("RH",)})])
    with pytest.raises(InputError) as info:
        assign_stream(write(tmp_path, GOOD, "other.csv"), cfg)
    one_line_naming(str(info.value), "other.csv", "no stream fits")


def test_assign_several_fit(tmp_path):
    cfg = make_cfg([make_stream(name="a"), make_stream(name="b", columns={"le": ("LE",)})])
    with pytest.raises(InputError) as info:
        assign_stream(write(tmp_path, GOOD, "x.csv"), cfg)
    one_line_naming(str(info.value), "x.csv", "several streams", "'a'", "'b'")


def test_assign_several_globs(tmp_path):
    cfg = make_cfg([make_stream(name="a", match="*.csv"), make_stream(name="b", match="x*")])
    with pytest.raises(InputError) as info:
        assign_stream(write(tmp_path, GOOD, "x.csv"), cfg)
    one_line_naming(str(info.value), "x.csv", "several streams")


# ---------------------------------------------------------------------------------------
# the working frame
# ---------------------------------------------------------------------------------------
def test_working_frame_30min_grid_units_scale_offset(tmp_path):
    """Scale/offset before unit conversion; complete local grid with explicit gaps; MISSING bit."""
    stream = make_stream(units={"ta": "K"}, scale={"le": 2.0}, offset={"le": -1.0, "ta": 0.15})
    raw = raw_frame("2025-06-01 10:00", 4, "30min", LE=[10, 20, np.nan, 40], T_AIR=[293.0, 294.0, 295.0, 296.0])
    raw = raw.drop(raw.index[1])  # an absent interval
    frame, flags, report, _ = build({"main": raw}, make_cfg([stream]))
    assert str(frame.index.tz) == "UTC+01:00" and frame.index.name == "timestamp_start"
    assert frame.index[0] == pd.Timestamp("2025-06-01 11:00", tz=make_site().tz)
    assert len(frame) == 4
    assert np.all(np.diff(frame.index.asi8) == pd.Timedelta("30min").value)
    assert_allclose(frame["le"], [19.0, np.nan, np.nan, 79.0])  # raw*2 - 1
    assert_allclose(frame["ta"], [20.0, np.nan, 22.0, 23.0])  # (K + 0.15) - 273.15
    assert list(flags["le"]) == [0, F.MISSING, F.MISSING, 0]
    assert list(flags["ta"]) == [0, F.MISSING, 0, 0]
    assert flags["le"].dtype == np.int32
    assert report["n_intervals"] == 4 and report["missing"] == {"le": 2, "ta": 1}
    for col in ("canopy_height_m", "measurement_height_m", "irga", "irrigated"):
        assert col in frame.columns


def test_working_frame_sixty_minute_site():
    stream = make_stream(interval_minutes=60)
    raw = raw_frame("2025-06-01 10:00", 3, "60min", LE=[1, 2, 3], T_AIR=[4, 5, 6])
    frame, flags, report, _ = build({"main": raw}, make_cfg([stream], make_site(interval=60)))
    assert len(frame) == 3 and report["interval_minutes"] == 60
    assert_allclose(frame["le"], [1, 2, 3])


def test_site_interval_defaults_to_first_stream():
    stream = make_stream(interval_minutes=60)
    raw = raw_frame("2025-06-01 10:00", 3, "60min", LE=[1, 2, 3], T_AIR=[4, 5, 6])
    frame, _, report, _ = build({"main": raw}, make_cfg([stream], make_site(interval=None)))
    assert report["interval_minutes"] == 60 and len(frame) == 3


def test_thirty_minute_stream_into_sixty_minute_site():
    """Two 30-min values average to the hour."""
    raw = raw_frame("2025-06-01 10:00", 4, "30min", LE=[1, 3, 5, np.nan], T_AIR=[4, 6, 8, 10])
    frame, _, report, _ = build({"main": raw}, make_cfg([make_stream()], make_site(interval=60)))
    assert_allclose(frame["le"], [2.0, np.nan])  # 1 of 2 present < 2/3
    assert_allclose(frame["ta"], [5.0, 9.0])
    assert report["incomplete_intervals"]["le"] == 1


def test_ten_minute_met_stream_aggregated_into_thirty_minute_site():
    """Mean, precipitation sum, wind-direction vector mean across north (350° and 10° -> 0°)."""
    flux = make_stream(name="flux", columns={"le": ("LE",)})
    met = make_stream(name="met", interval_minutes=10,
                      columns={"ta": ("T",), "precip": ("P",), "wind_dir": ("WD",), "wind": ("WS",)})
    raw_flux = raw_frame("2025-06-01 10:00", 2, "30min", LE=[100.0, 110.0])
    raw_met = raw_frame("2025-06-01 10:00", 6, "10min",
                        T=[10.0, 11.0, 12.0, 20.0, np.nan, 22.0],
                        P=[0.2, 0.0, 0.4, 1.0, np.nan, 1.0],
                        WD=[350.0, 10.0, 0.0, 80.0, 100.0, 90.0],
                        WS=[1.0, 2.0, 3.0, 4.0, 5.0, np.nan])
    frame, flags, report, _ = build({"flux": raw_flux, "met": raw_met}, make_cfg([flux, met]))
    assert len(frame) == 2
    assert_allclose(frame["ta"], [11.0, 21.0])  # 2 of 3 present is enough (>= 2/3)
    assert_allclose(frame["precip"].iloc[0], 0.6)
    assert np.isnan(frame["precip"].iloc[1])  # a partial sum is not a sum
    assert_allclose(frame["wind_dir"], [0.0, 90.0], atol=1e-9)  # vector mean, by symmetry
    assert_allclose(frame["wind"], [2.0, 4.5])
    assert flags["precip"].iloc[1] == F.MISSING
    assert report["streams"]["met"]["aggregated_from_sub_intervals"] == 3


def test_vector_mean_of_directions_matches_scipy_circmean():
    """Unweighted vector mean equals scipy.stats.circmean (oracle)."""
    from scipy.stats import circmean

    dirs = [[350.0, 20.0, 5.0], [170.0, 200.0, 260.0], [90.0, 100.0, 300.0]]
    met = make_stream(interval_minutes=10, columns={"wind_dir": ("WD",)})
    raw = raw_frame("2025-06-01 10:00", 9, "10min", WD=np.ravel(dirs))
    frame, _, _, _ = build({"main": raw}, make_cfg([met]))
    expected = [circmean(d, high=360.0, low=0.0) for d in dirs]  # scipy oracle
    assert_allclose(frame["wind_dir"], expected, atol=1e-6)


def test_one_of_three_sub_intervals_is_not_enough():
    met = make_stream(interval_minutes=10, columns={"ta": ("T",)})
    raw = raw_frame("2025-06-01 10:00", 3, "10min", T=[10.0, np.nan, np.nan])
    frame, flags, report, _ = build({"main": raw}, make_cfg([met]))
    assert np.isnan(frame["ta"].iloc[0]) and flags["ta"].iloc[0] == F.MISSING
    assert report["incomplete_intervals"]["ta"] == 1


def test_replicates_averaged_with_sensor_count():
    stream = make_stream(columns={"g": ("G1", "G2", "G3"), "le": ("LE",)})
    raw = raw_frame("2025-06-01 10:00", 3, "30min", G1=[10, np.nan, np.nan], G2=[20, 30, np.nan],
                    G3=[30, 50, np.nan], LE=[1, 1, 1])
    frame, flags, _, _ = build({"main": raw}, make_cfg([stream]))
    assert_allclose(frame["g"], [20.0, 40.0, np.nan])
    assert list(frame["g_sensor_count"]) == [3, 2, 0]
    assert "le_sensor_count" not in frame.columns
    assert list(flags["g"]) == [0, 0, F.MISSING]


def test_replicates_scaled_then_converted():
    stream = make_stream(columns={"t_soil": ("TS1", "TS2")}, units={"t_soil": "K"}, scale={"t_soil": 0.1})
    raw = raw_frame("2025-06-01 10:00", 1, "30min", TS1=[2831.5], TS2=[2851.5])
    frame, _, _, _ = build({"main": raw}, make_cfg([stream]))
    assert_allclose(frame["t_soil"], [11.0])  # mean of 283.15 K and 285.15 K


def test_upstream_flag_sets_instrument_bit():
    stream = make_stream(columns={"le": ("LE",)}, flags={"le": FlagColumn("QC", (2, 9))})
    raw = raw_frame("2025-06-01 10:00", 4, "30min", LE=[1, 2, 3, np.nan], QC=[0, 2, 9, 2])
    frame, flags, report, _ = build({"main": raw}, make_cfg([stream]))
    assert list(flags["le"]) == [0, F.INSTRUMENT, F.INSTRUMENT, F.MISSING]
    assert_allclose(frame["le"], [1, 2, 3, np.nan])  # values are kept, only flagged
    assert report["instrument_rejected"]["le"] == 2


def test_upstream_flag_in_aggregated_stream():
    """Rejected sub-intervals leave the mean if enough accepted remain; else bit 8 on the mean of all."""
    met = make_stream(interval_minutes=10, columns={"ta": ("T",)}, flags={"ta": FlagColumn("F", (1,))})
    raw = raw_frame("2025-06-01 10:00", 6, "10min", T=[10, 11, 30, 10, 20, 30], F=[0, 0, 1, 1, 1, 0])
    frame, flags, _, _ = build({"main": raw}, make_cfg([met]))
    assert_allclose(frame["ta"], [10.5, 20.0])
    assert list(flags["ta"]) == [0, F.INSTRUMENT]


def test_passthrough_carried():
    stream = make_stream(columns={"le": ("LE",)}, passthrough={"signal_strength": "AGC"})
    raw = raw_frame("2025-06-01 10:00", 2, "30min", LE=[1, 2], AGC=[50, 56])
    frame, flags, _, _ = build({"main": raw}, make_cfg([stream]))
    assert list(frame["signal_strength"]) == [50, 56] and "signal_strength" not in flags.columns


def test_union_of_streams_grid():
    flux = make_stream(name="flux", columns={"le": ("LE",)})
    met = make_stream(name="met", interval_minutes=10, columns={"ta": ("T",)})
    raw_flux = raw_frame("2025-06-01 10:00", 2, "30min", LE=[1.0, 2.0])
    raw_met = raw_frame("2025-06-01 11:00", 6, "10min", T=np.arange(6.0))
    frame, flags, _, _ = build({"flux": raw_flux, "met": raw_met}, make_cfg([flux, met]))
    assert len(frame) == 4
    assert_allclose(frame["le"], [1, 2, np.nan, np.nan])
    assert_allclose(frame["ta"], [np.nan, np.nan, 1.0, 4.0])


def test_only_rh_mapped_gives_no_vpd():
    """Only rh mapped: the frame holds rh (fraction converted to %) and no invented vpd."""
    raw = raw_frame("2025-06-01 10:00", 2, "30min", RH=[0.5, 0.6])
    frame, flags, report, _ = build({"main": raw}, make_cfg([make_stream(columns={"rh": ("RH",)}, units={"rh": "fraction"})]))
    assert "vpd" not in frame.columns and "vpd" not in flags.columns
    assert_allclose(frame["rh"], [50.0, 60.0])


def test_unit_sanity_warning_in_report():
    stream = make_stream(columns={"ta": ("T",)}, units={"ta": "degC"})
    raw = raw_frame("2025-06-01 10:00", 3, "30min", T=[291.0, 292.0, 293.0])
    frame, _, report, warned = build({"main": raw}, make_cfg([stream]))
    assert len(report["unit_warnings"]) == 1 and "'K'" in report["unit_warnings"][0]
    assert any("'K'" in w for w in warned)


def test_stream_longer_than_site_interval_is_config_error():
    stream = make_stream(interval_minutes=60)
    raw = raw_frame("2025-06-01 10:00", 2, "60min", LE=[1, 2], T_AIR=[1, 2])
    with pytest.raises(ConfigError) as info:
        build({"main": raw}, make_cfg([stream], make_site(interval=30)))
    one_line_naming(str(info.value), "invented-meadow.toml", "input.interval_minutes", "longer")


def test_unknown_unit_is_config_error_naming_key():
    stream = make_stream(units={"ta": "Kelvin"})
    raw = raw_frame("2025-06-01 10:00", 2, "30min", LE=[1, 2], T_AIR=[1, 2])
    with pytest.raises(ConfigError) as info:
        build({"main": raw}, make_cfg([stream]))
    one_line_naming(str(info.value), "invented-meadow.toml", "input.units.ta")


def test_variable_in_two_streams_is_config_error():
    a, b = make_stream(name="a"), make_stream(name="b", columns={"le": ("LE",)})
    raw = raw_frame("2025-06-01 10:00", 2, "30min", LE=[1, 2], T_AIR=[1, 2])
    with pytest.raises(ConfigError, match="input.columns.le"):
        build({"a": raw, "b": raw}, make_cfg([a, b]))


def test_unknown_stream_and_no_data():
    with pytest.raises(ConfigError, match="'ghost'"):
        build({"ghost": raw_frame("2025-06-01", 1, "30min", LE=[1])}, make_cfg([make_stream()]))
    with pytest.raises(InputError, match="no data"):
        build({}, make_cfg([make_stream()]))


def test_inputs_not_mutated():
    raw = raw_frame("2025-06-01 10:00", 3, "30min", LE=[1, 2, 3], T_AIR=[1, 2, 3])
    before = raw.copy()
    build({"main": raw}, make_cfg([make_stream(scale={"le": 2.0})]))
    pd.testing.assert_frame_equal(raw, before)


# ---------------------------------------------------------------------------------------
# history (pipeline.history, written by another engineer)
# ---------------------------------------------------------------------------------------
def _entry(i, start, end, **kw):
    tz = make_site().tz
    return HistoryEntry(index=i, start=pd.Timestamp(start, tz=tz), end=pd.Timestamp(end, tz=tz), **kw)


def test_history_correction_exclusion_parameters():
    history = [
        _entry(0, "2025-06-01 11:30", "2025-06-01 12:30", correct={"le": {"scale": -1.0}}, reason="sign"),
        _entry(1, "2025-06-01 12:00", "2025-06-01 13:00", exclude=("ta",), reason="visit"),
        _entry(2, "2025-06-01 12:30", "2025-06-02", parameters={"canopy_height_m": 1.8}),
    ]
    raw = raw_frame("2025-06-01 10:00", 4, "30min", LE=[1, 2, 3, 4], T_AIR=[1, 2, 3, 4])
    frame, flags, _, _ = build({"main": raw}, make_cfg([make_stream()], history=history))
    # local starts 11:00, 11:30, 12:00, 12:30
    assert_allclose(frame["le"], [1, -2, -3, 4])
    assert list(frame["le_history_entry"]) == [-1, 0, 0, -1]
    assert list(flags["ta"]) == [0, 0, F.HISTORY, F.HISTORY]
    assert list(frame["canopy_height_m"]) == [0.3, 0.3, 0.3, 1.8]


def test_history_clock_shift_per_variable():
    """A 60-min clock shift of le moves its values one hour later; ta stays."""
    history = [_entry(0, "2025-06-01 00:00", "2025-06-02", correct={"le": {"shift_minutes": 60}})]
    raw = raw_frame("2025-06-01 10:00", 4, "30min", LE=[1, 2, 3, 4], T_AIR=[1, 2, 3, 4])
    frame, flags, report, _ = build({"main": raw}, make_cfg([make_stream()], history=history))
    assert len(frame) == 6
    assert_allclose(frame["le"], [np.nan, np.nan, 1, 2, 3, 4])
    assert_allclose(frame["ta"], [1, 2, 3, 4, np.nan, np.nan])
    assert report["clock_shifted"] == {"le": 4}


# ---------------------------------------------------------------------------------------
# end to end through a file, and a property over random files
# ---------------------------------------------------------------------------------------
def test_file_to_frame_end_to_end(tmp_path):
    text = ("TIMESTAMP;LE;TA;RH;QC\nTS;W m-2;K;%;-\n"
            "2025-06-01 00:30;10,5;290,15;55;0\n2025-06-01 01:00;x;-9999;56;0\n2025-06-01 01:30;12;291,15;57;2\n")
    stream = make_stream(columns={"le": ("LE",), "ta": ("TA",), "rh": ("RH",)}, units={"ta": "K"},
                         decimal=",", skip_rows=(0,), timestamp_marks="end", flags={"le": FlagColumn("QC", (2,))})
    ing, _ = read(write(tmp_path, text), stream)
    frame, flags, report, _ = build({"main": ing.raw}, make_cfg([stream]), ingested=[ing])
    assert frame.index[0] == pd.Timestamp("2025-06-01 00:00", tz=make_site().tz)
    assert_allclose(frame["le"], [10.5, np.nan, 12.0])
    assert_allclose(frame["ta"], [17.0, np.nan, 18.0])
    assert list(flags["le"]) == [0, F.MISSING, F.INSTRUMENT]
    assert report["n_bad_cells"] == 1 and any("non-numeric" in w for w in report["warnings"])
    import json
    json.dumps(report)  # JSON-serialisable


COLS = ["LE", "H", "T_AIR", "RH", "USTAR"]


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(order=st.permutations(COLS),
       n=st.integers(1, 80),
       missing=st.lists(st.tuples(st.integers(0, 79), st.integers(0, 4)), max_size=40),
       drop_rows=st.sets(st.integers(1, 78), max_size=10),
       sep=st.sampled_from([",", ";", "\t"]),
       interval=st.sampled_from([30, 60]),
       seed=st.integers(0, 2**16))
def test_random_column_order_and_missing_cells(tmp_path, order, n, missing, drop_rows, sep, interval, seed):
    """Any column order, missing cells and dropped rows: grid length right, values preserved."""
    rng = np.random.default_rng(seed)
    values = np.round(rng.normal(100.0, 50.0, size=(n, len(COLS))), 3)
    values[:, COLS.index("RH")] = np.round(rng.uniform(20, 99, n), 2)
    for r, c in missing:
        if r < n:
            values[r, c] = np.nan
    keep = [i for i in range(n) if i not in drop_rows or i in (0, n - 1)]
    stamps = pd.date_range("2025-06-01 00:00", periods=n, freq=f"{interval}min")
    lines = [sep.join(["TIMESTAMP", *order])]
    for i in keep:
        cells = {c: ("-9999" if np.isnan(values[i, k]) else repr(float(values[i, k]))) for k, c in enumerate(COLS)}
        lines.append(sep.join([f"{stamps[i]:%Y-%m-%d %H:%M}", *[cells[c] for c in order]]))
    path = tmp_path / "prop.csv"
    path.write_text("\n".join(lines) + "\n")
    stream = make_stream(interval_minutes=interval, columns={"le": ("LE",), "h": ("H",), "ta": ("T_AIR",),
                                                             "rh": ("RH",), "ustar": ("USTAR",)})
    site = make_site(interval=interval)
    ing, _ = read(path, stream, site)
    frame, flags, _, _ = build({"main": ing.raw}, make_cfg([stream], site))
    assert len(frame) == n  # first and last rows kept: grid spans them
    for k, (var, col) in enumerate([("le", "LE"), ("h", "H"), ("ta", "T_AIR"), ("rh", "RH"), ("ustar", "USTAR")]):
        expected = values[:, k].copy()
        expected[[i for i in range(n) if i not in keep]] = np.nan
        assert_allclose(frame[var].to_numpy(), expected, rtol=0, atol=0)
        assert np.array_equal(flags[var].to_numpy() == F.MISSING, np.isnan(expected))


# ---------------------------------------------------------------------------------------
# chunked reading: tiny chunks and blocks give the same result as one piece
# ---------------------------------------------------------------------------------------
def _messy_file(tmp_path):
    rows = []
    for i, t in enumerate(pd.date_range("2025-06-01 00:00", periods=23, freq="30min")):
        le = "ERR" if i in (2, 9, 17) else f"{i}.5"
        rows.append(f"{t:%Y-%m-%d %H:%M},{le},{-9999 if i == 5 else i}")
        if i == 11:
            rows.append("")  # a blank line
    return write(tmp_path, "TIMESTAMP,LE,T_AIR\nTS,W m-2,degC\n" + "\n".join(rows) + "\n2025-06-02 00:00,4")


def test_small_chunks_and_blocks_match_single_piece(tmp_path, monkeypatch):
    import pipeline.ingest as ingest

    path = _messy_file(tmp_path)
    stream = make_stream(skip_rows=(0,))
    whole, warned_whole = read(path, stream)
    monkeypatch.setattr(ingest, "CHUNK_ROWS", 4)
    real_scan = ingest._scan_file
    monkeypatch.setattr(ingest, "_scan_file", lambda p, d, n: real_scan(p, d, n, block=7))
    pieces, warned_pieces = read(path, stream)
    pd.testing.assert_frame_equal(whole.raw, pieces.raw)
    assert np.array_equal(whole.rows, pieces.rows) and warned_whole == warned_pieces
    assert whole.sha256 == pieces.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert whole.n_bad_cells == 3 and len(whole.raw) == 23
    assert any("3 non-numeric cells" in w and "first at row 5" in w for w in warned_whole)
    assert any("truncated" in w for w in warned_whole)
    assert np.isnan(whole.raw["T_AIR"].iloc[5]) and list(whole.rows[11:13]) == [14, 16]


def test_swapped_jump_across_chunk_boundary(tmp_path, monkeypatch):
    import pipeline.ingest as ingest

    body = "11/03/2025 23:00,1\n11/03/2025 23:30,2\n03/12/2025 00:00,3\n03/12/2025 00:30,4\n"
    monkeypatch.setattr(ingest, "CHUNK_ROWS", 2)
    with pytest.raises(InputError, match="row 4.*swapped"):
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(columns={"le": ("LE",)}, timestamp_format="%m/%d/%Y %H:%M"))


def test_scan_counts_fields_outside_quotes(tmp_path):
    """A quoted delimiter is not an extra field; an unquoted one is."""
    from pipeline.ingest import _scan_file

    path = write(tmp_path, 'A,B,C\n1,"x,y",3\n1,2,3,4\n')
    scan = _scan_file(path, ",", 3)
    assert scan.overfull_line == 3 and scan.overfull_fields == 4 and scan.n_lines == 3


def test_decimal_comma_in_comma_file_is_error(tmp_path):
    text = "TIMESTAMP,LE,T_AIR\n2025-06-01 12:00,101,5,20,5\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, text), make_stream())
    one_line_naming(str(info.value), "row 2", "5 fields", "decimal comma")


# ---------------------------------------------------------------------------------------
# fuzz: mangled files give our own clear errors or a result, never another exception
# ---------------------------------------------------------------------------------------
_BASE_LINES = ["TIMESTAMP,LE,T_AIR", *[f"2025-06-01 {h:02d}:{m:02d},{h * 10 + m / 30:.1f},{15 + h / 2:.2f}"
                                       for h in range(6) for m in (0, 30)]]
_CELLS = st.sampled_from(["", "NAN", "-9999", "1e400", "x", "24:00", "2025-06-01 24:00", "01/06/2025 00:00",
                          "2025-06-01 00:00:07", "2025-06-01 00:12", "\"q,q\"", ",", ";", "\t", "1,5", "  ",
                          "2025-13-01 00:00", "2025-06-01 00:30", "é", "\x00"])


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(edits=st.lists(st.tuples(st.integers(0, len(_BASE_LINES)), st.integers(0, 2), _CELLS,
                                st.sampled_from(["replace", "insert", "drop", "cut"])), max_size=6),
       marks=st.sampled_from(["start", "end"]))
def test_fuzzed_files_raise_only_input_errors(tmp_path, edits, marks):
    lines = [ln.split(",") for ln in _BASE_LINES]
    for row, col, cell, action in edits:
        row = min(row, len(lines) - 1)
        if action == "replace":
            lines[row][min(col, len(lines[row]) - 1)] = cell
        elif action == "insert":
            lines.insert(row, [cell, cell, cell])
        elif action == "drop" and len(lines) > 1:
            lines.pop(row)
        elif action == "cut":
            lines[row] = lines[row][:col + 1]
    path = tmp_path / "fuzz.csv"
    path.write_bytes("\n".join(",".join(c) for c in lines).encode("utf-8", errors="replace"))
    try:
        out, _ = read(path, make_stream(timestamp_marks=marks))
    except InputError as exc:
        assert "\n" not in str(exc) and "fuzz.csv" in str(exc)
        return
    assert out.raw.index.is_unique and out.raw.index.is_monotonic_increasing
    assert len(out.rows) == len(out.raw) and str(out.raw.index.tz) == "UTC"
    assert all(out.raw[c].dtype == np.float64 for c in ("LE", "T_AIR"))


def test_undeclared_decimal_comma_is_error(tmp_path):
    """A semicolon export with decimal commas and no input.decimal: error naming column and row."""
    text = "TIMESTAMP;LE;T_AIR\n2025-06-01 12:00;101,5;20,5\n2025-06-01 12:30;99;21,25\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, text), make_stream())
    one_line_naming(str(info.value), "invented_flux_2025w23.csv", "row 2", "column 'LE'", "decimal comma",
                    "input.decimal")


@settings(max_examples=40, deadline=None)
@given(values=st.lists(st.one_of(st.none(), st.floats(-50, 50, allow_nan=False)), min_size=3, max_size=60),
       sub=st.sampled_from([10, 15, 30]), site_minutes=st.sampled_from([30, 60]))
def test_aggregated_mean_and_sum_match_pandas_resample(values, sub, site_minutes):
    """Means need >= 2/3 of the sub-intervals, sums all of them (pandas resample as the oracle)."""
    if site_minutes % sub:
        return
    x = np.array([np.nan if v is None else v for v in values])
    met = make_stream(interval_minutes=sub, columns={"ta": ("T",), "precip": ("P",)})
    raw = raw_frame("2025-06-01 00:00", x.size, f"{sub}min", T=x, P=np.abs(x))
    frame, _, _, _ = build({"main": raw}, make_cfg([met], make_site(offset=0, interval=site_minutes)))
    n_sub = site_minutes // sub
    need = int(np.ceil(2 * n_sub / 3))
    series = pd.Series(x, index=raw.index)
    grouped = series.resample(f"{site_minutes}min")
    count = grouped.count()
    mean = grouped.mean().where(count >= need)  # pandas oracle + the documented 2/3 rule
    total = pd.Series(np.abs(x), index=raw.index).resample(f"{site_minutes}min").sum(min_count=1)
    full = pd.Series(np.ones(x.size), index=raw.index).resample(f"{site_minutes}min").sum()
    total = total.where((count == n_sub) & (full == n_sub))
    assert len(frame) == len(mean)
    assert_allclose(frame["ta"].to_numpy(), mean.to_numpy(), rtol=1e-12, atol=1e-12)
    assert_allclose(frame["precip"].to_numpy(), total.to_numpy(), rtol=1e-12, atol=1e-12)

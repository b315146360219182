"""Site history (CONTRACT §2 [[history]]): periods, corrections with provenance, clock
shifts, exclusions and the site parameters as time series.

Expected values follow from the definitions in CONTRACT §2 (an entry covers the intervals
whose start lies in [start, end), in local standard time; value * scale + offset) and
CONTRACT §4 (flag bit 64 = excluded by the site history). Invented site.
"""
from __future__ import annotations

import textwrap

import numpy as np
import pandas as pd
import pytest
from pandas.testing import assert_frame_equal

from pipeline import flags as F
from pipeline.config import HistoryEntry, SiteInfo, load_site_config
from pipeline.history import (
    apply_corrections,
    apply_exclusions,
    history_periods,
    period_mask,
    shift_minutes,
    site_parameters,
)

SITE = SiteInfo(id="invented-crop", name="Invented crop", latitude=40.0, longitude=-3.0,
                elevation_m=600.0, utc_offset_hours=1.0, canopy_height_m=0.1,
                measurement_height_m=3.0, irga="closed-path", interval_minutes=30)
TZ = SITE.tz


def local(text):
    return pd.Timestamp(text).tz_localize(TZ)


def entry(i, start, end, **kw):
    return HistoryEntry(index=i, start=local(start), end=local(end), **kw)


def utc_index(start_local, periods, freq="30min"):
    """UTC interval starts beginning at a local (UTC+1) time."""
    return pd.date_range(local(start_local).tz_convert("UTC"), periods=periods, freq=freq,
                         name="timestamp_start")


def test_period_is_half_open_in_local_standard_time():
    """[start, end): the interval starting at `start` is in, the one starting at `end` is out."""
    e = entry(0, "2025-06-03 10:00", "2025-06-03 11:00", exclude=("le",), reason="r")
    idx = utc_index("2025-06-03 09:30", 4)  # 09:30 10:00 10:30 11:00 local
    assert idx[1] == pd.Timestamp("2025-06-03 09:00", tz="UTC")  # 10:00 at UTC+1
    np.testing.assert_array_equal(period_mask(idx, e), [False, True, True, False])
    # the same instants at the site offset give the same answer
    np.testing.assert_array_equal(period_mask(idx.tz_convert(TZ), e), [False, True, True, False])


def test_period_mask_needs_tz():
    e = entry(0, "2025-06-03", "2025-06-04", exclude=("le",), reason="r")
    with pytest.raises(ValueError):
        period_mask(pd.date_range("2025-06-03", periods=3, freq="30min"), e)


def test_shift_minutes_per_variable():
    history = (
        entry(0, "2025-03-01 00:00", "2025-03-02 00:00", correct={"ta": {"shift_minutes": 60.0}}, reason="clock"),
        entry(1, "2025-03-01 12:00", "2025-03-03 00:00", correct={"le": {"scale": 2.0}}, reason="gain"),
    )
    idx = utc_index("2025-02-28 23:00", 6, freq="1h")  # 23:00 .. 04:00 local
    np.testing.assert_array_equal(shift_minutes(idx, history, "ta", SITE), [0, 60, 60, 60, 60, 60])
    np.testing.assert_array_equal(shift_minutes(idx, history, "le", SITE), np.zeros(6))
    assert shift_minutes(idx, history, "ta", SITE).dtype == np.float64
    assert shift_minutes(idx, (), "ta", SITE).sum() == 0


def test_apply_corrections_with_trace():
    idx = utc_index("2025-06-03 09:00", 6).tz_convert(TZ)  # working frame at site offset
    frame = pd.DataFrame({"g": [10.0, -20.0, 30.0, np.nan, 50.0, 60.0],
                          "rn": [100.0] * 6, "swc": [0.2] * 6}, index=idx)
    before = frame.copy()
    history = (
        entry(3, "2025-06-03 10:00", "2025-06-03 11:00", correct={"g": {"scale": -1.0}}, reason="plates reversed"),
        entry(5, "2025-06-03 11:00", "2025-06-03 12:00", correct={"g": {"scale": 2.0, "offset": 1.0}}, reason="gain"),
        entry(6, "2025-06-03 09:00", "2025-06-04 00:00", correct={"ta": {"offset": 1.0}}, reason="not in frame"),
        entry(7, "2025-06-03 09:00", "2025-06-04 00:00", correct={"rn": {"shift_minutes": 30.0}}, reason="clock"),
    )
    out, trace = apply_corrections(frame, history, SITE)
    assert_frame_equal(frame, before)  # input untouched
    # 09:00 09:30 | 10:00 10:30 (scale -1) | 11:00 11:30 (x*2+1)
    np.testing.assert_array_equal(out["g"].to_numpy(), [10.0, -20.0, -30.0, np.nan, 101.0, 121.0])
    assert_frame_equal(out[["rn", "swc"]], frame[["rn", "swc"]])  # shift-only and uncorrected untouched
    assert list(trace.columns) == ["g_history_entry"]  # ta not in frame; rn shift applied at ingest
    assert trace["g_history_entry"].dtype == np.int16
    np.testing.assert_array_equal(trace["g_history_entry"], [-1, -1, 3, 3, 5, 5])
    assert trace.index.equals(frame.index)


def test_corrections_from_a_config_file(tmp_path):
    """The CONTRACT §2 example entry: reversed plates → g multiplied by -1 in the period."""
    path = tmp_path / "site.toml"
    path.write_text(textwrap.dedent('''\
        [site]
        id = "invented-meadow"
        latitude = 46.5
        longitude = 7.9
        elevation_m = 820
        utc_offset_hours = 1
        canopy_height_m = 0.3
        measurement_height_m = 2.0
        [input]
        timestamp_column = "TIMESTAMP"
        timestamp_format = "%Y-%m-%d %H:%M"
        timestamp_marks = "end"
        interval_minutes = 30
        columns = { le = "LE", h = "H", rn = "RN", g = "G", ta = "TA", rh = "RH", wind = "WS", ustar = "US" }
        [[history]]
        start = "2025-06-03 10:00"
        end = "2025-06-20 14:30"
        correct = { g = { scale = -1.0 } }
        reason = "plates wired the wrong way round"
        '''))
    cfg = load_site_config(path)
    idx = pd.DatetimeIndex([local("2025-06-03 09:30"), local("2025-06-03 10:00"),
                            local("2025-06-20 14:00"), local("2025-06-20 14:30")])
    out, trace = apply_corrections(pd.DataFrame({"g": [5.0, 5.0, 5.0, 5.0]}, index=idx), cfg.history, cfg.site)
    np.testing.assert_array_equal(out["g"], [5.0, -5.0, -5.0, 5.0])
    np.testing.assert_array_equal(trace["g_history_entry"], [-1, 0, 0, -1])


def test_apply_exclusions_sets_bit_64_and_keeps_others():
    idx = utc_index("2025-07-01 08:00", 12)  # 08:00 .. 13:30 local
    flags = pd.DataFrame({"le": np.zeros(12, np.int32), "h": np.full(12, F.MISSING, np.int32),
                          "ta": np.zeros(12, np.int32)}, index=idx)
    before = flags.copy()
    history = (entry(2, "2025-07-01 09:00", "2025-07-01 13:00", exclude=("le", "h", "g"),
                     reason="site visit: analyser cleaned"),)
    out = apply_exclusions(flags, history)
    assert_frame_equal(flags, before)
    inside = np.r_[[False] * 2, [True] * 8, [False] * 2]
    np.testing.assert_array_equal(out["le"], np.where(inside, F.HISTORY, 0))
    np.testing.assert_array_equal(out["h"], np.where(inside, F.HISTORY | F.MISSING, F.MISSING))
    np.testing.assert_array_equal(out["ta"], 0)
    assert "g" not in out.columns
    assert all(out[c].dtype == np.int32 for c in out.columns)
    # applying twice changes nothing (OR)
    assert_frame_equal(apply_exclusions(out, history), out)


def test_site_parameters_as_time_series():
    """Defaults from [site], a growing canopy in steps, an analyser swap, irrigation."""
    idx = pd.date_range(local("2025-04-01"), local("2025-10-01"), freq="1D", inclusive="left")
    history = (
        entry(0, "2025-05-01", "2025-06-01", parameters={"canopy_height_m": 0.5}),
        entry(1, "2025-06-01", "2025-09-01", parameters={"canopy_height_m": 1.2, "measurement_height_m": 4.0}),
        entry(2, "2025-07-15", "2025-10-01", parameters={"irga": "open-path"}),
        entry(3, "2025-06-10", "2025-06-12", irrigation=True),
    )
    p = site_parameters(idx, SITE, history)
    assert list(p.columns) == ["canopy_height_m", "measurement_height_m", "irga", "irrigated"]
    assert p.index.equals(idx)
    at = lambda d: p.loc[local(d)]  # noqa: E731
    assert at("2025-04-15")["canopy_height_m"] == 0.1 and at("2025-04-15")["measurement_height_m"] == 3.0
    assert at("2025-05-15")["canopy_height_m"] == 0.5
    assert at("2025-07-01")["canopy_height_m"] == 1.2 and at("2025-07-01")["measurement_height_m"] == 4.0
    assert at("2025-09-15")["canopy_height_m"] == 0.1
    assert at("2025-07-14")["irga"] == "closed-path" and at("2025-07-15")["irga"] == "open-path"
    assert p["irrigated"].dtype == bool
    assert p["irrigated"].sum() == 2 and at("2025-06-10")["irrigated"] and at("2025-06-11")["irrigated"]
    assert p["canopy_height_m"].dtype == np.float64


def test_history_periods_table():
    history = (
        entry(1, "2025-06-03 10:00", "2025-06-20 14:30", correct={"g": {"scale": -1.0}}, reason="plates reversed"),
        entry(0, "2025-05-01", "2025-10-01", parameters={"canopy_height_m": 1.8}, irrigation=True),
        entry(2, "2025-07-01 09:00", "2025-07-01 13:00", exclude=("le", "h"), reason="site visit"),
    )
    t = history_periods(history)
    assert list(t.columns) == ["entry", "start", "end", "kind", "variables", "detail", "reason"]
    assert list(t["kind"]) == ["site parameters", "irrigation", "correction", "exclusion"]
    assert list(t["entry"]) == [0, 0, 1, 2]
    assert t.loc[2, "detail"] == "g: scale -1"
    assert t.loc[3, "variables"] == "le, h"
    assert t.loc[0, "detail"] == "canopy_height_m = 1.8"
    assert len(history_periods(())) == 0

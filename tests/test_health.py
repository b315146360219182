"""Weekly clock and sensor-health diagnostics on small invented series."""
from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd
import pytest

from pipeline import flags as flagbits
from pipeline import solar
from pipeline.config import SiteInfo
from pipeline.health import (
    assess_health,
    detect_clock_steps,
    longest_flat_run,
    offset_from_correlation,
)
from pipeline.rules import standard_rules

TZ = dt.timezone(dt.timedelta(hours=1))
LAT, LON = 47.0, 8.0  # an invented meadow
START = "2025-06-02"  # a Monday: ISO weeks 2025-W23, W24, ...


def _site(interval_minutes=30):
    return SiteInfo(id="invented-meadow", name="Invented meadow", latitude=LAT, longitude=LON,
                    elevation_m=600.0, utc_offset_hours=1.0, canopy_height_m=0.3,
                    measurement_height_m=2.0, interval_minutes=interval_minutes)


def _frame(weeks=3, shift_minutes=0.0, interval_minutes=30, clearness=0.75, cloudy_days=(), seed=0):
    """An invented station: clear-sky rg = clearness x interval-mean potential radiation
    (pipeline.solar) at the true times; the logger's stamps run ``shift_minutes`` ahead
    (a scalar or one value per interval). The other variables follow rg."""
    rng = np.random.default_rng(seed)
    interval = pd.Timedelta(minutes=interval_minutes)
    idx = pd.date_range(START, periods=weeks * 7 * 1440 // interval_minutes, freq=interval, tz=TZ,
                        name="timestamp_start")
    shift = pd.to_timedelta(np.broadcast_to(np.asarray(shift_minutes, dtype=float), (len(idx),)), unit="min")
    true_starts = pd.DatetimeIndex(idx - shift)
    rg = clearness * solar.interval_mean_potential_radiation(true_starts, interval, LAT, LON)
    day = ((idx.normalize() - idx.normalize()[0]) // pd.Timedelta(days=1)).to_numpy()
    for d in cloudy_days:  # broken cloud: rg cut to 30 % in random intervals
        m = day == d
        rg[m] *= rng.choice([1.0, 0.3], size=m.sum(), p=[0.6, 0.4])
    rn = 0.7 * rg - 60.0 + rng.normal(0, 2.0, len(idx))
    g = 0.1 * rn
    turb = 0.8 * (rn - g)
    le = 0.6 * turb
    h = 0.4 * turb
    hour = (idx.hour + idx.minute / 60.0).to_numpy()
    ta = 16.0 + 6.0 * np.sin(2 * np.pi * (hour - 9.0) / 24.0) + rng.normal(0, 0.2, len(idx))
    rh = np.clip(80.0 - 20.0 * np.sin(2 * np.pi * (hour - 9.0) / 24.0) + rng.normal(0, 1.0, len(idx)), 5, 98.5)
    frame = pd.DataFrame({"rg": rg, "sw_out": 0.2 * rg, "rn": rn, "g": g, "h": h, "le": le, "ta": ta, "rh": rh,
                          "precip": 0.0}, index=idx)
    flags = pd.DataFrame(0, index=idx, columns=frame.columns, dtype=flagbits.FLAG_DTYPE)
    return frame, flags


def _findings(result, check, severity=None):
    return [f for f in result.summary["health"]["findings"]
            if f["check"] == check and (severity is None or f["severity"] == severity)]


def _weekly_offsets(result):
    return [w["clock_offset_minutes"] for w in result.summary["health"]["weeks"]]


def test_correct_clock_gives_zero_offset_and_no_suspect_week():
    """An unshifted clear-sky series: offsets ~0, nothing suspect, only ok clock findings."""
    frame, flags = _frame(weeks=2)
    res = assess_health(frame, flags, _site(), standard_rules())
    assert np.allclose(_weekly_offsets(res), 0.0, atol=1.0)  # imposed: no shift
    assert res.summary["suspect_clock_weeks"] == []
    assert not res.columns["suspect_clock"].any()
    assert not _findings(res, "clock_offset", "act")
    json.dumps(res.summary, allow_nan=False)


@pytest.mark.parametrize("shift", [60.0, 20.0, -20.0])
def test_clock_offset_found_for_shifted_stamps(shift):
    """Stamps 1 h or 20 min ahead (or behind): the weekly offset equals the imposed shift."""
    frame, flags = _frame(weeks=2, shift_minutes=shift, cloudy_days=(1, 4, 9))
    res = assess_health(frame, flags, _site(), standard_rules())
    assert np.allclose(_weekly_offsets(res), shift, atol=1.0)  # imposed shift; 1 min = common practice tolerance
    assert res.summary["suspect_clock_weeks"] == ["2025-W23", "2025-W24"]
    assert res.columns["suspect_clock"].all()
    acts = _findings(res, "clock_offset", "act")
    assert len(acts) == 2 and ("ahead of" if shift > 0 else "behind") in acts[0]["message"]
    # the broken-cloud days are not used as clear days
    used = {o["date"] for o in res.summary["health"]["clock"]["daily_offsets"]}
    assert not used & {"2025-06-03", "2025-06-06", "2025-06-11"}


def test_clock_offset_hourly_site():
    """The same on a 60-minute site: a 20-min offset is found below the interval."""
    frame, flags = _frame(weeks=2, shift_minutes=20.0, interval_minutes=60)
    res = assess_health(frame, flags, _site(60), standard_rules())
    assert np.allclose(_weekly_offsets(res), 20.0, atol=1.5)  # imposed shift


def test_clock_step_found_mid_series():
    """A clock reset (+30 min) at a site visit on 2025-06-18 10:00 is found there."""
    frame, flags = _frame(weeks=4)
    shift = np.where(frame.index >= pd.Timestamp("2025-06-18 10:00", tz=TZ), 30.0, 0.0)
    frame, flags = _frame(weeks=4, shift_minutes=shift)
    res = assess_health(frame, flags, _site(), standard_rules())
    steps = res.summary["health"]["clock"]["steps"]
    assert len(steps) == 1
    assert steps[0]["after"] in ("2025-06-17", "2025-06-18") and steps[0]["before"] in ("2025-06-18", "2025-06-19")
    assert steps[0]["size_minutes"] == pytest.approx(30.0, abs=1.5)  # imposed step
    assert _findings(res, "clock_step", "act")[0]["week"] == "2025-W25"
    offsets = _weekly_offsets(res)
    assert offsets[0] == pytest.approx(0.0, abs=1.0) and offsets[1] == pytest.approx(0.0, abs=1.0)
    assert offsets[3] == pytest.approx(30.0, abs=1.0)
    assert res.summary["suspect_clock_weeks"][-1] == "2025-W26"
    assert "2025-W23" not in res.summary["suspect_clock_weeks"]


def test_clock_drift_found():
    """A clock gaining 1 min per day (7 min per week) is reported as drift."""
    frame, _ = _frame(weeks=3)
    days = (frame.index - frame.index[0]) / pd.Timedelta(days=1)
    frame, flags = _frame(weeks=3, shift_minutes=np.asarray(days, dtype=float) * 1.0)
    res = assess_health(frame, flags, _site(), standard_rules())
    drift = res.summary["health"]["clock"]["drift_minutes_per_week"]
    assert drift == pytest.approx(7.0, abs=0.5)  # imposed 1 min per day
    assert _findings(res, "clock_drift", "watch")


def test_offset_from_correlation_parabola():
    """The parabolic peak of a sampled parabola is exact (algebra)."""
    lags = np.arange(-30, 31, 5, dtype=float)
    corr = 1.0 - 0.001 * (lags - 7.3) ** 2
    off, peak = offset_from_correlation(lags, corr)
    assert off == pytest.approx(7.3, abs=1e-9)  # vertex of the imposed parabola
    off, _ = offset_from_correlation(lags, 1.0 - 0.001 * (lags - 40.0) ** 2)
    assert np.isnan(off)  # peak beyond the search range


def test_detect_clock_steps_ignores_one_odd_day():
    """One odd day is no step; a sustained jump is."""
    dates = [f"2025-06-{d:02d}" for d in range(1, 13)]
    x = np.zeros(12)
    x[5] = 40.0
    assert detect_clock_steps(dates, x, threshold=15.0, min_days=2) == []
    x = np.r_[np.zeros(6), np.full(6, -25.0)]
    steps = detect_clock_steps(dates, x, threshold=15.0, min_days=2)
    assert [(s["after"], s["before"]) for s in steps] == [("2025-06-06", "2025-06-07")]
    assert steps[0]["size_minutes"] == pytest.approx(-25.0)


def test_reversed_plate_found_by_sign_test():
    """G with its sign flipped for the second week: an 'act' midday_sign_g finding in that week only."""
    frame, flags = _frame(weeks=3)
    frame = frame.copy()
    wk2 = (frame.index >= pd.Timestamp("2025-06-09", tz=TZ)) & (frame.index < pd.Timestamp("2025-06-16", tz=TZ))
    frame.loc[wk2, "g"] *= -1.0
    res = assess_health(frame, flags, _site(), standard_rules())
    acts = _findings(res, "midday_sign_g", "act")
    assert [f["week"] for f in acts] == ["2025-W24"]
    assert "plates" in acts[0]["message"]
    assert [f["week"] for f in _findings(res, "midday_sign_g", "ok")] == ["2025-W23", "2025-W25"]


def test_negative_midday_rn_found():
    """Net radiometer reading the wrong way round: midday_sign_rn act."""
    frame, flags = _frame(weeks=1)
    frame = frame.assign(rn=-frame["rn"])
    res = assess_health(frame, flags, _site(), standard_rules())
    assert _findings(res, "midday_sign_rn", "act")


def test_rg_envelope_low_and_high():
    """A dirty dome (rg 60 % of clear sky for 3 weeks) and a wrong calibration (rg 1.6x clear sky)."""
    frame, flags = _frame(weeks=3, clearness=0.45)
    res = assess_health(frame, flags, _site(), standard_rules())
    acts = _findings(res, "rg_clear_sky", "act")
    assert [f["week"] for f in acts] == ["2025-W25"] and "clean" in acts[0]["message"]
    frame, flags = _frame(weeks=1, clearness=1.2)
    res = assess_health(frame, flags, _site(), standard_rules())
    assert "calibration" in _findings(res, "rg_clear_sky", "watch")[0]["message"]
    frame, flags = _frame(weeks=1)
    res = assess_health(frame, flags, _site(), standard_rules())
    assert [f["severity"] for f in _findings(res, "rg_clear_sky")] == ["ok"]


def test_night_rh_maxima():
    """Night RH topping at 80 % in a rainy week -> act; above 103 % -> act; ~98 % -> ok."""
    frame, flags = _frame(weeks=3)
    frame = frame.copy()
    wk1 = frame.index < pd.Timestamp("2025-06-09", tz=TZ)
    wk3 = frame.index >= pd.Timestamp("2025-06-16", tz=TZ)
    frame.loc[wk1, "rh"] = np.minimum(frame.loc[wk1, "rh"], 80.0)
    frame.loc[wk1 & (frame.index.hour == 3), "precip"] = 2.0
    frame.loc[wk3, "rh"] = frame.loc[wk3, "rh"] + 8.0
    res = assess_health(frame, flags, _site(), standard_rules())
    sev = {f["week"]: f["severity"] for f in _findings(res, "night_rh_max")}
    assert sev == {"2025-W23": "act", "2025-W24": "ok", "2025-W25": "act"}


def test_albedo_jump_found():
    """sw_out/rg jumps from 0.20 to 0.35 on 2025-06-12."""
    frame, flags = _frame(weeks=2)
    frame = frame.copy()
    after = frame.index >= pd.Timestamp("2025-06-12", tz=TZ)
    frame.loc[after, "sw_out"] = 0.35 * frame.loc[after, "rg"]
    res = assess_health(frame, flags, _site(), standard_rules())
    jumps = res.summary["health"]["albedo_jumps"]
    assert jumps[0]["date"] == "2025-06-12"
    assert jumps[0]["albedo"] == pytest.approx(0.35, abs=1e-6)  # imposed
    assert jumps[0]["previous"] == pytest.approx(0.20, abs=1e-6)  # imposed
    assert _findings(res, "albedo_jump", "watch")[0]["week"] == "2025-W24"


def test_flat_line_found():
    """ta stuck for 30 h -> act; 4 h -> watch; a noisy series -> nothing."""
    assert longest_flat_run(np.array([1.0, 2.0, 2.0, 2.0, np.nan, 2.0, 3.0])) == 3
    frame, flags = _frame(weeks=2)
    frame = frame.copy()
    frame.iloc[100:160, frame.columns.get_loc("ta")] = 12.3  # 30 h
    frame.iloc[500:508, frame.columns.get_loc("ta")] = 14.0  # 4 h
    res = assess_health(frame, flags, _site(), standard_rules())
    got = [(f["week"], f["severity"]) for f in _findings(res, "flat_line") if f["message"].startswith("ta ")]
    assert got == [("2025-W23", "act"), ("2025-W24", "watch")]
    # nothing else repeats (rh near saturation is exempt)
    assert {f["message"].split()[0] for f in _findings(res, "flat_line")} == {"ta"}


def test_closure_drift_found():
    """LE losing 10 % per week (a dirty analyser window): weekly EBR falls, drift reported."""
    frame, flags = _frame(weeks=6)
    frame = frame.copy()
    wk = ((frame.index - frame.index[0]) // pd.Timedelta(days=7)).to_numpy()
    frame["le"] = frame["le"] * (1.0 - 0.1 * wk)
    res = assess_health(frame, flags, _site(), standard_rules())
    ebr = [w["ebr"] for w in res.summary["health"]["weeks"]]
    assert ebr[0] == pytest.approx(0.8, abs=1e-6)  # imposed: H + LE = 0.8 (Rn - G)
    assert np.all(np.diff(ebr) < 0)
    assert _findings(res, "closure_drift", "watch")
    assert _findings(res, "closure", "watch")  # the late weeks fall below 0.6


def test_days_since_last_data():
    """LE missing for the last 3 days -> watch; 10 days later -> act."""
    frame, flags = _frame(weeks=2)
    flags = flags.copy()
    last3 = frame.index >= frame.index[-1] - pd.Timedelta(days=3) + pd.Timedelta(minutes=30)
    flags.loc[last3, "le"] = flagbits.MISSING
    res = assess_health(frame, flags, _site(), standard_rules())
    assert res.summary["health"]["days_since_last_data"]["le"] == pytest.approx(3.0)
    assert res.summary["health"]["days_since_last_data"]["h"] == pytest.approx(0.0)
    f = _findings(res, "days_since_last_data")
    assert [(x["severity"], x["message"].split()[2]) for x in f] == [("watch", "le")]
    later = frame.index[-1] + pd.Timedelta(days=7)
    res = assess_health(frame, flags, _site(), standard_rules(), now=later)
    sev = {x["message"].split()[2]: x["severity"] for x in _findings(res, "days_since_last_data")}
    assert sev["le"] == "act" and sev["h"] == "watch"


def test_no_rg_uses_rn_for_the_clock():
    """Without rg the clock check runs on rn."""
    frame, flags = _frame(weeks=2, shift_minutes=60.0)
    frame, flags = frame.drop(columns=["rg", "sw_out"]), flags.drop(columns=["rg", "sw_out"])
    res = assess_health(frame, flags, _site(), standard_rules())
    assert res.summary["health"]["radiation_for_clock"] == "rn"
    assert np.allclose(_weekly_offsets(res), 60.0, atol=1.0)  # imposed shift
    json.dumps(res.summary, allow_nan=False)


def test_iso_week_matches_pandas_isocalendar():
    """ISO week labels against pandas' isocalendar (the oracle), over three decades of days,
    year ends with week 53 and week 1 in the old year included."""
    from pipeline.health import _iso_week

    days = pd.date_range("1999-12-20", "2031-01-10", freq="D")
    iso = days.isocalendar()
    expected = [f"{y}-W{w:02d}" for y, w in zip(iso["year"], iso["week"])]
    assert list(_iso_week(days)) == expected
    aware = pd.date_range("2020-12-31", periods=3, freq="D", tz=TZ)
    assert list(_iso_week(aware)) == ["2020-W53", "2020-W53", "2020-W53"]  # 2021-01-01..03: week 53 of 2020
    assert _iso_week(pd.DatetimeIndex([])).shape == (0,)


def test_weekly_helpers_match_their_one_week_forms():
    """The all-weeks-at-once flat-line runs, medians and clock offsets equal the one-week
    (or one-day) computations: longest_flat_run, numpy.median, offset_from_correlation
    (regression against the scalar forms)."""
    from pipeline.health import _offsets_from_correlation, _weekly_longest_flat_run, _weekly_median

    rng = np.random.default_rng(4)
    n, n_weeks = 2000, 6
    week = np.sort(rng.integers(0, n_weeks, n))
    x = np.round(rng.normal(size=n), 1)  # repeats
    x[rng.random(n) < 0.1] = np.nan
    x[300:340] = 2.5  # a long flat line
    runs = _weekly_longest_flat_run(x, week, n_weeks)
    assert list(runs) == [longest_flat_run(x[week == k]) for k in range(n_weeks)]
    use = np.isfinite(x) & (rng.random(n) < 0.5)
    med = _weekly_median(x, use, week, n_weeks, 4)
    for k in range(n_weeks):
        vals = x[use & (week == k)]
        assert med[k] == (float(np.median(vals)) if vals.size >= 4 else None)
    lags = np.arange(-6, 7) * 5.0
    corr = rng.uniform(0.5, 1.0, (8, lags.size))
    corr[1, 0] = 2.0  # maximum at the edge
    corr[2] = np.nan  # all missing
    corr[3, 5] = 1.5
    corr[3, 6] = np.nan  # a missing neighbour of the maximum
    offsets, peaks = _offsets_from_correlation(lags, corr)
    for j in range(corr.shape[0]):
        off, peak = offset_from_correlation(lags, corr[j])
        np.testing.assert_array_equal([offsets[j], peaks[j]], [off, peak])

"""The QC stage (pipeline.qc.run_qc) on an invented meadow site.

Every series here is invented: clear-sky radiation from pipeline.solar scaled by a cloud
factor, a smooth diurnal course for temperature, humidity and the fluxes, plus noise.
"""
from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest

from pipeline import flags as fb
from pipeline import solar
from pipeline.config import SiteInfo
from pipeline.errors import RuleError, TowerflowWarning
from pipeline.qc import (QCResult, flat_line, in_sectors, run_qc, step_outliers,
                         ustar_thresholds, wetting)
from pipeline.rules import load_rules, merge_rules

SITE = SiteInfo(id="invented-meadow", name="Invented meadow", latitude=47.3, longitude=8.1,
                elevation_m=500.0, utc_offset_hours=1.0, canopy_height_m=0.3,
                measurement_height_m=2.0, irga="open-path", interval_minutes=30)


def site_with(**kw) -> SiteInfo:
    from dataclasses import replace

    return replace(SITE, **kw)


def invented_site(days=14, minutes=30, seed=0, start="2025-06-01", site=SITE, precip=True):
    """An invented working frame and flags (all values accepted) for ``site``."""
    rng = np.random.default_rng(seed)
    idx = pd.date_range(start, periods=days * 24 * 60 // minutes, freq=f"{minutes}min",
                        tz=site.tz, name="timestamp_start")
    n = idx.size
    potential = solar.interval_mean_potential_radiation(idx, pd.Timedelta(minutes=minutes),
                                                        site.latitude, site.longitude)
    clear = solar.clear_sky_radiation(potential, site.elevation_m)
    rg = 0.8 * clear
    hour = (idx.hour + idx.minute / 60.0).to_numpy()
    course = np.sin(np.pi * (hour - 6.0) / 12.0).clip(0.0, None)
    ta = 15.0 + 8.0 * np.sin(2 * np.pi * (hour - 9.0) / 24.0) + rng.normal(0, 0.2, n)
    rh = 70.0 - 25.0 * np.sin(2 * np.pi * (hour - 9.0) / 24.0) + rng.normal(0, 1.0, n)
    frame = pd.DataFrame({
        "le": 0.45 * rg + rng.normal(0, 10, n),
        "h": 0.25 * rg - 10 + rng.normal(0, 8, n),
        "rn": 0.7 * rg - 40 + rng.normal(0, 5, n),
        "rg": rg,
        "sw_out": 0.2 * rg,
        "ta": ta,
        "rh": rh,
        "vpd": 1.0 + course + rng.normal(0, 0.05, n),
        "wind": 2.5 + rng.gamma(2.0, 0.5, n),
        "wind_dir": rng.uniform(0, 360, n),
        "ustar": 0.3 + 0.2 * course + rng.gamma(2.0, 0.03, n),
        "t_soil": 14.0 + 2.0 * np.sin(2 * np.pi * (hour - 12.0) / 24.0),
        "fc": -15.0 * course + 4.0 + rng.normal(0, 1.5, n),
        "canopy_height_m": 0.3,
        "measurement_height_m": 2.0,
        "irga": site.irga,
        "irrigated": False,
    }, index=idx)
    if precip:
        frame["precip"] = 0.0
    variables = [c for c in frame.columns if c not in ("canopy_height_m", "measurement_height_m",
                                                        "irga", "irrigated")]
    flags = pd.DataFrame({v: np.zeros(n, dtype=fb.FLAG_DTYPE) for v in variables}, index=idx)
    return frame, flags


def at(frame, day, hour, minute=0):
    """Position of the interval starting at ``day`` (day of month) ``hour:minute``."""
    idx = frame.index
    return int(np.flatnonzero((idx.day == day) & (idx.hour == hour) & (idx.minute == minute))[0])


def rules_with(override: dict) -> dict:
    return merge_rules(load_rules("standard"), override)


@pytest.fixture(scope="module")
def clean():
    frame, flags = invented_site()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = run_qc(frame, flags, SITE, load_rules("standard"))
    return frame, flags, result


def test_returns_new_objects_helper_columns_and_serialisable_summary(clean):
    """Inputs untouched; is_day, snow_or_frozen, ustar_below_threshold, rain_wetted boolean; summary JSON."""
    frame, flags, result = clean
    before_frame, before_flags = invented_site()
    pd.testing.assert_frame_equal(frame, before_frame)
    pd.testing.assert_frame_equal(flags, before_flags)
    assert isinstance(result, QCResult)
    assert result.frame is not frame and result.flags is not flags
    for col in ("is_day", "snow_or_frozen", "ustar_below_threshold", "rain_wetted"):
        assert result.frame[col].dtype == bool
    json.dumps(result.summary)
    assert result.summary["ustar_threshold"] == {"value": 0.1, "source": "common practice",
                                                 "monthly": None, "apply_to": ["fc"]}  # standard.toml
    assert set(result.summary["spikes"]) == {"le", "h", "fc"}
    assert result.summary["rejected"]["le"]["spike"] == result.summary["spikes"]["le"]
    assert result.warnings == []


def test_clean_invented_data_is_almost_all_accepted(clean):
    """On clean invented data the met tests flag nothing and despiking < 1 % (issue 4 false-flag bound)."""
    _, _, result = clean
    for var in ("rg", "sw_out", "ta", "rh", "vpd", "wind", "t_soil", "precip"):
        assert (result.flags[var] == 0).all(), var
    for var in ("le", "h"):
        assert (result.flags[var] != 0).mean() <= 0.01


def test_is_day_follows_rg_and_falls_back_on_solar_geometry():
    """Day where accepted rg >= 20 W m-2 (Papale et al. 2006); without rg from clear-sky radiation."""
    frame, flags = invented_site(days=3)
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert (result.frame["is_day"] == (frame["rg"] >= 20.0)).all()
    no_rg = frame.drop(columns=["rg", "sw_out"])
    result2 = run_qc(no_rg, flags.drop(columns=["rg", "sw_out"]), SITE, load_rules("standard"))
    noon, midnight = at(frame, 2, 12), at(frame, 2, 0)
    assert result2.frame["is_day"].iloc[noon] and not result2.frame["is_day"].iloc[midnight]


def test_range_flag():
    """A value outside [min, max] of the rule set gets bit 2, the others do not."""
    frame, flags = invented_site(days=2)
    i = at(frame, 1, 15)
    frame.iloc[i, frame.columns.get_loc("ta")] = 80.0  # above standard max 55 degC
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert result.flags["ta"].iloc[i] & fb.RANGE
    assert (np.delete(result.flags["ta"].to_numpy() & fb.RANGE, i) == 0).all()


def test_cloud_edges_in_rg_are_not_flagged():
    """Abrupt cloud edges (clear → 25 % → clear) leave rg, rn and le unflagged by the met tests."""
    frame, flags = invented_site(days=14, seed=3)
    potential = solar.interval_mean_potential_radiation(frame.index, "30min", SITE.latitude, SITE.longitude)
    clear = solar.clear_sky_radiation(potential, SITE.elevation_m)
    cloud = np.ones(len(frame))
    hours = frame.index.hour.to_numpy()
    days = frame.index.day.to_numpy()
    # broken clouds on day 5: alternating every hour between full sun and deep shade
    cloud[(days == 5) & (hours >= 9) & (hours < 16) & (hours % 2 == 0)] = 0.25
    # a front on day 8: clear morning, overcast from 11:00
    cloud[(days == 8) & (hours >= 11)] = 0.2
    frame["rg"] = clear * cloud
    frame["sw_out"] = 0.2 * frame["rg"]
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert (result.flags["rg"] == 0).all()
    assert (result.flags["sw_out"] == 0).all()


def test_rg_above_clear_sky_envelope_is_flagged():
    """rg far above the clear-sky envelope (Allen 1996) gets bit 128, e.g. a midnight reading of 300 W m-2."""
    frame, flags = invented_site(days=2)
    i = at(frame, 1, 23)
    frame.iloc[i, frame.columns.get_loc("rg")] = 300.0
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert result.flags["rg"].iloc[i] & fb.CONSISTENCY


def test_flat_line_detected_but_not_legitimate_constants():
    """ta stuck for 5 h gets bit 256 over the run; rg = 0 at night and precip = 0 (no test) do not."""
    frame, flags = invented_site(days=4)
    i = at(frame, 2, 10)
    col = frame.columns.get_loc("ta")
    frame.iloc[i:i + 10, col] = 17.3  # 10 half-hours = 5 h > standard 4 h
    j = at(frame, 3, 10)
    frame.iloc[j:j + 6, col] = 18.1  # 3 h: allowed
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    stuck = (result.flags["ta"].to_numpy() & fb.FLAT_LINE) != 0
    assert np.flatnonzero(stuck).tolist() == list(range(i, i + 10))
    assert ((result.flags["rg"].to_numpy() & fb.FLAT_LINE) == 0).all()  # long zero nights
    assert ((result.flags["precip"].to_numpy() & fb.FLAT_LINE) == 0).all()  # dry fortnight


def test_flat_line_function_respects_time_span_and_gaps():
    """Runs of at least min_run identical values; a gap ends a run; allowed values pass."""
    x = np.array([1, 2, 2, 2, np.nan, 2, 2, 0, 0, 0, 0], dtype=float)
    assert flat_line(x, 3).tolist() == [False, True, True, True, False, False, False,
                                        True, True, True, True]
    assert not flat_line(x, 3, allowed=[0.0])[7:].any()


def test_night_rg_offset_set_to_zero_not_rejected():
    """Small night-time pyranometer readings (|rg| <= 10 W m-2, Dutton et al. 2001 offsets) become 0, unflagged."""
    frame, flags = invented_site(days=2)
    night = at(frame, 1, 1)
    frame.iloc[night, frame.columns.get_loc("rg")] = -3.5
    frame.iloc[night + 1, frame.columns.get_loc("rg")] = 2.0
    frame.iloc[night + 2, frame.columns.get_loc("rg")] = -40.0  # not an offset: out of range
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert result.frame["rg"].iloc[night] == 0.0 and result.frame["rg"].iloc[night + 1] == 0.0
    assert result.flags["rg"].iloc[night] == 0 and result.flags["rg"].iloc[night + 1] == 0
    assert result.flags["rg"].iloc[night + 2] & fb.RANGE
    assert result.summary["qc"]["rg_offsets_zeroed"] == 2
    assert frame["rg"].iloc[night] == -3.5  # input untouched


@pytest.mark.parametrize("accepted_up_to, flagged", [(103.0, [False, True]), (100.0, [True, True]),
                                                      (110.0, [False, False])])
def test_rh_above_100_clipped(accepted_up_to, flagged):
    """rh in (100, 110] → 100; bit 128 above [met] rh_clip_accepted_up_to; above 110 → bit 2, not clipped."""
    frame, flags = invented_site(days=2)
    i = at(frame, 1, 4)
    col = frame.columns.get_loc("rh")
    frame.iloc[i, col] = 102.0
    frame.iloc[i + 1, col] = 106.0
    frame.iloc[i + 2, col] = 115.0
    result = run_qc(frame, flags, SITE, rules_with({"met": {"rh_clip_accepted_up_to": accepted_up_to}}))
    assert result.frame["rh"].iloc[i] == 100.0 and result.frame["rh"].iloc[i + 1] == 100.0
    assert [bool(result.flags["rh"].iloc[k] == fb.CONSISTENCY) for k in (i, i + 1)] == flagged
    assert [bool(result.flags["rh"].iloc[k] == 0) for k in (i, i + 1)] == [not f for f in flagged]
    assert result.frame["rh"].iloc[i + 2] == 115.0
    assert result.flags["rh"].iloc[i + 2] & fb.RANGE
    assert result.summary["qc"]["rh_clipped"] == 2


def test_negative_vpd_set_to_zero():
    """vpd in [-0.5, 0) → 0 and accepted; below the range minimum → bit 2."""
    frame, flags = invented_site(days=2)
    i = at(frame, 1, 4)
    col = frame.columns.get_loc("vpd")
    frame.iloc[i, col] = -0.2
    frame.iloc[i + 1, col] = -1.0
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert result.frame["vpd"].iloc[i] == 0.0 and result.flags["vpd"].iloc[i] == 0
    assert result.flags["vpd"].iloc[i + 1] & fb.RANGE
    assert (result.frame["vpd"] >= 0.0).sum() == len(frame) - 1


def test_step_test_flags_the_outlier_only():
    """A single ta outlier flags one value (bit 128); a lasting jump flags the first value after it."""
    x = np.array([10.0, 10.2, 25.0, 10.4, 10.5, 10.4, 20.0, 20.1, 20.0])
    assert np.flatnonzero(step_outliers(x, 6.0)).tolist() == [2, 6]


def test_step_limit_scales_with_the_interval():
    """A 9 degC change between intervals is a step at a 30-min site but not at a 60-min site (limit 6 degC per 30 min)."""
    for minutes, expected in ((30, True), (60, False)):
        site = site_with(interval_minutes=minutes)
        frame, flags = invented_site(days=3, minutes=minutes, site=site)
        i = at(frame, 2, 14)
        frame.iloc[i, frame.columns.get_loc("ta")] += 9.0
        result = run_qc(frame, flags, site, load_rules("standard"))
        assert bool(result.flags["ta"].iloc[i] & fb.CONSISTENCY) is expected, minutes
        assert not (result.flags["ta"].iloc[i + 1] & fb.CONSISTENCY)


def test_consistency_sw_out_above_rg_and_longwave_limits():
    """sw_out > rg + 10, and lw_in / lw_out far from sigma*Ta^4, get bit 128."""
    frame, flags = invented_site(days=2)
    frame["lw_in"] = 330.0 + np.random.default_rng(1).normal(0, 3, len(frame))
    frame["lw_out"] = 5.670374419e-8 * (frame["ta"] + 273.15) ** 4  # CODATA sigma: ratio 1
    flags["lw_in"] = 0
    flags["lw_out"] = 0
    i = at(frame, 1, 12)
    frame.iloc[i, frame.columns.get_loc("sw_out")] = frame["rg"].iloc[i] + 50.0
    frame.iloc[i, frame.columns.get_loc("lw_in")] = 590.0  # in range, but ratio > 1.1 at ~20 degC
    frame.iloc[i, frame.columns.get_loc("lw_out")] = 200.0  # in range, ratio < 0.7
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    for var in ("sw_out", "lw_in", "lw_out"):
        assert result.flags[var].iloc[i] & fb.CONSISTENCY, var
        assert (np.delete(result.flags[var].to_numpy(), i) == 0).all(), var


def test_despiking_in_run_qc_flags_the_spike_and_counts_it():
    """An LE spike gets bit 4 (only it); a range-rejected value is not despiked again."""
    frame, flags = invented_site(days=14, seed=5)
    i = at(frame, 6, 11)
    j = at(frame, 9, 2)
    col = frame.columns.get_loc("le")
    frame.iloc[i, col] += 300.0
    frame.iloc[j, col] = 5000.0
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    spikes = np.flatnonzero(result.flags["le"].to_numpy() & fb.SPIKE)
    assert i in spikes and j not in spikes
    assert i - 1 not in spikes and i + 1 not in spikes
    assert result.flags["le"].iloc[j] & fb.RANGE
    assert result.summary["spikes"]["le"] == len(spikes)


def test_wet_sensor_open_versus_closed_path():
    """Open-path LE/fc rejected in rain and 2 h after; closed-path not; H only in heavy rain (bit 16)."""
    results = {}
    for irga in ("open-path", "closed-path"):
        site = site_with(irga=irga)
        frame, flags = invented_site(days=3, site=site)
        i = at(frame, 2, 10)
        frame.iloc[i, frame.columns.get_loc("precip")] = 0.4  # light rain (0.8 mm h-1)
        k = at(frame, 2, 20)
        frame.iloc[k, frame.columns.get_loc("precip")] = 6.0  # heavy rain (12 mm h-1)
        results[irga] = (i, k, run_qc(frame, flags, site, load_rules("standard")))
    i, k, open_r = results["open-path"]
    wet_le = (open_r.flags["le"].to_numpy() & fb.WET) != 0
    # rain at 10:00-10:30, then 2 h: 10:30 .. 12:00 start → 5 intervals in all
    assert wet_le[i:i + 5].all() and not wet_le[i + 5] and not wet_le[i - 1]
    assert (open_r.flags["fc"].to_numpy()[i:i + 5] & fb.WET).all()
    assert not (open_r.flags["h"].iloc[i] & fb.WET)
    assert open_r.frame["rain_wetted"].iloc[i:i + 5].all()
    _, _, closed_r = results["closed-path"]
    assert not (closed_r.flags["le"].iloc[i] & fb.WET)
    assert closed_r.frame["rain_wetted"].iloc[i]  # the canopy is wet whatever the analyser
    for r in (open_r, closed_r):
        for var in ("h", "ustar", "le"):
            assert r.flags[var].iloc[k] & fb.WET, var


def test_irrigation_counts_as_wetting():
    """An irrigated interval (frame column `irrigated`) wets an open-path analyser like rain."""
    frame, flags = invented_site(days=2)
    i = at(frame, 1, 6)
    frame.iloc[i, frame.columns.get_loc("irrigated")] = True
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert result.flags["le"].iloc[i] & fb.WET and result.frame["rain_wetted"].iloc[i]


def test_missing_precip_warns_once():
    """Without precip one TowerflowWarning, and the same one line in result.warnings."""
    frame, flags = invented_site(days=2, precip=False)
    with pytest.warns(TowerflowWarning) as record:
        result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert len([w for w in record if issubclass(w.category, TowerflowWarning)]) == 1
    assert len(result.warnings) == 1 and "precipitation" in result.warnings[0]


def test_wetting_function_reach():
    """Wet from the rainy interval through dry_after after its end."""
    idx = pd.date_range("2025-01-01", periods=10, freq="30min", tz=SITE.tz)
    precip = np.zeros(10)
    precip[2] = 1.0
    now, wetted = wetting(idx, pd.Timedelta("30min"), precip, np.zeros(10, bool), 0.0, pd.Timedelta("1 h"))
    assert now.tolist() == [i == 2 for i in range(10)]
    assert np.flatnonzero(wetted).tolist() == [2, 3, 4]


def test_sectors_wrap_through_north():
    """[340, 20] excludes 350 and 10 degrees but not 30 or 330 (bit 512 on le, h, fc, ustar)."""
    assert in_sectors([350.0, 10.0, 30.0, 330.0, 340.0, 20.0, np.nan], [[340.0, 20.0]]).tolist() == [
        True, True, False, False, True, True, False]
    frame, flags = invented_site(days=1)
    frame["wind_dir"] = np.resize([350.0, 10.0, 30.0, 330.0], len(frame))
    result = run_qc(frame, flags, SITE, rules_with({"sectors": {"exclude": [[340.0, 20.0]]}}))
    for var in ("le", "h", "fc", "ustar"):
        excluded = (result.flags[var].to_numpy() & fb.SECTOR) != 0
        assert excluded.tolist() == np.resize([True, True, False, False], len(frame)).tolist()
    assert ((result.flags["rn"].to_numpy() & fb.SECTOR) == 0).all()


def test_snow_by_albedo_and_frozen_soil():
    """A day with albedo 0.7 (> 0.45) and a frozen-soil interval set snow_or_frozen; by default bit 1024
    goes on g only (plates in freezing soil), and on the fluxes when a site asks for it."""
    frame, flags = invented_site(days=3)
    day2 = frame.index.day == 2
    frame.loc[day2, "sw_out"] = 0.7 * frame.loc[day2, "rg"]
    hour = (frame.index.hour + frame.index.minute / 60.0).to_numpy()
    frame["t_soil"] = 0.5 + 1.5 * np.sin(2 * np.pi * (hour - 12.0) / 24.0)  # freezes at night
    frozen = frame["t_soil"].to_numpy() <= 0.0  # standard t_soil_at_or_below = 0 degC
    assert frozen.any() and not frozen.all()
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    snow = result.frame["snow_or_frozen"].to_numpy()
    assert snow.tolist() == (day2 | frozen).tolist()
    if "g" in result.flags:
        assert ((result.flags["g"].to_numpy() & fb.SNOW) != 0).tolist() == snow.tolist()
    for var in ("le", "h", "fc", "rn"):
        assert ((result.flags[var].to_numpy() & fb.SNOW) == 0).all()
    flux_rules = rules_with({"snow": {"apply_to": ["le", "h", "fc"]}})
    result = run_qc(frame, flags, SITE, flux_rules)
    for var in ("le", "h", "fc"):
        assert ((result.flags[var].to_numpy() & fb.SNOW) != 0).tolist() == snow.tolist()


def test_low_turbulence_column_and_flag():
    """u* below 0.1 m s-1: column true day and night; by default only night-time fc gets bit 32."""
    frame, flags = invented_site(days=2)
    night, noon = at(frame, 1, 2), at(frame, 1, 12)
    frame.iloc[[night, noon], frame.columns.get_loc("ustar")] = 0.05
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    assert np.flatnonzero(result.frame["ustar_below_threshold"]).tolist() == [night, noon]
    assert np.flatnonzero(result.flags["fc"].to_numpy() & fb.LOW_TURBULENCE).tolist() == [night]
    assert not (result.flags["le"].to_numpy() & fb.LOW_TURBULENCE).any()
    assert not (result.flags["h"].to_numpy() & fb.LOW_TURBULENCE).any()
    r2 = run_qc(frame, flags, SITE, rules_with({"ustar": {"apply_to": ["fc", "le"], "night_only": False}}))
    assert np.flatnonzero(r2.flags["le"].to_numpy() & fb.LOW_TURBULENCE).tolist() == [night, noon]


def test_monthly_ustar_thresholds_and_provenance():
    """Monthly thresholds (January first) replace the single one; the provenance string is carried."""
    idx = pd.DatetimeIndex(["2025-01-15 12:00", "2025-07-15 12:00"]).tz_localize(SITE.tz)
    monthly = [0.2] * 6 + [0.05] * 6
    assert ustar_thresholds(idx, 0.1, monthly).tolist() == [0.2, 0.05]
    assert ustar_thresholds(idx, 0.1).tolist() == [0.1, 0.1]
    frame, flags = invented_site(days=1)
    frame["ustar"] = 0.15 + np.random.default_rng(2).uniform(-0.03, 0.03, len(frame))
    r = run_qc(frame, flags, SITE, rules_with({"ustar": {"monthly": [0.2] * 12, "source": "invented site study"}}))
    assert r.frame["ustar_below_threshold"].all()
    assert r.summary["ustar_threshold"]["source"] == "invented site study"
    with pytest.raises(RuleError, match="ustar.monthly"):
        run_qc(frame, flags, SITE, rules_with({"ustar": {"monthly": [0.2] * 5}}))


def test_site_override_beats_standard():
    """A site's [qc.override] (load_rules site_overrides) wins over the standard (rule precedence)."""
    frame, flags = invented_site(days=2)
    i = at(frame, 1, 15)
    frame.iloc[i, frame.columns.get_loc("ta")] = 50.0  # inside the standard range [-50, 55]
    standard = run_qc(frame, flags, SITE, load_rules("standard"))
    assert not standard.flags["ta"].iloc[i] & fb.RANGE
    strict = load_rules("standard", site_overrides={"variables": {"ta": {"range": [-45.0, 45.0]}}},
                        site_file="sites/invented-meadow.toml")
    assert strict["variables"]["ta"]["range"] == [-45.0, 45.0]
    assert run_qc(frame, flags, SITE, strict).flags["ta"].iloc[i] & fb.RANGE


def test_instrument_passthrough_rejection():
    """An enabled [instrument.<column>] rule rejects le and fc (bit 8) where the passthrough is below the limit."""
    frame, flags = invented_site(days=1)
    frame["signal_strength"] = 90.0
    frame.iloc[5, frame.columns.get_loc("signal_strength")] = 40.0
    off = run_qc(frame, flags, SITE, load_rules("standard"))
    assert not (off.flags["le"].to_numpy() & fb.INSTRUMENT).any()
    on = run_qc(frame, flags, SITE, rules_with({"instrument": {"signal_strength": {"enabled": True, "below": 70.0}}}))
    for var in ("le", "fc"):
        assert np.flatnonzero(on.flags[var].to_numpy() & fb.INSTRUMENT).tolist() == [5]
    assert not (on.flags["h"].to_numpy() & fb.INSTRUMENT).any()


def test_never_clears_bits_and_marks_unflagged_missing():
    """Bits set upstream stay; a NaN without any bit gets MISSING (1)."""
    frame, flags = invented_site(days=1)
    flags.iloc[3, flags.columns.get_loc("le")] = fb.HISTORY
    frame.iloc[7, frame.columns.get_loc("h")] = np.nan
    r = run_qc(frame, flags, SITE, load_rules("standard"))
    assert r.flags["le"].iloc[3] & fb.HISTORY
    assert r.flags["h"].iloc[7] & fb.MISSING
    assert (r.flags.to_numpy() >= flags.reindex(columns=r.flags.columns).to_numpy()).all()


def test_dead_pyranometer_reading_zero_by_day_is_a_flat_line():
    """rg = 0 for a whole day is a flat line (bit 256) in daylight, not at night."""
    frame, flags = invented_site(days=3)
    day2 = frame.index.day == 2
    frame.loc[day2, "rg"] = 0.0
    result = run_qc(frame, flags, SITE, load_rules("standard"))
    stuck = (result.flags["rg"].to_numpy() & fb.FLAT_LINE) != 0
    noon, midnight = at(frame, 2, 12), at(frame, 2, 0)
    assert stuck[noon] and not stuck[midnight]
    assert not stuck[~day2].any()
    # the day/night split then falls back on solar geometry for those intervals
    assert result.frame["is_day"].iloc[noon]


@pytest.mark.parametrize("start", ["2025-06-10", "2025-12-10"])
def test_high_latitude_polar_day_and_night(start):
    """At an invented site at 78 N the stage runs through polar day and polar night and finds a spike."""
    site = site_with(latitude=78.2, longitude=15.6, elevation_m=10.0)
    frame, flags = invented_site(days=28, site=site, start=start, seed=7)
    # the invented fluxes follow rg; in polar night they are noise around a constant
    i = at(frame, 20, 3)
    frame.iloc[i, frame.columns.get_loc("h")] += 200.0
    result = run_qc(frame, flags, site, load_rules("standard"))
    is_day = result.frame["is_day"].to_numpy()
    assert is_day.all() if start.endswith("06-10") else not is_day.any()
    assert result.flags["h"].iloc[i] & fb.SPIKE
    assert ((result.flags["h"].to_numpy() & fb.SPIKE) != 0).mean() <= 0.01

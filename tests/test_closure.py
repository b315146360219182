"""Energy-balance closure statistics, available energy and the Bowen-ratio correction."""
from __future__ import annotations

import datetime as dt
import json
import warnings

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from pipeline import flags as flagbits
from pipeline.closure import (
    assess_closure,
    available_energy,
    closure_statistics,
    soil_heat_capacity,
    soil_heat_storage,
)
from pipeline.config import SiteInfo
from pipeline.errors import TowerflowWarning
from pipeline.rules import standard_rules

TZ = dt.timezone(dt.timedelta(hours=1))


def _site(plate_depth_m=None, interval_minutes=30):
    return SiteInfo(id="invented-meadow", name="Invented meadow", latitude=47.0, longitude=8.0,
                    elevation_m=600.0, utc_offset_hours=1.0, canopy_height_m=0.3,
                    measurement_height_m=2.0, interval_minutes=interval_minutes,
                    plate_depth_m=plate_depth_m)


def _frame(n_days=4, bowen=(0.5, 0.25, 1.0, 0.4), ebr=0.8, interval_minutes=30, seed=0):
    """Invented days: Rn a half-sine by day, -40 W m-2 at night; G = 0.12 Rn (+5 at night);
    H + LE = ebr * (Rn - G) with the given Bowen ratio per day."""
    idx = pd.date_range("2025-06-02", periods=n_days * 1440 // interval_minutes,
                        freq=f"{interval_minutes}min", tz=TZ, name="timestamp_start")
    hour = (idx.hour + idx.minute / 60.0 + interval_minutes / 120.0).to_numpy()
    rn = np.where((hour > 6) & (hour < 20), 650.0 * np.sin(np.pi * (hour - 6) / 14), 0.0) - 40.0
    g = 0.12 * rn + 5.0
    a = rn - g
    day = (idx.normalize() - idx.normalize()[0]).days.to_numpy()
    beta = np.asarray(bowen, dtype=float)[day]
    turb = ebr * a
    le = turb / (1.0 + beta)
    h = turb - le
    frame = pd.DataFrame({"rn": rn, "g": g, "h": h, "le": le}, index=idx)
    flags = pd.DataFrame(0, index=idx, columns=frame.columns, dtype=flagbits.FLAG_DTYPE)
    return frame, flags


def test_closure_statistics_match_scipy_linregress():
    """Slope, intercept and r2 equal scipy.stats.linregress (oracle); ebr is the ratio of sums."""
    rng = np.random.default_rng(3)
    x = rng.uniform(-50, 600, 400)
    y = 0.78 * x + 12.0 + rng.normal(0, 30, x.size)
    x[5] = np.nan  # a missing pair is dropped
    got = closure_statistics(y, x)
    ok = np.isfinite(x)
    ref = stats.linregress(x[ok], y[ok])  # scipy oracle
    assert got["n"] == 399
    assert_allclose(got["slope"], ref.slope, rtol=1e-12)
    assert_allclose(got["intercept"], ref.intercept, rtol=1e-10)
    assert_allclose(got["r2"], ref.rvalue ** 2, rtol=1e-12)
    assert_allclose(got["ebr"], y[ok].sum() / x[ok].sum(), rtol=1e-12)  # definition, CONTRACT §4


def test_known_imbalance_gives_ebr_0_8():
    """H + LE = 0.8 (Rn - G) everywhere: EBR 0.8 and slope 0.8, intercept 0 (imposed)."""
    frame, flags = _frame(ebr=0.8)
    res = assess_closure(frame, flags, _site(), standard_rules())
    c = res.summary["closure"]
    assert_allclose(c["ebr"], 0.8, rtol=1e-12)  # imposed in the invented series
    assert_allclose(c["slope"], 0.8, rtol=1e-12)  # imposed
    assert_allclose(c["intercept"], 0.0, atol=1e-9)  # imposed
    assert_allclose(c["r2"], 1.0, rtol=1e-12)  # exact linear relation
    assert c["n"] == len(frame)
    assert res.summary["closure_basis"] == "intervals"
    assert_allclose(res.summary["closure_daily"]["ebr"], 0.8, rtol=1e-12)  # imposed
    assert_allclose(res.daily["ebr"].to_numpy(), 0.8, rtol=1e-12)  # imposed, every day
    json.dumps(res.summary, allow_nan=False)  # JSON-serialisable, no NaN


def test_statistics_use_only_accepted_and_unfrozen_intervals():
    """A rejected G and a snow interval drop out of the statistics; wild values there do not matter."""
    frame, flags = _frame(ebr=0.8)
    frame = frame.copy()
    frame.iloc[30, frame.columns.get_loc("h")] = 5000.0
    flags.iloc[30, flags.columns.get_loc("g")] = flagbits.RANGE
    frame.iloc[31, frame.columns.get_loc("le")] = -3000.0
    frame["snow_or_frozen"] = False
    frame.iloc[31, frame.columns.get_loc("snow_or_frozen")] = True
    res = assess_closure(frame, flags, _site(), standard_rules())
    assert res.summary["closure"]["n"] == len(frame) - 2
    assert_allclose(res.summary["closure"]["ebr"], 0.8, rtol=1e-12)  # imposed
    assert np.isnan(res.columns["available_energy"].iloc[30])  # G rejected -> no A


def test_monthly_and_diurnal_summaries():
    """Monthly list and the mean diurnal course cover the series (48 half-hours)."""
    frame, flags = _frame(n_days=4, ebr=0.8)
    res = assess_closure(frame, flags, _site(), standard_rules())
    monthly = res.summary["closure_monthly"]
    assert [m["month"] for m in monthly] == ["2025-06"]
    assert_allclose(monthly[0]["ebr"], 0.8, rtol=1e-12)  # imposed
    diurnal = res.summary["closure_diurnal"]
    assert len(diurnal) == 48 and diurnal[0]["time"] == "00:00" and diurnal[-1]["time"] == "23:30"
    noon = next(d for d in diurnal if d["time"] == "12:30")
    assert_allclose(noon["turbulent_flux"], 0.8 * noon["available_energy"], rtol=1e-12)  # imposed


def test_twine_correction_keeps_bowen_ratio_and_closes_daily_sums():
    """Each day's factor closes its sums and keeps H/LE (Twine et al. 2000)."""
    bowen = (0.5, 0.25, 1.0, 0.4)
    frame, flags = _frame(bowen=bowen, ebr=0.8)
    # some noise so the factor is not trivially 1/0.8 per interval
    rng = np.random.default_rng(1)
    frame = frame.assign(h=frame["h"] + rng.normal(0, 10, len(frame)))
    res = assess_closure(frame, flags, _site(), standard_rules())
    cols = res.columns
    a = cols["available_energy"]
    for day, part in cols.groupby(cols.index.normalize()):
        f = frame.loc[part.index]
        assert part["closure_corrected"].all()
        # daily sums closed
        assert_allclose((part["h_closed"] + part["le_closed"]).sum(), a.loc[part.index].sum(), rtol=1e-10)
        # Bowen ratio conserved, per interval and for the day's sums
        assert_allclose(part["h_closed"] / part["le_closed"], f["h"] / f["le"], rtol=1e-10)
        assert_allclose(part["h_closed"].sum() / part["le_closed"].sum(), f["h"].sum() / f["le"].sum(), rtol=1e-10)
        factor = a.loc[part.index].sum() / (f["h"] + f["le"]).sum()
        assert_allclose(part["closure_factor"], factor, rtol=1e-12)
    # measured values never replaced
    assert "h" not in cols and "le" not in cols
    assert res.daily["closure_corrected"].all()


def test_twine_matches_reference_example():
    """H 100, LE 200, A 400 -> LE' 266.667, H' 133.333 (Twine et al. 2000 formula; REFERENCES.md [C])."""
    idx = pd.date_range("2025-06-02", periods=48, freq="30min", tz=TZ, name="timestamp_start")
    frame = pd.DataFrame({"rn": 450.0, "g": 50.0, "h": 100.0, "le": 200.0}, index=idx)
    flags = pd.DataFrame(0, index=idx, columns=frame.columns, dtype=flagbits.FLAG_DTYPE)
    res = assess_closure(frame, flags, _site(), standard_rules())
    assert_allclose(res.columns["le_closed"], 266.6667, rtol=1e-6)  # REFERENCES.md §2 [C]
    assert_allclose(res.columns["h_closed"], 133.3333, rtol=1e-6)  # REFERENCES.md §2 [C]


def test_twine_skips_day_with_bowen_ratio_near_minus_one():
    """A day with sum(H) ~ -sum(LE) (strong advection) stays uncorrected and is marked."""
    frame, flags = _frame(n_days=3, bowen=(0.5, 0.5, 0.5), ebr=0.8)
    frame = frame.copy()
    third = frame.index.normalize() == frame.index.normalize()[-1]
    # day 3: LE large, H almost its negative: beta = -0.9, |1 + beta| = 0.1 < guard 0.3
    le3 = np.where(frame.loc[third, "rn"] > 0, 300.0, 20.0)
    frame.loc[third, "le"] = le3
    frame.loc[third, "h"] = -0.9 * le3
    res = assess_closure(frame, flags, _site(), standard_rules())
    cols = res.columns
    assert not cols.loc[third, "closure_corrected"].any()
    assert cols.loc[third, ["h_closed", "le_closed", "closure_factor"]].isna().all().all()
    assert cols.loc[~third, "closure_corrected"].all()
    day3 = res.daily.iloc[-1]
    assert not day3["closure_corrected"]
    assert day3["closure_skip_reason"] == "Bowen ratio near -1"
    assert res.summary["closure_correction"]["skipped"] == {"Bowen ratio near -1": 1}


def test_twine_skips_small_fluxes_and_sparse_days():
    """A day with |H + LE| ~ 0 and a day with most intervals rejected are skipped."""
    frame, flags = _frame(n_days=3, bowen=(0.5, 0.5, 0.5), ebr=0.8)
    frame, flags = frame.copy(), flags.copy()
    days = frame.index.normalize()
    d1, d2 = days == days[0], days == days[-1]
    frame.loc[d1, "h"] = 1.0
    frame.loc[d1, "le"] = 1.0
    flags.loc[d2 & (frame.index.hour < 15), "le"] = flagbits.SPIKE
    res = assess_closure(frame, flags, _site(), standard_rules())
    reasons = res.daily["closure_skip_reason"].tolist()
    assert reasons == ["H + LE too small", "", "too few intervals with H, LE, Rn and G accepted"]


def test_advection_day_is_corrected_downwards_not_rejected():
    """LE above Rn - G (an irrigated field) is accepted: the factor is below 1, no error."""
    frame, flags = _frame(n_days=2, bowen=(-0.2, -0.2), ebr=1.3)
    res = assess_closure(frame, flags, _site(), standard_rules())
    assert_allclose(res.summary["closure"]["ebr"], 1.3, rtol=1e-12)  # imposed
    assert res.columns["closure_corrected"].all()
    assert_allclose(res.daily["closure_factor"], 1 / 1.3, rtol=1e-12)  # imposed


def test_multi_day_correction_period():
    """With a 2-day period both days share one factor closing their joint sums."""
    frame, flags = _frame(n_days=4, bowen=(0.5, 0.5, 0.5, 0.5), ebr=0.8)
    frame = frame.copy()
    frame.loc[frame.index.normalize() == frame.index.normalize()[0], ["h", "le"]] *= 0.9
    rules = standard_rules()
    rules["closure"]["correction_period"] = "2 days"
    res = assess_closure(frame, flags, _site(), rules)
    f = res.daily["closure_factor"].to_numpy()
    assert f[0] == f[1] and f[2] == f[3] and f[0] != f[2]
    a = res.columns["available_energy"].iloc[:96].sum()
    assert_allclose((res.columns["h_closed"] + res.columns["le_closed"]).iloc[:96].sum(), a, rtol=1e-10)


def test_soil_heat_storage_hand_calculation():
    """T rising 0.5 K per half hour, swc 0.25, plates at 0.08 m: S = 47.489 W m-2 (hand calculation)."""
    # Cs = 1300*840 + 0.25*1000*4180 = 2.137e6 J m-3 K-1; S = Cs*0.08*0.5/1800 = 47.4889 W m-2
    # (de Vries 1963 / Ochsner et al. 2007 formula; arithmetic by hand)
    assert_allclose(soil_heat_capacity(0.25, bulk_density=1300.0, mineral_specific_heat=840.0), 2.137e6)
    t = 15.0 + 0.5 * np.arange(10)
    s = soil_heat_storage(t, 0.25, 1800.0, 0.08, bulk_density=1300.0, mineral_specific_heat=840.0)
    assert_allclose(s, 47.48889, rtol=1e-6)

    idx = pd.date_range("2025-06-02", periods=10, freq="30min", tz=TZ, name="timestamp_start")
    frame = pd.DataFrame({"rn": 300.0, "g": 40.0, "h": 50.0, "le": 150.0, "t_soil": t, "swc": 0.25}, index=idx)
    flags = pd.DataFrame(0, index=idx, columns=frame.columns, dtype=flagbits.FLAG_DTYPE)
    a = available_energy(frame, flags, rules=standard_rules(), site=_site(plate_depth_m=0.08))
    assert_allclose(a, 300.0 - 40.0 - 47.48889, rtol=1e-6)  # hand calculation above
    # without a plate depth the storage is not added
    assert_allclose(available_energy(frame, flags, site=_site()), 260.0)


def test_available_energy_subtracts_canopy_storage():
    """s_canopy (positive while the canopy warms) is part of the available energy."""
    idx = pd.date_range("2025-06-02", periods=4, freq="30min", tz=TZ, name="timestamp_start")
    frame = pd.DataFrame({"rn": 400.0, "g": 50.0, "s_canopy": [10.0, -5.0, 0.0, 20.0]}, index=idx)
    flags = pd.DataFrame(0, index=idx, columns=frame.columns, dtype=flagbits.FLAG_DTYPE)
    flags.iloc[3, 2] = flagbits.RANGE
    a = available_energy(frame, flags)
    assert_allclose(a.to_numpy(), [340.0, 355.0, 350.0, np.nan])  # Rn - G - S, by hand


def test_no_g_gives_rn_only_with_warning_and_daily_closure():
    """Without g: A = Rn, a warning, and CONTRACT §4 closure on daily sums (CONTRACT §1)."""
    frame, flags = _frame(ebr=0.8)
    frame = frame.drop(columns="g")
    flags = flags.drop(columns="g")
    with pytest.warns(TowerflowWarning, match="no g"):
        a = available_energy(frame, flags)
    assert_allclose(a, frame["rn"])
    with pytest.warns(TowerflowWarning, match="no g"):
        res = assess_closure(frame, flags, _site(), standard_rules())
    assert any("no g" in w for w in res.warnings)
    assert res.summary["closure_basis"].startswith("daily sums")
    assert res.summary["closure"]["n"] == 4  # four complete days
    # daily sums of H + LE against Rn: 0.8 * sum(Rn - G) / sum(Rn) with G = 0.12 Rn + 5 (imposed)
    day_rn = frame["rn"].groupby(frame.index.normalize()).sum()
    day_t = (frame["h"] + frame["le"]).groupby(frame.index.normalize()).sum()
    assert_allclose(res.summary["closure"]["ebr"], day_t.sum() / day_rn.sum(), rtol=1e-12)
    json.dumps(res.summary, allow_nan=False)


def test_inputs_not_mutated():
    """assess_closure returns new objects and leaves frame and flags as they were."""
    frame, flags = _frame()
    f0, g0 = frame.copy(), flags.copy()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assess_closure(frame, flags, _site(), standard_rules())
    pd.testing.assert_frame_equal(frame, f0)
    pd.testing.assert_frame_equal(flags, g0)

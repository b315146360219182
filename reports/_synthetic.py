"""Invented site outputs for the report tests and the report benchmark.

Writes a site output folder (``intervals.parquet``, ``daily.parquet``, ``summary.json``)
shaped like the pipeline's (CONTRACT §4) from a simple invented climate: a clear-sky-like
radiation course, fluxes that follow it with noise, some missing and rejected values, a
few site-history periods. All values are invented; nothing is computed by the pipeline.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import flags as flagbits

__all__ = ["write_synthetic_site"]


def write_synthetic_site(site_dir: Path, *, site: str = "invented-meadow", days: int = 21,
                         interval_minutes: int = 30, with_g: bool = True, with_rg: bool = True,
                         start: str = "2025-05-01", utc_offset_hours: float = 1.0, seed: int = 7) -> Path:
    """Write invented outputs of one site into ``site_dir`` and return it."""
    site_dir = Path(site_dir)
    site_dir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    tz = f"Etc/GMT{-int(utc_offset_hours):+d}" if float(utc_offset_hours).is_integer() else "UTC"
    step = pd.Timedelta(minutes=interval_minutes)
    n = int(days * pd.Timedelta(days=1) / step)
    t0 = pd.date_range(pd.Timestamp(start, tz=tz), periods=n, freq=step)
    hour = (t0.hour + t0.minute / 60.0 + interval_minutes / 120.0).to_numpy()
    doy = t0.dayofyear.to_numpy()
    sun = np.clip(np.sin(np.pi * (hour - 6.0) / 12.0), 0.0, None) * (0.85 + 0.15 * np.sin(2 * np.pi * doy / 365))
    cloud = np.repeat(rng.uniform(0.3, 1.0, days + 1), int(pd.Timedelta(days=1) / step))[:n]
    rg = 850.0 * sun * cloud
    rn = 0.62 * rg - 45.0 + rng.normal(0, 8, n)
    g = 0.12 * rn + rng.normal(0, 4, n)
    le = 0.5 * (rn - g) * 0.85 + rng.normal(0, 15, n)
    h = 0.3 * (rn - g) * 0.85 + rng.normal(0, 12, n)
    ta = 12 + 8 * sun + rng.normal(0, 0.5, n)
    vpd = np.clip(0.3 + 1.5 * sun + rng.normal(0, 0.1, n), 0.0, None)
    rh = np.clip(90 - 45 * sun + rng.normal(0, 3, n), 5, 100)
    wind = np.abs(2.5 + rng.normal(0, 1.0, n))
    ustar = 0.1 * wind + np.abs(rng.normal(0, 0.03, n))
    precip = np.where(rng.uniform(size=n) < 0.03, rng.exponential(1.0, n), 0.0)
    data = {"timestamp_start": t0, "timestamp_end": t0 + step}
    variables = {"le": le, "h": h, "rn": rn, "g": g, "rg": rg, "ta": ta, "rh": rh, "vpd": vpd, "wind": wind,
                 "ustar": ustar, "precip": precip}
    if not with_g:
        variables.pop("g")
    if not with_rg:
        variables.pop("rg")
    flags = {}
    for var, values in variables.items():
        f = np.zeros(n, dtype=np.int32)
        missing = rng.uniform(size=n) < 0.02
        values = np.where(missing, np.nan, values)
        f[missing] |= flagbits.MISSING
        if var in ("le", "h"):
            spikes = (rng.uniform(size=n) < 0.01) & ~missing
            values = np.where(spikes, values + rng.choice([-1, 1], n) * 300, values)
            f[spikes] |= flagbits.SPIKE
            f[(ustar < 0.15) & (sun == 0) & ~missing] |= flagbits.LOW_TURBULENCE
            f[(precip > 0) & ~missing] |= flagbits.WET
            out = (values > 700) & ~missing
            f[out] |= flagbits.RANGE
        data[var] = values
        flags[var] = f
    history_start = t0[n // 3]
    history_end = t0[n // 3 + 6]
    excluded = (t0 >= history_start) & (t0 < history_end)
    for var in ("le", "h"):
        flags[var][excluded] |= flagbits.HISTORY
    for var, f in flags.items():
        data[f"{var}_flag"] = f
    for var in ("le", "h"):
        acc = flags[var] == 0
        truth = le if var == "le" else h
        estimate = truth + rng.normal(0, 20, n)
        data[f"{var}_filled"] = np.where(acc, data[var], estimate)
        data[f"{var}_fill_method"] = np.where(acc, "measured", "similar_conditions")
        quality = np.where(rng.uniform(size=n) < 0.6, "good", np.where(rng.uniform(size=n) < 0.7, "fair", "poor"))
        data[f"{var}_fill_quality"] = np.where(acc, "measured", quality)
        data[f"{var}_fill_sd"] = np.where(acc, np.nan, 20.0)
    ga = 0.02 + 0.005 * wind
    gs = np.where(sun > 0.2, 0.004 + 0.006 * sun / (1 + vpd) + rng.normal(0, 0.0005, n), np.nan)
    valid = np.isfinite(gs) & (flags["le"] == 0) & (precip == 0)
    data.update({
        "ga": ga, "gs": gs, "gs_closed": gs * 1.2, "gs_molar": gs * 41.0, "gs_valid": valid,
        "gs_reject": np.where(valid, 0, 2).astype(np.int32),
        "omega": np.where(np.isfinite(gs), np.clip(0.3 + 0.2 * sun, 0, 1), np.nan),
        "le_equilibrium": 0.7 * (rn - (g if with_g else 0)), "le_imposed": 0.2 * (rn - (g if with_g else 0)),
        "available_energy": rn - (g if with_g else 0), "is_day": sun > 0, "snow_or_frozen": np.zeros(n, bool),
        "canopy_height_m": np.full(n, 0.3),
    })
    frame = pd.DataFrame(data)
    frame.to_parquet(site_dir / "intervals.parquet")
    local_day = t0.tz_localize(None).normalize()
    per_day = pd.DataFrame({"le": frame["le_filled"].to_numpy(), "acc": flags["le"] == 0,
                            "t": np.where((flags["le"] == 0) & (flags["h"] == 0), le + h, np.nan),
                            "a": rn - (g if with_g else 0), "gs": np.where(valid, gs, np.nan),
                            "om": np.where(valid, data["omega"], np.nan)}, index=local_day)
    grp = per_day.groupby(level=0)
    seconds = step / pd.Timedelta(seconds=1)
    daily = pd.DataFrame({
        "et_mm": grp["le"].sum() * seconds / 2.45e6,  # latent heat of vaporisation 2.45 MJ kg-1 (FAO-56, eq. 20 note)
        "complete_day": grp["le"].count() == int(pd.Timedelta(days=1) / step),
        "le_measured_fraction": grp["acc"].mean(),
        "ebr": grp["t"].sum() / grp["a"].sum(),
        "gs_median": grp["gs"].median(),
        "omega_mean": grp["om"].mean(),
        "n_gs_valid": grp["gs"].count(),
    })
    daily.index.name = "date"
    daily = daily.reset_index()
    daily["date"] = daily["date"].dt.date
    daily.to_parquet(site_dir / "daily.parquet")
    obs = le[rng.choice(n, min(n, 200), replace=False)]
    weeks = pd.date_range(local_day[0], local_day[-1], freq="7D")
    summary = {
        "site": site,
        "start": t0[0].isoformat(),
        "end": (t0[-1] + step).isoformat(),
        "n_intervals": int(n),
        "provisional_from": t0[max(0, n - int(pd.Timedelta(days=13) / step))].isoformat(),
        "closure": {"ebr": 0.8, "slope": 0.79, "intercept": 2.0, "r2": 0.93, "n": int(n // 2)},
        "closure_daily": {"ebr": 0.8, "slope": 0.8, "intercept": 0.1, "r2": 0.97, "n": days},
        "closure_monthly": [{"month": str(m), "ebr": 0.8, "slope": 0.79, "intercept": 1.0, "r2": 0.9, "n": 100}
                            for m in pd.unique(local_day.to_period("M"))],
        "gaps": {"le": float(np.mean(flags["le"] != 0)), "h": float(np.mean(flags["h"] != 0))},
        "spikes": {"le": int(np.sum(flags["le"] & flagbits.SPIKE > 0)), "h": int(np.sum(flags["h"] & flagbits.SPIKE > 0))},
        "fill_skill": {"le": {"rmse": 20.0, "bias": 0.5, "r2": 0.85, "n": 200, "method": "similar_conditions"},
                       "h": {"rmse": 18.0, "bias": -0.3, "r2": 0.83, "n": 200, "method": "similar_conditions"}},
        "fill_validation": {"le": {"observed": obs.tolist(), "filled": (obs + rng.normal(0, 20, obs.size)).tolist()},
                            "h": {"observed": obs.tolist(), "filled": (0.6 * obs + rng.normal(0, 18, obs.size)).tolist()}},
        "health": {
            "findings": [
                {"check": "clock_offset", "week": "2025-W18", "severity": "ok", "message": "Logger clock within 15 min."},
                {"check": "night_rh_max", "week": "2025-W19", "severity": "watch",
                 "message": "Night-time relative humidity never exceeded 85 %: compare the sensor with a reference."},
                {"check": "flat_line", "week": "2025-W19", "severity": "act",
                 "message": "wind repeated the same value for 9.0 h: the sensor may be stuck; check it."},
            ],
            "weeks": [{"week": f"W{i}", "start": str(w.date()), "clock_offset_minutes": float(rng.normal(0, 2)),
                       "ebr": 0.8, "rg_clear_sky_ratio": 0.98, "night_rh_max": 97.0} for i, w in enumerate(weeks)],
            "clock": {"daily_offsets": [{"date": str(local_day[0].date()), "offset_minutes": 1.5}], "steps": [],
                      "drift_minutes_per_week": None, "suspect_weeks": []},
            "days_since_last_data": {"le": 0.0, "h": 0.0},
        },
        "conductance_filters": {"n_intervals": int(n), "n_valid": int(valid.sum())},
        "warnings": ["invented warning: rh looks like a fraction, not percent (unit suspicion)"]
                    + ([] if with_g else ["no g: closure on daily sums of Rn only"]),
        "history": [{"entry": 0, "start": history_start.isoformat(), "end": history_end.isoformat(),
                     "kind": "exclusion", "variables": ["le", "h"], "reason": "site visit: analyser cleaned"}],
        "software_version": "test",
        "config_sha256": "0" * 64,
    }
    (site_dir / "summary.json").write_text(json.dumps(summary, indent=1))
    return site_dir

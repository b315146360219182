"""Benchmark: the QC stage (pipeline.qc.run_qc) on one invented site-year at 30 min.

Run ``.venv/bin/python benchmarks/bench_qc.py``; prints one markdown table row per
measurement. ``run()`` returns the same numbers for a benchmark suite runner.
The site, its place and every value are invented.
"""
from __future__ import annotations

import time
import warnings

import numpy as np
import pandas as pd

from pipeline import flags as fb
from pipeline import solar
from pipeline.config import SiteInfo
from pipeline.qc import run_qc
from pipeline.rules import load_rules, merge_rules

SITE = SiteInfo(id="invented-fen", name="Invented fen", latitude=52.4, longitude=11.2,
                elevation_m=90.0, utc_offset_hours=1.0, canopy_height_m=0.5,
                measurement_height_m=2.5, irga="open-path", interval_minutes=30)


def invented_site_year(seed: int = 0, minutes: int = 30):
    """A working frame and flags for one invented year with spikes, gaps and rain."""
    rng = np.random.default_rng(seed)
    idx = pd.date_range("2025-01-01", "2026-01-01", freq=f"{minutes}min", inclusive="left",
                        tz=SITE.tz, name="timestamp_start")
    n = idx.size
    interval = pd.Timedelta(minutes=minutes)
    clear = solar.clear_sky_radiation(
        solar.interval_mean_potential_radiation(idx, interval, SITE.latitude, SITE.longitude),
        SITE.elevation_m)
    cloud = np.repeat(rng.uniform(0.2, 1.0, n // 6 + 1), 6)[:n]
    rg = clear * cloud
    doy = idx.dayofyear.to_numpy()
    hour = (idx.hour + idx.minute / 60.0).to_numpy()
    season = -np.cos(2 * np.pi * (doy - 15) / 365.0)
    ta = 9.0 + 10.0 * season + 5.0 * np.sin(2 * np.pi * (hour - 9) / 24) + rng.normal(0, 0.3, n)
    precip = np.where(rng.random(n) < 0.04, rng.gamma(1.0, 0.8, n), 0.0)
    frame = pd.DataFrame({
        "le": 0.4 * rg + rng.normal(0, 12, n), "h": 0.25 * rg - 15 + rng.normal(0, 10, n),
        "rn": 0.7 * rg - 45 + rng.normal(0, 5, n), "g": 0.08 * rg - 5 + rng.normal(0, 3, n),
        "rg": rg, "sw_out": 0.2 * rg, "ta": ta,
        "rh": np.clip(75 - 20 * np.sin(2 * np.pi * (hour - 9) / 24) + rng.normal(0, 3, n), 5, 104),
        "vpd": np.clip(0.6 + 0.8 * np.sin(2 * np.pi * (hour - 9) / 24) + rng.normal(0, 0.1, n), -0.2, None),
        "p_air": 100.5 + rng.normal(0, 0.05, n).cumsum() * 0.05,
        "wind": rng.gamma(2.0, 1.4, n), "wind_dir": rng.uniform(0, 360, n),
        "ustar": rng.gamma(3.0, 0.09, n), "precip": precip,
        "t_soil": 9.0 + 9.0 * season + rng.normal(0, 0.1, n),
        "swc": 0.3 + rng.normal(0, 0.002, n),
        "fc": -12 * (rg / 900.0) + 3 + rng.normal(0, 2, n),
        "canopy_height_m": 0.5, "measurement_height_m": 2.5, "irga": SITE.irga, "irrigated": False,
    }, index=idx)
    spikes = rng.choice(n, n // 200, replace=False)
    frame.iloc[spikes, 0] += rng.choice([-1, 1], spikes.size) * 250.0
    for var in ("le", "h", "fc"):
        frame.iloc[rng.choice(n, n // 20, replace=False), frame.columns.get_loc(var)] = np.nan
    variables = [c for c in frame.columns if c not in ("canopy_height_m", "measurement_height_m",
                                                        "irga", "irrigated")]
    flags = pd.DataFrame({v: np.where(frame[v].isna(), fb.MISSING, 0).astype(fb.FLAG_DTYPE)
                          for v in variables}, index=idx)
    return frame, flags


def run(repeats: int = 3) -> dict:
    """Time run_qc on one invented site-year; best of ``repeats``, seconds."""
    frame, flags = invented_site_year()
    rules = merge_rules(load_rules("standard"), {"sectors": {"exclude": [[340.0, 20.0]]}})
    times = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(repeats):
            t0 = time.perf_counter()
            result = run_qc(frame, flags, SITE, rules)
            times.append(time.perf_counter() - t0)
    return {"name": "run_qc, one site-year at 30 min", "intervals": len(frame),
            "best_s": min(times), "median_s": float(np.median(times)),
            "spikes": result.summary["spikes"]}


if __name__ == "__main__":
    r = run()
    print("| benchmark | intervals | best (s) | median (s) | spikes found |")
    print("|---|---|---|---|---|")
    print(f"| {r['name']} | {r['intervals']} | {r['best_s']:.3f} | {r['median_s']:.3f} | {r['spikes']} |")

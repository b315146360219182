"""Benchmark: vectorised similar-conditions filling against a per-gap Python loop.

An invented site-year (30-minute intervals, 46.5 N 7.9 E) with 30 % of LE missing in gaps
of 1 interval to 2 days is filled by the Reichstein et al. (2005) sequence twice:

- ``per-gap loop``: a Python loop over the missing intervals with numpy inside it, as a
  careful first version would be written (a slice of the window per gap and step);
- ``vectorised``: :func:`pipeline.gapfill_similar.fill_similar_conditions` (gaps ×
  candidates index arrays, chunked).

Two per-gap loops are timed: the plain, obviously-correct loop of
``tests/test_gapfill.py`` (candidates chosen by time differences over the whole record:
the baseline issue 5 names), and a tuned loop that slices the window around each gap
(reported for transparency: it already does much less work per gap). All outputs must be
identical (values to 1e-12, same methods). The whole stage
(:func:`pipeline.gapfill.fill_gaps`, including drivers, Penman–Monteith and the
cross-validation) is timed too. Run::

    .venv/bin/python benchmarks/bench_gapfill.py [--days 365] [--repeat 3]

``run()`` returns the same numbers for a benchmark suite runner. Every value is invented.
"""
from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import pandas as pd

from pipeline import micromet, solar
from pipeline.config import SiteInfo
from pipeline.errors import TowerflowWarning
from pipeline.gapfill import fill_gaps
from pipeline.gapfill_similar import fill_similar_conditions, similarity_steps, step_offsets
from pipeline.rules import standard_rules

VARS = ["le", "h", "rn", "g", "rg", "ta", "rh", "vpd", "p_air", "wind", "ustar"]


def invented_site_year(days=365, interval_minutes=30, seed=1):
    site = SiteInfo(id="invented-bench", name="Invented benchmark meadow", latitude=46.5,
                    longitude=7.9, elevation_m=820.0, utc_offset_hours=1.0, canopy_height_m=0.3,
                    measurement_height_m=2.0, interval_minutes=interval_minutes)
    rng = np.random.default_rng(seed)
    per_day = 1440 // interval_minutes
    idx = pd.date_range("2025-01-01", periods=days * per_day, freq=f"{interval_minutes}min",
                        tz=site.tz, name="timestamp_start")
    n = len(idx)
    r0 = solar.interval_mean_potential_radiation(idx, site.interval, site.latitude, site.longitude)
    k = np.clip(rng.uniform(0.25, 0.8, days).repeat(per_day)
                + pd.Series(rng.normal(0, 0.15, n)).rolling(4, min_periods=1).mean().to_numpy(), 0.05, 0.85)
    rg = k * r0
    hour = (idx.hour + idx.minute / 60).to_numpy()
    doy = idx.dayofyear.to_numpy()
    ta = 9 - 10 * np.cos(2 * np.pi * (doy - 15) / 365) + 5 * np.sin(2 * np.pi * (hour - 9) / 24) \
        + rng.normal(0, 1.5, days).repeat(per_day)
    rh = np.clip(70 - 20 * np.sin(2 * np.pi * (hour - 9) / 24) + rng.normal(0, 3, n), 20, 100)
    vpd = micromet.vpd_from_rh(ta, rh)
    wind = np.clip(1.5 + rng.gamma(2, 0.7, n), 0.3, None)
    ustar = np.clip(0.12 * wind + rng.normal(0, 0.02, n), 0.05, None)
    rn = 0.7 * rg - 40 + rng.normal(0, 5, n)
    g = 0.1 * rn
    ga = micromet.aerodynamic_conductance(wind, ustar)
    gs = 0.015 * rg / (rg + 150) * np.exp(-0.35 * vpd) + 1e-4
    le = np.asarray(micromet.penman_monteith(rn - g, ta, vpd, 92.0, ga, gs))
    le = np.where(r0 > 0, le, 5.0) + rng.normal(0, 8, n)
    h = 0.85 * (rn - g) - le + rng.normal(0, 10, n)
    frame = pd.DataFrame(dict(le=le, h=h, rn=rn, g=g, rg=rg, ta=ta, rh=rh, vpd=vpd, p_air=92.0,
                              wind=wind, ustar=ustar), index=idx)
    frame["is_day"] = r0 > 0
    frame["snow_or_frozen"] = False
    gaps = np.zeros(n, dtype=bool)
    while gaps.mean() < 0.30:
        length = int(rng.integers(1, 2 * per_day + 1))
        s = int(rng.integers(0, n - length))
        gaps[s:s + length] = True
    flags = pd.DataFrame({c: np.zeros(n, np.int32) for c in VARS}, index=idx)
    flags.loc[gaps, "le"] = 1
    flags.loc[gaps, "h"] = 1
    return frame, flags, site, gaps


def plain_per_gap_loop(times, y, drivers, to_fill, *, tolerances, steps, min_samples):
    """The plain, obviously-correct per-gap loop that tests/test_gapfill.py checks the
    vectorised filler against: one definition, timed here, trusted there."""
    import sys
    from pathlib import Path

    root = str(Path(__file__).resolve().parents[1])
    if root not in sys.path:
        sys.path.insert(0, root)
    from tests.test_gapfill import reference_similar_conditions

    return reference_similar_conditions(times, y, drivers, to_fill, steps, tolerances, min_samples)


def per_gap_loop(y, drivers, to_fill, *, interval, tolerances, steps, min_samples):
    """A tuned per-gap loop: Python loop over gaps, numpy on a slice of the window."""
    n = y.size
    est = np.full(n, np.nan)
    sd = np.full(n, np.nan)
    method = np.full(n, "", dtype=object)
    prepared = []
    for step in steps:
        offsets = step_offsets(step, interval)
        prepared.append((step, offsets, [drivers[d] for d in step.drivers],
                         [tolerances[d] for d in step.drivers]))
    for i in np.flatnonzero(to_fill):
        for step, offsets, drvs, tols in prepared:
            if step.diurnal:
                idx = i + offsets
                idx = idx[(idx >= 0) & (idx < n)]
                yy = y[idx]
                ok = np.isfinite(yy)
                for d, t in zip(drvs, tols):
                    ok &= np.abs(d[idx] - d[i]) <= t
            else:
                half = offsets[-1]
                lo, hi = max(0, i - half), min(n, i + half + 1)
                yy = y[lo:hi]
                ok = np.isfinite(yy)
                for d, t in zip(drvs, tols):
                    ok &= np.abs(d[lo:hi] - d[i]) <= t
            if ok.sum() >= min_samples:
                sel = yy[ok]
                est[i] = sel.mean()
                sd[i] = sel.std(ddof=1) if sel.size > 1 else np.nan
                method[i] = step.method
                break
    return est, sd, method


def run(days: int = 365, repeat: int = 3) -> dict:
    """Time the fillers on an invented site-year; return the numbers (seconds, CPU time)."""
    frame, flags, site, gaps = invented_site_year(days)
    y = np.where(gaps, np.nan, frame["le"].to_numpy())
    drivers = {k: frame[k].to_numpy() for k in ("rg", "ta", "vpd")}
    tol = {"rg": 50.0, "ta": 2.5, "vpd": 0.5}  # Reichstein et al. 2005
    steps = similarity_steps(pd.Timedelta(standard_rules()["gapfill"]["widest_window"]))
    kw = dict(interval=site.interval, tolerances=tol, steps=steps, min_samples=2)

    def best(fn):
        times = []
        for _ in range(repeat):
            t0 = time.process_time()  # CPU time: less disturbed by other processes
            out = fn()
            times.append(time.process_time() - t0)
        return min(times), out

    t_vec, vec = best(lambda: fill_similar_conditions(y, drivers, gaps, **kw))
    t_loop, loop = best(lambda: per_gap_loop(y, drivers, gaps, **kw))
    t_plain, plain = best(lambda: plain_per_gap_loop(frame.index, y, drivers, gaps, tolerances=tol,
                                                     steps=steps, min_samples=2))
    for other in (loop, plain):  # identical output, or the timing means nothing
        np.testing.assert_allclose(vec[0], other[0], rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(vec[1], other[1], rtol=1e-12, atol=1e-12)
        assert np.array_equal(vec[2], other[2])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TowerflowWarning)
        t0 = time.perf_counter()
        fill_gaps(frame, flags, site, standard_rules())
        t_stage = time.perf_counter() - t0
    return {
        "intervals": len(frame), "missing": int(gaps.sum()), "repeat": repeat,
        "plain_loop_s": t_plain, "tuned_loop_s": t_loop, "vectorised_s": t_vec,
        "speedup_vs_plain_loop": t_plain / t_vec, "speedup_vs_tuned_loop": t_loop / t_vec,
        "stage_wall_s": t_stage,
        "max_abs_diff": max(float(np.nanmax(np.abs(vec[0] - o[0]))) for o in (loop, plain)),
        "max_abs_sd_diff": max(float(np.nanmax(np.abs(vec[1] - o[1]))) for o in (loop, plain)),
    }


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)
    r = run(args.days, args.repeat)
    print(f"site-year: {r['intervals']} intervals, {r['missing']} missing "
          f"({r['missing'] / r['intervals']:.0%}); CPU seconds, best of {r['repeat']}")
    print("| similar-conditions filler | time (s) | vectorised speed-up |")
    print("|---|---|---|")
    print(f"| plain per-gap loop (the test's reference) | {r['plain_loop_s']:.3f} | {r['speedup_vs_plain_loop']:.1f}x |")
    print(f"| tuned per-gap loop (sliced windows) | {r['tuned_loop_s']:.3f} | {r['speedup_vs_tuned_loop']:.1f}x |")
    print(f"| vectorised (pipeline.gapfill_similar) | {r['vectorised_s']:.3f} | 1.0x |")
    print(f"whole fill_gaps stage (drivers, Penman-Monteith, cross-validation): {r['stage_wall_s']:.3f} s wall")
    print(f"identical output: methods equal, max |diff| value {r['max_abs_diff']:.2e} W m-2, "
          f"sd {r['max_abs_sd_diff']:.2e} W m-2")
    return r


if __name__ == "__main__":
    main()

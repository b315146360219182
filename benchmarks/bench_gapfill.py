"""Benchmark: vectorised similar-conditions filling against a per-gap Python loop.

An invented site-year (the invented meadow of ``tests/test_gapfill.py``, 30-minute intervals) with 30 % of LE missing in gaps
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

from pipeline.errors import TowerflowWarning
from pipeline.gapfill import fill_gaps
from pipeline.gapfill_similar import fill_similar_conditions, similarity_steps, step_offsets
from pipeline.rules import standard_rules

def _test_module():
    """tests/test_gapfill.py: its invented record and its reference loop are used here as they
    are, one definition timed here and trusted there."""
    import sys
    from pathlib import Path

    root = str(Path(__file__).resolve().parents[1])
    if root not in sys.path:
        sys.path.insert(0, root)
    from tests import test_gapfill

    return test_gapfill


def invented_site_year(days=365, interval_minutes=30, seed=1):
    """The tests' invented meadow record over ``days`` from 1 January, with 30 % of LE and H
    missing in gaps of 1 interval to 2 days."""
    frame, flags, site = _test_module().simulate(days=days, interval_minutes=interval_minutes,
                                                 seed=seed, start="2025-01-01")
    rng = np.random.default_rng(seed + 1)
    per_day = 1440 // interval_minutes
    n = len(frame)
    gaps = np.zeros(n, dtype=bool)
    while gaps.mean() < 0.30:
        length = int(rng.integers(1, 2 * per_day + 1))
        s = int(rng.integers(0, n - length))
        gaps[s:s + length] = True
    flags.loc[gaps, "le"] = 1
    flags.loc[gaps, "h"] = 1
    return frame, flags, site, gaps


def plain_per_gap_loop(times, y, drivers, to_fill, *, tolerances, steps, min_samples):
    """The plain, obviously-correct per-gap loop that tests/test_gapfill.py checks the
    vectorised filler against."""
    return _test_module().reference_similar_conditions(times, y, drivers, to_fill, steps, tolerances,
                                                       min_samples)


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

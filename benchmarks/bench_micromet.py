"""Benchmark: Penman–Monteith forward and inverse over many intervals.

Prints evaluations per second for :func:`pipeline.micromet.penman_monteith`,
:func:`pipeline.micromet.invert_penman_monteith_with_reason` and
:func:`pipeline.micromet.decoupling_coefficient` on invented random inputs (default
10 million intervals, i.e. about 570 site-years of half-hours), plus the interval-mean
potential radiation for a year of half-hours. Not a pass/fail test.

Usage::

    .venv/bin/python benchmarks/bench_micromet.py [--n 10000000] [--repeat 3]
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from pipeline import micromet, solar


def _best(func, repeat):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        func()
        times.append(time.perf_counter() - t0)
    return min(times)


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=10_000_000, help="number of intervals")
    parser.add_argument("--repeat", type=int, default=3, help="repetitions (best is kept)")
    args = parser.parse_args(argv)

    rng = np.random.default_rng(0)
    n = args.n
    a = rng.uniform(-100, 700, n)
    ta = rng.uniform(-10, 40, n)
    vpd = rng.uniform(0, 4, n)
    p = rng.uniform(70, 103, n)
    ga = rng.uniform(0.005, 0.3, n)
    gs = rng.uniform(0.0005, 0.03, n)
    le = micromet.penman_monteith(a, ta, vpd, p, ga, gs)

    results = {}
    t = _best(lambda: micromet.penman_monteith(a, ta, vpd, p, ga, gs), args.repeat)
    results["penman_monteith"] = n / t
    t = _best(lambda: micromet.invert_penman_monteith_with_reason(le, a, ta, vpd, p, ga),
              args.repeat)
    results["invert_penman_monteith_with_reason"] = n / t
    t = _best(lambda: micromet.invert_penman_monteith(le, a, ta, vpd, p, ga), args.repeat)
    results["invert_penman_monteith"] = n / t
    t = _best(lambda: micromet.decoupling_coefficient(ta, p, ga, gs), args.repeat)
    results["decoupling_coefficient"] = n / t

    starts = pd.date_range("2023-01-01", periods=17520, freq="30min", tz="UTC")
    t = _best(lambda: solar.interval_mean_potential_radiation(starts, "30min", 46.5, 7.9),
              args.repeat)
    results["interval_mean_potential_radiation (1 year of 30 min)"] = 17520 / t

    print(f"intervals: {n:,}  (best of {args.repeat})")
    for name, rate in results.items():
        print(f"{name:55s} {rate / 1e6:8.2f} million evaluations per second")
    return results


if __name__ == "__main__":
    main()

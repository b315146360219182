"""Benchmark: the site quality report (reports.site.write_site_report) for one site-year.

Run ``.venv/bin/python benchmarks/bench_report.py [--days 365] [--minutes 30] [--repeat 3]``;
prints a markdown table: wall and CPU seconds per run (after one warm-up run, so imports and
font loading are excluded), the median, and the 1-minute load average of the machine (the
machine is shared: wall time grows with its load, CPU time much less). ``run()`` returns
the same numbers for a benchmark suite runner. Target (issue 7): one site-year <= 5 s.

The site outputs are invented (reports._synthetic): a year of 30-minute intervals with
gaps, spikes, rejected values and a site-history period; the pipeline is not run.
"""
from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path

from reports._synthetic import write_synthetic_site
from reports.site import write_site_report


def run(days: int = 365, minutes: int = 30, repeat: int = 3) -> dict:
    """Time ``write_site_report`` on an invented site of ``days`` days at ``minutes`` min."""
    with tempfile.TemporaryDirectory(prefix="bench-report-") as tmp:
        folder = write_synthetic_site(Path(tmp) / "invented-bench-meadow", site="invented-bench-meadow",
                                      days=days, interval_minutes=minutes, start="2025-01-01")
        write_site_report(folder)  # warm-up: imports, fonts, first-call caches
        walls, cpus = [], []
        for _ in range(repeat):
            w0, c0 = time.perf_counter(), time.process_time()
            write_site_report(folder)
            walls.append(time.perf_counter() - w0)
            cpus.append(time.process_time() - c0)
        size_kb = (folder / "qc_report.pdf").stat().st_size / 1024
    return {"days": days, "minutes": minutes, "wall": walls, "cpu": cpus,
            "wall_median": statistics.median(walls), "cpu_median": statistics.median(cpus),
            "pdf_kb": size_kb, "load_1min": os.getloadavg()[0]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--minutes", type=int, default=30)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    r = run(args.days, args.minutes, args.repeat)
    print("| measurement | value |")
    print("|---|---|")
    print(f"| site | invented, {r['days']} days at {r['minutes']} min |")
    print(f"| wall per report (s), runs | {', '.join(f'{w:.2f}' for w in r['wall'])} |")
    print(f"| CPU per report (s), runs | {', '.join(f'{c:.2f}' for c in r['cpu'])} |")
    print(f"| median wall / CPU (s) | {r['wall_median']:.2f} / {r['cpu_median']:.2f} |")
    print(f"| target one site-year <= 5 s (wall) | {'met' if r['wall_median'] <= 5.0 else 'not met'} |")
    print(f"| PDF size (kB) | {r['pdf_kb']:.0f} |")
    print(f"| load average (1 min), 2 cores | {r['load_1min']:.2f} |")


if __name__ == "__main__":
    main()

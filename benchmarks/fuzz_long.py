"""Long fuzz run of ingest and the whole site run (issue 10); not part of the test suite.

Runs the hypothesis strategies of ``tests/test_fuzz.py`` for a given number of minutes:
batches of fresh random examples (no example database, a new seed per batch) through
``read_logger_file`` and ``run_site``, with the same invariant checks as the tests. Prints
how many examples ran, how they ended (read / ran / refused with one of our own errors),
and the first failure with the case that caused it (exit status 1 then).

    .venv/bin/python benchmarks/fuzz_long.py 3          # three minutes
    .venv/bin/python benchmarks/fuzz_long.py 3 --read-only
    .venv/bin/python benchmarks/fuzz_long.py 0 --big-file 300   # memory of a 300 MB export

``--big-file MB`` writes two invented exports of about MB megabytes each, a *wide* one (two
years of 30-min rows, ten mapped columns among a thousand) and a *long* one (ten-minute rows
for decades, every column mapped), reads each with ``read_logger_file`` in a fresh child
process (and runs the whole site job on the wide one) and prints the child's peak resident
memory (``resource.getrusage``) against the file size.

All data are invented.
"""
from __future__ import annotations

import argparse
import collections
import random
import sys
import tempfile
import time
import traceback
from pathlib import Path

from hypothesis import HealthCheck, Phase, given, settings

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from test_fuzz import check_read, check_run, logger_cases  # noqa: E402


def _write_big(path: Path, *, megabytes: float, wide: bool) -> Path:
    """An invented export of about ``megabytes`` MB, written in blocks (bounded memory here)."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(7)
    mapped = {"le": "LE", "h": "H", "rn": "RN", "ta": "TA", "rh": "RH", "wind": "WS", "ustar": "USTAR",
              "g": "G", "rg": "RG", "p_air": "PA"}
    n_extra = 990 if wide else 10
    columns = list(mapped.values()) + [f"aux_{i:03d}" for i in range(n_extra)]
    minutes = 30 if wide else 10
    target = megabytes * 1e6
    # one week of invented rows is formatted once; the file repeats it under advancing stamps
    # (fast to write; the reader's memory does not depend on the values)
    week = int(7 * 24 * 60 / minutes)
    t = pd.Timestamp("2001-01-01") + pd.to_timedelta(np.arange(1, week + 1) * minutes, unit="min")
    hour = np.asarray(t.hour + t.minute / 60)
    sun = np.clip(np.sin((hour - 6) / 12 * np.pi), 0, None)
    base = {"LE": 150 * sun, "H": 120 * sun, "RN": 500 * sun - 40, "TA": 10 + 5 * sun,
            "RH": 70 - 20 * sun, "WS": 2.5 + 0 * sun, "USTAR": 0.3 + 0 * sun, "G": 30 * sun,
            "RG": 700 * sun, "PA": 95 + 0 * sun}
    values = pd.DataFrame({c: np.round(base.get(c, np.zeros(week)) + rng.normal(0, 2, week), 2)
                           for c in columns})
    tails = values.to_csv(index=False, header=False, float_format="%.2f").splitlines()
    written, block = 0, 0
    with open(path, "w") as fh:
        fh.write(",".join(["TIMESTAMP", *columns]) + "\n")
        while written < target:
            stamps = (pd.Timestamp("1980-01-01") + pd.to_timedelta(
                (block * week + np.arange(1, week + 1)) * minutes, unit="min")).strftime("%Y-%m-%d %H:%M")
            text = "".join(f"{s},{r}\n" for s, r in zip(stamps, tails))
            fh.write(text)
            written += len(text)
            block += 1
    toml = path.with_suffix(".toml")
    toml.write_text("\n".join([
        "[site]", 'id = "big-file-site"', 'name = "Invented big-file site"', "latitude = 45.0",
        "longitude = 10.0", "elevation_m = 300.0", "utc_offset_hours = 1", "canopy_height_m = 0.4",
        "measurement_height_m = 2.5", 'irga = "closed-path"', f"interval_minutes = {30}", "",
        "[input]", 'timestamp_column = "TIMESTAMP"', 'timestamp_format = "%Y-%m-%d %H:%M"',
        'timestamp_marks = "end"', f"interval_minutes = {minutes}", "missing = [-9999]", "",
        "[input.columns]", *[f'{k} = "{v}"' for k, v in mapped.items()], "",
        "[qc]", 'rules = "standard"', ""]))
    return path


_CHILD = """
import resource, sys, time, warnings
warnings.simplefilter("ignore")
from pathlib import Path
from pipeline.config import load_site_config
from pipeline.ingest import assign_stream, read_logger_file
mode, csv, toml, out = sys.argv[1:5]
import os
base = int(open("/proc/self/statm").read().split()[1]) * os.sysconf("SC_PAGE_SIZE") // 1024  # current RSS, KiB
t0 = time.perf_counter()
if mode == "read":
    cfg = load_site_config(toml)
    ing = read_logger_file(Path(csv), assign_stream(Path(csv), cfg), cfg.site)
    rows = len(ing.raw)
else:
    from towerflow.runner import run_site
    outcome = run_site(toml, [csv], out, report=False)
    rows = outcome.summary["n_intervals"]
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(base, peak, rows, time.perf_counter() - t0)
"""


def big_file(megabytes: float) -> int:
    import os
    import subprocess

    folder = Path(tempfile.mkdtemp(prefix="towerflow-big-"))
    try:
        for wide in (True, False):
            kind = "wide" if wide else "long"
            path = _write_big(folder / f"{kind}.csv", megabytes=megabytes, wide=wide)
            size = path.stat().st_size / 2**20
            for mode in (("read", "run") if wide else ("read",)):
                res = subprocess.run([sys.executable, "-c", _CHILD, mode, str(path), str(path.with_suffix(".toml")),
                                      str(folder / f"out-{kind}")], capture_output=True, text=True,
                                     env={**os.environ, "PYTHONWARNINGS": "ignore"})
                if res.returncode:
                    print(f"{kind} {mode}: FAILED\n{res.stderr[-2000:]}")
                    return 1
                base, peak, rows, secs = res.stdout.split()
                base_mb, peak_mb = int(base) / 1024, int(peak) / 1024  # ru_maxrss is KiB on Linux
                print(f"{kind} file {size:.0f} MiB, {int(rows)} rows, {mode}: peak RSS {peak_mb:.0f} MiB "
                      f"(after imports {base_mb:.0f} MiB; +{peak_mb - base_mb:.0f} MiB = "
                      f"{(peak_mb - base_mb) / size:.2f} x the file) in {float(secs):.1f} s")
    finally:
        import shutil

        shutil.rmtree(folder, ignore_errors=True)
    return 0


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("minutes", type=float, help="how long to fuzz")
    parser.add_argument("--read-only", action="store_true", help="fuzz read_logger_file only")
    parser.add_argument("--batch", type=int, default=25, help="examples per hypothesis batch")
    parser.add_argument("--big-file", type=float, default=None, metavar="MB",
                        help="measure the peak memory of reading an export of about MB megabytes")
    args = parser.parse_args(argv)
    if args.big_file:
        status = big_file(args.big_file)
        if status or not args.minutes:
            return status

    deadline = time.monotonic() + 60 * args.minutes
    counts: collections.Counter = collections.Counter()
    failure: dict = {}
    seed = random.SystemRandom().randrange(2**32)
    print(f"fuzzing for {args.minutes:g} min (hypothesis seeds from {seed})", flush=True)

    def body(case):
        if time.monotonic() > deadline:
            return
        with tempfile.TemporaryDirectory() as tmp:
            tmp = Path(tmp)
            (tmp / "read").mkdir()
            (tmp / "run").mkdir()
            try:
                counts["read_logger_file: " + check_read(case, tmp / "read")] += 1
                if not args.read_only:
                    counts["run_site: " + check_run(case, tmp / "run")] += 1
            except BaseException:
                failure.setdefault("case", case.description)
                failure.setdefault("trace", traceback.format_exc())
                raise
        counts["examples"] += 1

    # no shrinking: a failure is reported with its generating description instead
    run = settings(max_examples=args.batch, deadline=None, database=None,
                   phases=[Phase.generate], derandomize=False,
                   suppress_health_check=list(HealthCheck))(given(case=logger_cases())(body))
    t0 = time.monotonic()
    batch = 0
    while time.monotonic() < deadline and not failure:
        try:
            from hypothesis import seed as hseed

            hseed(seed + batch)(run)()
        except Exception:  # noqa: BLE001 - reported below
            break
        batch += 1
    elapsed = time.monotonic() - t0
    print(f"{counts['examples']} examples in {elapsed:.0f} s ({batch} batches)")
    for key in sorted(k for k in counts if k != "examples"):
        print(f"  {key}: {counts[key]}")
    if failure:
        print("FAILURE for case:", failure["case"])
        print(failure["trace"])
        return 1
    print("no failure")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Benchmark: ingest of one invented site-year (pipeline.ingest) against a pandas floor.

Writes one site-year at 30 min (17,520 rows, 20 columns) of invented logger CSV as weekly
files into a temporary folder (semicolon-free comma files, a units row, end-marked stamps,
-9999 sentinels, a few garbage cells), then times

* ``ingest``: :func:`pipeline.ingest.read_logger_file` over every file, then
  :func:`pipeline.ingest.build_working_frame` on the concatenated raw frame;
* ``floor``: ``pandas.read_csv`` of the same files (C parser, stamps parsed with the format),
  concatenated and written with ``DataFrame.to_parquet`` — the least any CSV → parquet
  ingest must do.

Run ``.venv/bin/python benchmarks/bench_ingest.py [--repeat N] [--big-rows N]``; prints one
markdown table row per measurement. ``--big-rows`` also writes one file of N rows and reports
read time and the process's peak resident memory growth (a memory-bound check for files of
hundreds of MB). ``run()`` returns the numbers for a benchmark suite runner.
The site, its place and every value are invented.
"""
from __future__ import annotations

import argparse
import json
import subprocess
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.config import FlagColumn, SiteConfig, SiteInfo, StreamConfig
from pipeline.ingest import build_working_frame, read_logger_file

SITE = SiteInfo(id="invented-heath", name="Invented heath", latitude=51.7, longitude=9.3,
                elevation_m=310.0, utc_offset_hours=1.0, canopy_height_m=0.4,
                measurement_height_m=2.5, irga="closed-path", interval_minutes=30)

#: file column -> (canonical variable or None, generator)
COLUMNS = ["LE", "H", "NETRAD", "SHF_1", "SHF_2", "SW_IN", "SW_OUT", "LW_IN", "LW_OUT", "T_AIR_K",
           "RH_PCT", "VPD_HPA", "P_HPA", "WS", "WD", "USTAR", "RAIN", "VWC", "T_SOIL", "CO2_FLUX",
           "QC_LE", "AGC"]

STREAM = StreamConfig(
    name="main", match=None, timestamp_column=("TIMESTAMP",), timestamp_format="%Y-%m-%d %H:%M",
    timestamp_marks="end", interval_minutes=30, missing=(-9999, "NAN"), skip_rows=(0,),
    columns={"le": ("LE",), "h": ("H",), "rn": ("NETRAD",), "g": ("SHF_1", "SHF_2"), "rg": ("SW_IN",),
             "sw_out": ("SW_OUT",), "lw_in": ("LW_IN",), "lw_out": ("LW_OUT",), "ta": ("T_AIR_K",),
             "rh": ("RH_PCT",), "vpd": ("VPD_HPA",), "p_air": ("P_HPA",), "wind": ("WS",),
             "wind_dir": ("WD",), "ustar": ("USTAR",), "precip": ("RAIN",), "swc": ("VWC",),
             "t_soil": ("T_SOIL",), "fc": ("CO2_FLUX",)},
    units={"ta": "K", "vpd": "hPa", "p_air": "hPa", "swc": "percent"},
    flags={"le": FlagColumn("QC_LE", (2,))}, passthrough={"signal_strength": "AGC"})
CFG = SiteConfig(path=Path("invented-heath.toml"), sha256="0" * 64, site=SITE, inputs=(STREAM,))


def _invented_values(stamps: pd.DatetimeIndex, rng) -> dict[str, np.ndarray]:
    n = stamps.size
    hour = (stamps.hour + stamps.minute / 60.0).to_numpy()
    doy = stamps.dayofyear.to_numpy()
    sun = np.clip(np.sin(np.pi * (hour - 6.0) / 12.0), 0, None) * (0.6 + 0.4 * np.sin(np.pi * doy / 365.0))
    rg = 850.0 * sun * rng.uniform(0.3, 1.0, n)
    ta = 10.0 - 8.0 * np.cos(2 * np.pi * (doy - 15) / 365.0) + 5.0 * sun
    rh = np.clip(85.0 - 35.0 * sun + rng.normal(0, 4, n), 15, 100)
    es = 0.6108 * np.exp(17.27 * ta / (ta + 237.3))  # FAO-56 eq. 11 (Allen et al. 1998), kPa
    rn = 0.7 * rg - 40.0
    g = 0.1 * rn
    le = 0.5 * (rn - g) + rng.normal(0, 15, n)
    h = 0.3 * (rn - g) + rng.normal(0, 15, n)
    return {
        "LE": le, "H": h, "NETRAD": rn, "SHF_1": g + rng.normal(0, 3, n), "SHF_2": g + rng.normal(0, 3, n),
        "SW_IN": rg, "SW_OUT": 0.2 * rg, "LW_IN": 300 + rng.normal(0, 10, n), "LW_OUT": 380 + 3 * ta,
        "T_AIR_K": ta + 273.15, "RH_PCT": rh, "VPD_HPA": 10.0 * es * (1 - rh / 100.0),
        "P_HPA": 980.0 + rng.normal(0, 5, n), "WS": rng.gamma(2.0, 1.5, n), "WD": rng.uniform(0, 360, n),
        "USTAR": rng.gamma(2.0, 0.15, n), "RAIN": np.where(rng.uniform(size=n) < 0.03, rng.gamma(1, 1, n), 0.0),
        "VWC": 25.0 + rng.normal(0, 1, n), "T_SOIL": ta * 0.6 + 4, "CO2_FLUX": -10.0 * sun + 3 + rng.normal(0, 2, n),
        "QC_LE": rng.choice([0, 1, 2], n, p=[0.8, 0.15, 0.05]).astype(float), "AGC": rng.integers(45, 60, n).astype(float),
    }


def write_site_year(folder: Path, seed: int = 0, rows: int = 17_520, per_file: int = 336) -> list[Path]:
    """Write the invented site-year as weekly CSV files (336 rows each); returns the paths."""
    rng = np.random.default_rng(seed)
    stamps = pd.date_range("2025-01-01 00:30", periods=rows, freq="30min")  # end-marked, local standard time
    values = _invented_values(stamps, rng)
    table = pd.DataFrame({c: np.round(values[c], 3) for c in COLUMNS})
    table = table.mask(rng.uniform(size=table.shape) < 0.01, -9999)
    table.insert(0, "TIMESTAMP", stamps.strftime("%Y-%m-%d %H:%M"))
    text_cols = table.astype(str)
    bad = rng.uniform(size=rows) < 0.001
    text_cols.loc[bad, "LE"] = "NAN"
    text_cols.loc[rng.uniform(size=rows) < 0.0005, "H"] = "ERR"
    paths = []
    units_row = ",".join(["TS", *["-"] * len(COLUMNS)])
    for k, start in enumerate(range(0, rows, per_file)):
        path = folder / f"invented-heath_flux_{k:03d}.csv"
        chunk = text_cols.iloc[start:start + per_file]
        with open(path, "w") as fh:
            fh.write(",".join(chunk.columns) + "\n" + units_row + "\n")
            chunk.to_csv(fh, header=False, index=False)
        paths.append(path)
    return paths


def ingest_all(paths):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        files = [read_logger_file(p, STREAM, SITE) for p in paths]
        raw = pd.concat([f.raw for f in files])
        raw = raw[~raw.index.duplicated(keep="first")].sort_index()
        frame, flags, report = build_working_frame({"main": raw}, CFG, ingested=files)
    return frame, flags, report, files


def floor_all(paths, out: Path):
    parts = [pd.read_csv(p, skiprows=[1], na_values=["-9999", "NAN"]) for p in paths]
    table = pd.concat(parts, ignore_index=True)
    table["TIMESTAMP"] = pd.to_datetime(table["TIMESTAMP"], format="%Y-%m-%d %H:%M")
    for col in table.columns[1:]:
        if table[col].dtype == object:  # garbage cells: the floor also has to make numbers
            table[col] = pd.to_numeric(table[col], errors="coerce")
    table.to_parquet(out)
    return len(table)


def _time(fn, repeat):
    """(best wall s, median wall s, result, best CPU s): CPU time is robust on a shared machine."""
    times, cpu = [], []
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        result = fn()
        times.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return min(times), statistics.median(times), result, min(cpu)


def run(repeat: int = 3, big_rows: int = 0) -> list[dict]:
    """Time ingest and the pandas floor; optionally one big file. Returns table rows as dicts."""
    out = []
    with tempfile.TemporaryDirectory(prefix="towerflow-bench-ingest-") as tmp:
        folder = Path(tmp)
        paths = write_site_year(folder)
        size_mb = sum(p.stat().st_size for p in paths) / 1e6
        best, med, (frame, flags, report, _), cpu = _time(lambda: ingest_all(paths), repeat)
        out.append({"name": "ingest: read_logger_file x files + build_working_frame", "files": len(paths),
                    "rows": int(len(frame)), "mb": size_mb, "best_s": best, "median_s": med, "cpu_s": cpu})
        best, med, n, cpu = _time(lambda: floor_all(paths, folder / "floor.parquet"), repeat)
        out.append({"name": "floor: pandas read_csv + to_parquet", "files": len(paths), "rows": n,
                    "mb": size_mb, "best_s": best, "median_s": med, "cpu_s": cpu})
        if big_rows:
            big = folder / "big"
            big.mkdir()
            (path,) = write_site_year(big, rows=big_rows, per_file=big_rows)
            size = path.stat().st_size / 1e6
            # read in a fresh process so that the peak resident memory is the reader's own
            # (VmHWM of /proc/self/status: ru_maxrss would inherit the parent's high-water mark)
            code = ("import time, warnings, json, sys; sys.path.insert(0, %r); "
                    "hwm = lambda: int([l for l in open('/proc/self/status') if l.startswith('VmHWM')][0].split()[1]); "
                    "import bench_ingest as b; from pipeline.ingest import read_logger_file; "
                    "warnings.simplefilter('ignore'); base = hwm(); "
                    "t0 = time.perf_counter(); ing = read_logger_file(%r, b.STREAM, b.SITE); "
                    "dt = time.perf_counter() - t0; "
                    "print(json.dumps({'s': dt, 'rows': len(ing.raw), 'base_mb': base / 1024, "
                    "'peak_mb': hwm() / 1024, "
                    "'data_mb': float(ing.raw.memory_usage(deep=True).sum() / 1e6)}))"
                    % (str(Path(__file__).parent), str(path)))
            res = json.loads(subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                                            text=True).stdout)
            out.append({"name": f"one big file: read_logger_file (peak RSS {res['peak_mb']:.0f} MB, of which "
                                f"{res['base_mb']:.0f} MB interpreter and imports; raw frame {res['data_mb']:.0f} MB)",
                        "files": 1, "rows": res["rows"], "mb": size, "best_s": res["s"], "median_s": res["s"],
                        "cpu_s": float("nan")})
    return out


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--big-rows", type=int, default=0, help="also time one file of this many rows")
    args = parser.parse_args()
    rows = run(args.repeat, args.big_rows)
    print("| benchmark | files | rows | MB | best (s) | median (s) | best CPU (s) |")
    print("|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['name']} | {r['files']} | {r['rows']} | {r['mb']:.1f} | {r['best_s']:.3f} | "
              f"{r['median_s']:.3f} | {r['cpu_s']:.3f} |")
    sys.exit(0)

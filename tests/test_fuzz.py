"""Property tests and fuzzing of ingest and the whole site run (issue 10). All data invented.

Hypothesis draws the *shape* of a logger export (column order and names, delimiter, stamp
format, stamp marks, UTC offset, stream and site intervals, units, missing-value markers,
garbage cells, spikes, gaps, jitter, shuffled and repeated rows) and a seed from which numpy
draws the values (an invented diurnal course plus noise). Each case is fed to
``read_logger_file`` and to the whole ``run_site``. The only exceptions allowed are
``TowerflowError`` subclasses (our own one-line errors); after a successful run the
invariants of CONTRACT §4 must hold:

* ``intervals.parquet`` has one row per interval of the regular grid between the first and
  the last record (no duplicate, no missing interval);
* where ``le_fill_method == "measured"`` (and likewise for h), ``le_filled`` is the accepted
  measured value, which is the value written in the file (no unit conversion for W m-2);
* ``le_filled`` / ``h_filled`` are finite except in gaps longer than the maximum fill length
  and in intervals the run counted in its "could not be filled" warning.

``benchmarks/fuzz_long.py`` runs the same strategies for minutes.
"""
from __future__ import annotations

import re
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.config import load_site_config
from pipeline.errors import TowerflowError
from pipeline.ingest import assign_stream, read_logger_file

#: canonical variable -> (invented column name stem, canonical unit, alternative units)
VARIABLES = {
    "le": ("latent", "W m-2", ()),
    "h": ("sensible", "W m-2", ()),
    "rn": ("netrad", "W m-2", ()),
    "g": ("soilflux", "W m-2", ()),
    "rg": ("shortwave_in", "W m-2", ()),
    "ta": ("airtemp", "degC", ("K",)),
    "rh": ("humidity", "%", ("fraction",)),
    "p_air": ("pressure", "kPa", ("hPa",)),
    "wind": ("windspeed", "m s-1", ()),
    "ustar": ("frictionvel", "m s-1", ()),
}
REQUIRED = ("le", "h", "rn", "ta", "rh", "wind", "ustar")
FORMATS = ("%Y-%m-%d %H:%M", "%Y-%m-%d %H:%M:%S", "%d.%m.%Y %H:%M", "%Y/%m/%d %H:%M", "%d/%m/%Y %H:%M")
STREAM_INTERVALS = {30: (10, 15, 30), 60: (20, 30, 60)}


@dataclass
class LoggerCase:
    """One generated export: file bytes, the site TOML, and what was written."""

    csv: bytes
    toml: str
    interval: int  # stream interval, minutes
    site_interval: int
    offset: float
    marks: str
    le_written: pd.Series  # LE as written (float, NaN for missing/garbage), index: UTC interval starts
    h_written: pd.Series
    n_stamps: int  # distinct interval starts written
    description: str
    damage: str = ""  # a byte-level damage applied after writing ("" = none)


def _series(rng, n, minutes, lon, offset, start):
    """Invented half-hourly weather and fluxes (a diurnal course plus noise)."""
    t = start + pd.to_timedelta(np.arange(n) * minutes, unit="min")
    clock_hour = np.asarray(t.hour + t.minute / 60, dtype=float)
    solar_hour = (clock_hour - offset + lon / 15.0) % 24  # local solar time, 4 min per degree
    sun = np.clip(np.sin((solar_hour - 6) / 12 * np.pi), 0, None)
    rg = 850 * sun * rng.uniform(0.4, 1.0) + rng.normal(0, 5, n).clip(0)
    rn = 0.7 * rg - 60 + rng.normal(0, 10, n)
    g = 0.1 * rn + rng.normal(0, 5, n)
    le = 0.45 * (rn - g) + rng.normal(0, 15, n)
    h = 0.35 * (rn - g) + rng.normal(0, 15, n)
    ta = 12 + 7 * np.sin((solar_hour - 9) / 24 * 2 * np.pi) + rng.normal(0, 0.3, n)
    rh = np.clip(70 - 25 * np.sin((solar_hour - 9) / 24 * 2 * np.pi) + rng.normal(0, 3, n), 15, 100)
    wind = rng.gamma(3, 0.8, n) + 0.3
    ustar = np.clip(0.09 * wind + rng.normal(0, 0.03, n), 0.02, None)
    p_air = 95 + rng.normal(0, 0.2, n)
    return t, {"le": le, "h": h, "rn": rn, "g": g, "rg": rg, "ta": ta, "rh": rh, "wind": wind,
               "ustar": ustar, "p_air": p_air}


def _convert(var, unit, x):
    if unit == "K":
        return x + 273.15
    if unit == "fraction":
        return x / 100
    if unit == "hPa":
        return x * 10
    return x


@st.composite
def logger_cases(draw, max_days: int = 3) -> LoggerCase:
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    site_interval = draw(st.sampled_from([30, 60]))
    interval = draw(st.sampled_from(STREAM_INTERVALS[site_interval]))
    days = draw(st.floats(1.0, max_days))
    n = int(days * 24 * 60 / interval)
    lon = draw(st.floats(-170, 170))
    lat = draw(st.floats(-60, 60))
    offset = draw(st.sampled_from([0.0, 1.0, -5.0, 5.5, 9.0, round(lon / 15)]))
    marks = draw(st.sampled_from(["start", "end"]))
    fmt = draw(st.sampled_from(FORMATS))
    sep = draw(st.sampled_from([",", ";", "\t"]))
    optional = draw(st.lists(st.sampled_from(["g", "rg", "p_air"]), unique=True))
    variables = list(REQUIRED) + optional
    names = {v: VARIABLES[v][0] + draw(st.sampled_from(["", "_1", "_avg", "X"])) for v in variables}
    units = {v: draw(st.sampled_from((VARIABLES[v][1],) + VARIABLES[v][2])) for v in variables}
    extra = draw(st.lists(st.sampled_from(["battery", "panel_temp", "record", "diag"]), unique=True))
    order = draw(st.permutations([names[v] for v in variables] + extra))
    missing_marker = draw(st.sampled_from(["-9999", "NAN", "", "NaN"]))
    p_missing = draw(st.sampled_from([0.0, 0.02, 0.2, 0.6]))
    p_garbage = draw(st.sampled_from([0.0, 0.0, 0.005]))
    n_spikes = draw(st.integers(0, 6))
    n_gaps = draw(st.integers(0, 3))
    jitter = draw(st.sampled_from([0.0, 0.0, 0.05]))  # fraction of the interval (tolerance 0.10)
    n_shuffled = draw(st.sampled_from([0, 0, 5]))
    n_repeats = draw(st.sampled_from([0, 0, 3]))

    start = pd.Timestamp("2025-05-04") + pd.Timedelta(days=int(rng.integers(0, 200)))
    t, values = _series(rng, n, interval, lon, offset, start)
    for _ in range(n_spikes):
        var = rng.choice(["le", "h"])
        values[var][rng.integers(0, n)] += rng.choice([-1, 1]) * rng.uniform(300, 900)
    keep = np.ones(n, bool)
    for _ in range(n_gaps):
        a = int(rng.integers(0, n))
        keep[a:a + int(rng.integers(1, max(2, n // 4)))] = False
    keep[0] = keep[-1] = True  # the record's first and last stamps
    text = {}
    written = {}
    for v in variables:
        x = np.round(_convert(v, units[v], values[v]), 4)
        cells = np.array([repr(float(val)) for val in x], dtype=object)
        miss = rng.random(n) < p_missing
        garbage = (rng.random(n) < p_garbage) & ~miss
        cells[miss] = missing_marker
        cells[garbage] = "ERR"
        text[names[v]] = cells
        written[v] = np.where(miss | garbage, np.nan, x)
    for col in extra:
        text[col] = np.array([str(i % 97) for i in range(n)], dtype=object)

    # stamps: the interval start or end in the logger's (fixed) local time, with jitter
    stamp_t = t + pd.Timedelta(minutes=interval) if marks == "end" else t
    if jitter:
        secs = rng.uniform(-jitter, jitter, n) * interval * 60
        stamp_t = stamp_t + pd.to_timedelta(np.round(secs), unit="s")
    if "%S" not in fmt:
        stamp_t = stamp_t.round("min")
    stamps = np.array([s.strftime(fmt) for s in stamp_t], dtype=object)
    rows_idx = np.flatnonzero(keep)
    if n_shuffled and len(rows_idx) > 20:
        a = int(rng.integers(1, len(rows_idx) - n_shuffled - 1))
        rows_idx[a:a + n_shuffled] = rows_idx[a:a + n_shuffled][::-1]
    if n_repeats and len(rows_idx) > 10:
        rows_idx = np.concatenate([rows_idx, rng.choice(rows_idx[1:-1], n_repeats, replace=False)])
    lines = [sep.join(["TIMESTAMP", *order])]
    for i in rows_idx:
        lines.append(sep.join([stamps[i], *[text[c][i] for c in order]]))
    csv_bytes = ("\n".join(lines) + "\n").encode()
    damage = draw(st.sampled_from([""] * 12 + ["truncate", "insert bytes", "delete line", "blank line",
                                   "stray delimiter", "non-utf8", "header twice", "cut header"]))
    csv_bytes = _damage(csv_bytes, damage, sep, rng)

    utc_start = (t - pd.Timedelta(hours=offset)).tz_localize("UTC")
    kept = np.unique(rows_idx)
    le_written = pd.Series(written["le"][kept], index=utc_start[kept])
    h_written = pd.Series(written["h"][kept], index=utc_start[kept])

    toml_lines = [
        "[site]", 'id = "fuzz-site"', 'name = "Invented fuzz site"',
        f"latitude = {lat!r}", f"longitude = {lon!r}", "elevation_m = 500.0",
        f"utc_offset_hours = {offset!r}", "canopy_height_m = 0.5", "measurement_height_m = 3.0",
        'irga = "closed-path"', f"interval_minutes = {site_interval}", "",
        "[input]", 'timestamp_column = "TIMESTAMP"', f'timestamp_format = "{fmt}"',
        f'timestamp_marks = "{marks}"', f"interval_minutes = {interval}",
        f'missing = [-9999, "{missing_marker or "NAN"}"]', "",
        "[input.columns]", *[f'{v} = "{names[v]}"' for v in variables], "",
        "[input.units]", *[f'{v} = "{units[v]}"' for v in variables], "",
        "[qc]", 'rules = "standard"',
    ]
    desc = (f"seed={seed} site={site_interval}min stream={interval}min n={n} kept={len(kept)} "
            f"offset={offset} marks={marks} fmt={fmt!r} sep={sep!r} missing={missing_marker!r} "
            f"p_missing={p_missing} garbage={p_garbage} spikes={n_spikes} gaps={n_gaps} jitter={jitter} "
            f"shuffled={n_shuffled} repeats={n_repeats} vars={variables}")
    return LoggerCase(csv=csv_bytes, toml="\n".join(toml_lines) + "\n", interval=interval,
                      site_interval=site_interval, offset=offset, marks=marks, le_written=le_written,
                      h_written=h_written, n_stamps=len(kept), description=desc + f" damage={damage!r}",
                      damage=damage)


def _damage(data: bytes, kind: str, sep: str, rng) -> bytes:
    """Byte-level damage of a written export (what a crashed logger or a bad copy leaves)."""
    if not kind:
        return data
    lines = data.split(b"\n")
    k = int(rng.integers(1, max(2, len(lines) - 1)))
    if kind == "truncate":
        return data[: int(rng.integers(0, len(data)))]
    if kind == "insert bytes":
        at = int(rng.integers(0, len(data)))
        return data[:at] + bytes(rng.integers(0, 256, int(rng.integers(1, 12)), dtype=np.uint8)) + data[at:]
    if kind == "delete line":
        return b"\n".join(lines[:k] + lines[k + 1:])
    if kind == "blank line":
        return b"\n".join(lines[:k] + [b""] + lines[k:])
    if kind == "stray delimiter":
        lines[k] = lines[k] + sep.encode()
        return b"\n".join(lines)
    if kind == "non-utf8":
        lines[k] = lines[k].replace(b"1", b"\xe9", 1)
        return b"\n".join(lines)
    if kind == "header twice":
        return b"\n".join(lines[:k] + [lines[0]] + lines[k:])
    if kind == "cut header":
        return b"\n".join(lines[1:])
    raise AssertionError(kind)


def _write(case: LoggerCase, folder: Path) -> tuple[Path, Path]:
    toml = folder / "fuzz-site.toml"
    toml.write_text(case.toml)
    data = folder / "fuzz_export.csv"
    data.write_bytes(case.csv)
    return toml, data


def check_read(case: LoggerCase, folder: Path) -> str:
    """Read the export; check the raw frame against what was written. Returns an outcome tag."""
    toml, data = _write(case, folder)
    cfg = load_site_config(toml)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ing = read_logger_file(data, assign_stream(data, cfg), cfg.site)
    except TowerflowError as exc:
        assert "\n" not in str(exc) and str(data) in str(exc), str(exc)
        assert case.damage, f"a sound export was refused: {exc}"
        return "refused"
    raw = ing.raw
    assert raw.index.is_unique and raw.index.is_monotonic_increasing and str(raw.index.tz) == "UTC"
    step = pd.Timedelta(minutes=case.interval).value
    local_ns = raw.index.asi8 + pd.Timedelta(hours=case.offset).value
    assert (local_ns % step == 0).all()  # on the stream's grid in the logger's local time
    if case.damage:
        return "read damaged"
    assert len(raw) == case.n_stamps, (len(raw), case.n_stamps)
    le_col = [c for c in raw.columns if c.startswith("latent")][0]
    got = raw[le_col].reindex(case.le_written.index)
    np.testing.assert_array_equal(got.to_numpy(), case.le_written.to_numpy())  # values preserved
    return "read"


def _unfilled_counted(warnings_: list[str], flux: str) -> int:
    for w in warnings_:
        m = re.match(rf"{flux}: (\d+) intervals could not be filled", w)
        if m:
            return int(m.group(1))
    return 0


def check_run(case: LoggerCase, folder: Path) -> str:
    """The whole run; the CONTRACT §4 invariants on its outputs. Returns an outcome tag."""
    from towerflow.runner import run_site

    toml, data = _write(case, folder)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            outcome = run_site(toml, [data], folder / "out", report=False)
    except TowerflowError as exc:
        assert "\n" not in str(exc), str(exc)
        assert case.damage, f"a sound export was refused: {exc}"
        return "refused"
    iv = pq.read_table(outcome.out_dir / "intervals.parquet").to_pandas()
    ts = pd.DatetimeIndex(iv["timestamp_start"])
    step = pd.Timedelta(minutes=case.site_interval)
    assert ts.is_unique and ts.is_monotonic_increasing
    assert len(iv) == (ts[-1] - ts[0]) / step + 1  # the complete regular grid
    assert (iv["timestamp_end"] - iv["timestamp_start"] == step).all()
    utc = ts.tz_convert("UTC")
    for flux, written in (("le", case.le_written), ("h", case.h_written)):
        measured = (iv[f"{flux}_fill_method"] == "measured").to_numpy()
        filled = iv[f"{flux}_filled"].to_numpy(dtype=float)
        value = iv[flux].to_numpy(dtype=float)
        flag = iv[f"{flux}_flag"].to_numpy()
        assert (flag[measured] == 0).all()
        np.testing.assert_array_equal(filled[measured], value[measured])
        assert np.isfinite(filled[measured]).all()
        assert not (measured != ((flag == 0) & np.isfinite(value))).any()  # accepted <=> measured
        if case.interval == case.site_interval and not case.damage:  # the very value written
            w = written.reindex(utc[measured]).to_numpy()
            np.testing.assert_array_equal(filled[measured], w)
        # filled series finite except long gaps and the counted unfilled intervals
        long_gap = iv[f"{flux}_in_long_gap"].to_numpy(dtype=bool) if f"{flux}_in_long_gap" in iv \
            else np.zeros(len(iv), bool)
        nan = ~np.isfinite(filled) & ~long_gap
        if measured.any():
            assert nan.sum() == _unfilled_counted(outcome.warnings, flux), (nan.sum(), outcome.warnings)
        fill_sd = iv[f"{flux}_fill_sd"].to_numpy(dtype=float)
        assert np.isnan(fill_sd[measured]).all()
    return "ran"


_SETTINGS = dict(deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
                 database=None)


@settings(max_examples=30, **_SETTINGS)
@given(case=logger_cases())
def test_read_logger_file_never_crashes_and_preserves_values(case):
    with tempfile.TemporaryDirectory() as tmp:
        check_read(case, Path(tmp))


@settings(max_examples=10, **_SETTINGS)
@given(case=logger_cases(max_days=2.5))
def test_whole_run_never_crashes_and_keeps_its_invariants(case):
    with tempfile.TemporaryDirectory() as tmp:
        check_run(case, Path(tmp))

"""Reliability and security end to end (issue 10): bad input, faults, concurrency, idempotency.

Every case runs the real command (``towerflow.cli.main`` in-process, or ``towerflow run`` as a
subprocess) on the invented demo network (``towerflow.demo.network``, all data invented) or on
exports derived from it. A refused input must give exit status 1, one line on stderr naming
the file and the row or key, and leave every file under the output folder (store and earlier
outputs) byte-for-byte as it was; a tolerated defect is a counted warning in summary.json.

The unit-level cases of the reader and the store are in test_ingest.py, test_timestamps.py,
test_store.py and test_config.py; this file covers what those cannot: the whole run.
"""
from __future__ import annotations

import hashlib
import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from pandas.testing import assert_frame_equal

from pipeline.errors import StoreError, TowerflowError
from towerflow import cli
from towerflow.demo.network import write_demo_network
from towerflow.runner import run_site
from towerflow.store import SiteStore

ROOT = Path(__file__).resolve().parents[1]
SITE = "demo-upland-grassland"  # one 30-min logger, end stamps "%Y-%m-%d %H:%M:%S" (demo docstring)
OUTPUTS = ("intervals.parquet", "daily.parquet", "summary.json", "effective_rules.toml",
           "changes.json", "changes.md")
#: output columns that name the run rather than the data (excluded when comparing runs)
_RUN_META = ()


# ---------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------
def tree(folder: Path) -> dict[str, str]:
    """sha256 of every file under ``folder`` (relative path → digest)."""
    folder = Path(folder)
    if not folder.exists():
        return {}
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def run_cli(capsys, *args) -> tuple[int, str]:
    capsys.readouterr()
    rc = cli.main(["run", *map(str, args), "--no-report"])
    return rc, capsys.readouterr().err


def frames(site_dir: Path) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The data of intervals.parquet and daily.parquet (metadata such as run ids left out)."""
    return (pq.read_table(site_dir / "intervals.parquet").to_pandas(),
            pq.read_table(site_dir / "daily.parquet").to_pandas())


def assert_same_outputs(a: Path, b: Path) -> None:
    ia, da = frames(a)
    ib, db = frames(b)
    assert_frame_equal(ia, ib)
    assert_frame_equal(da, db)


def summary(site_dir: Path) -> dict:
    return json.loads((site_dir / "summary.json").read_text())


def assert_refused(rc: int, err: str, *needles: str) -> None:
    """Exit 1 and a one-line message naming each needle (file name, row, key...)."""
    assert rc == 1, err
    line = err.strip()
    assert line.startswith("towerflow: error: ") and "\n" not in line, err
    for needle in needles:
        assert needle in line, (needle, line)


def csv_parts(path: Path) -> tuple[str, list[str]]:
    lines = path.read_text().splitlines(keepends=True)
    return lines[0], lines[1:]


def restamp(rows: list[str], fn) -> list[str]:
    """Rewrite the first field (the stamp) of each row with ``fn(pandas.Timestamp) -> str``."""
    out = []
    for r in rows:
        stamp, rest = r.split(",", 1)
        out.append(fn(pd.Timestamp(stamp)) + "," + rest)
    return out


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The invented demo network (16 days: three weekly exports of the grassland logger)."""
    root = tmp_path_factory.mktemp("demo")
    write_demo_network(root, days=16, seed=5)
    toml = root / "sites" / f"{SITE}.toml"
    weeks = sorted((root / "raw" / SITE).glob("*.csv"))
    assert len(weeks) == 3, weeks
    return {"root": root, "toml": toml, "weeks": weeks}


@pytest.fixture(scope="module")
def baseline(demo, tmp_path_factory):
    """Output folder after two good weekly runs (the 'earlier outputs' and store)."""
    out = tmp_path_factory.mktemp("baseline")
    for week in demo["weeks"][:2]:
        assert cli.main(["run", str(demo["toml"]), str(week), "--out", str(out), "--no-report"]) == 0
    return out


@pytest.fixture(scope="module")
def clean3(demo, baseline, tmp_path_factory):
    """The clean, ordered third weekly run on top of the baseline (the reference result)."""
    out = tmp_path_factory.mktemp("clean3") / "out"
    shutil.copytree(baseline, out)
    assert cli.main(["run", str(demo["toml"]), str(demo["weeks"][2]), "--out", str(out), "--no-report"]) == 0
    return out


@pytest.fixture
def work(baseline, tmp_path):
    """A private copy of the baseline output folder."""
    out = tmp_path / "out"
    shutil.copytree(baseline, out)
    return out


def write_input(tmp_path: Path, text, name=f"{SITE}_export_20250310.csv") -> Path:
    folder = tmp_path / "incoming"
    folder.mkdir(exist_ok=True)
    path = folder / name
    path.write_bytes(text if isinstance(text, bytes) else text.encode())
    return path


# ---------------------------------------------------------------------------------------
# the bad input matrix: refused files (exit 1, one line, nothing changed)
# ---------------------------------------------------------------------------------------
def _bad_files(header: str, rows: list[str]):
    """(case id, file bytes, expected fragments of the message) for refused exports."""
    body = "".join(rows)
    ts = "column 'datetime_end'"
    nonutf8 = (header + "".join(rows[:30])).encode() + rows[30].replace(",", ",\xff", 1).encode("latin-1") \
        + "".join(rows[31:]).encode()
    conflict = rows[:6] + [rows[5].split(",", 1)[0] + ",555.5," + rows[5].split(",", 2)[2]] + rows[6:]
    return [
        ("empty file", b"", ["the file is empty"]),
        ("header only", header.encode(), ["header only"]),
        ("decimal comma in a comma-separated file",
         (header + "".join(re.sub(r"(\d)\.(\d)", r"\1,\2", r) for r in rows)).encode(), ["row 2", "fields"]),
        ("mapped column missing", (header.replace("latent_heat", "latent_heat_flux") + body).encode(),
         ["row 1", "column 'latent_heat'", "not found"]),
        ("duplicate column names",
         (header.rstrip("\n") + ",latent_heat\n" + "".join(r.rstrip("\n") + ",1.0\n" for r in rows)).encode(),
         ["row 1", "column 'latent_heat'", "2 times"]),
        ("duplicated stamps with conflicting values", (header + "".join(conflict)).encode(),
         ["row 7", "rows 7 and 8", "different values"]),
        ("stamp off the grid",
         (header + "".join(rows[:6])
          + "".join(restamp(rows[6:7], lambda t: str(t + pd.Timedelta(minutes=10))))
          + "".join(rows[7:])).encode(), ["row 8", ts, "off the"]),
        ("day and month swapped in some rows",
         (header + "".join(rows[:40]) + "".join(restamp(rows[40:], lambda t: t.strftime("%Y-%d-%m %H:%M:%S")))
          ).encode(), ["swapped"]),
        ("different timestamp format",
         (header + "".join(restamp(rows, lambda t: t.strftime("%d.%m.%Y %H:%M")))).encode(), ["row 2", ts]),
        ("non-UTF-8 bytes", nonutf8, ["row 32", "utf-8"]),
        ("empty timestamp cell", (header + "".join(rows[:3]) + "," + rows[3].split(",", 1)[1]
                                  + "".join(rows[4:])).encode(), ["row 5", ts]),
    ]


BAD_CASES = ["empty file", "header only", "decimal comma in a comma-separated file", "mapped column missing",
             "duplicate column names", "duplicated stamps with conflicting values", "stamp off the grid",
             "day and month swapped in some rows", "different timestamp format", "non-UTF-8 bytes",
             "empty timestamp cell"]


@pytest.mark.parametrize("case", BAD_CASES)
def test_refused_file_leaves_store_and_outputs_unchanged(case, demo, work, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])
    (data, needles), = [(d, n) for c, d, n in _bad_files(header, rows) if c == case]
    bad = write_input(tmp_path, data)
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], bad, "--out", work)
    assert_refused(rc, err, str(bad), *needles)
    assert tree(work) == before


def test_logger_clock_reset_refused_even_with_supersede(demo, work, tmp_path, capsys):
    """Week 3's values stamped with week 2's dates (a reset clock) conflict wholesale: refused."""
    header, rows3 = csv_parts(demo["weeks"][2])
    _, rows2 = csv_parts(demo["weeks"][1])
    n = min(len(rows2), len(rows3))
    reset = [rows2[i].split(",", 1)[0] + "," + rows3[i].split(",", 1)[1] for i in range(n)]
    bad = write_input(tmp_path, header + "".join(reset))
    before = tree(work)
    for extra in ([], ["--supersede"]):
        rc, err = run_cli(capsys, demo["toml"], bad, "--out", work, *extra)
        assert_refused(rc, err, str(bad), "clock reset", "nothing written")
        assert tree(work) == before
    SiteStore(work / SITE / "store").verify()


def test_sixty_minute_file_refused_by_a_thirty_minute_store(demo, tmp_path, capsys):
    """Stream interval not declared (inferred from each file): a 60-min file is not mixed in."""
    toml = tmp_path / "site.toml"
    toml.write_text(demo["toml"].read_text().replace("interval_minutes = 30\nmissing", "missing"))
    assert "interval_minutes = 30\nmissing" not in toml.read_text()
    out = tmp_path / "out"
    rc, err = run_cli(capsys, toml, demo["weeks"][1], "--out", out)
    assert rc == 0, err
    header, rows = csv_parts(demo["weeks"][2])
    hourly = write_input(tmp_path, header + "".join(r for r in rows if r[14:16] == "00"))
    before = tree(out)
    rc, err = run_cli(capsys, toml, hourly, "--out", out)
    assert_refused(rc, err, str(hourly), "30-minute", "60-minute", "mix")
    assert tree(out) == before


@pytest.mark.xfail(strict=True, reason="ingest takes a 60-min export into a stream declared "
                   "interval_minutes = 30 as half-missing 30-min data (pipeline/ingest.py; lead to fix)")
def test_sixty_minute_file_in_a_declared_thirty_minute_stream_is_refused(demo, work, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])
    hourly = write_input(tmp_path, header + "".join(r for r in rows if r[14:16] == "00"))
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], hourly, "--out", work)
    assert rc == 1 and str(hourly) in err
    assert tree(work) == before


@pytest.mark.xfail(strict=True, reason="a whole file with day and month swapped (every day <= 12) "
                   "passes: ingest's jump check compares only one side swapped (pipeline/ingest.py)")
def test_whole_file_day_month_swapped_is_refused(demo, work, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])  # 2025-03-09 .. 2025-03-17: days 09..12 swap validly
    rows = [r for r in rows if pd.Timestamp(r.split(",", 1)[0]).day <= 12]
    bad = write_input(tmp_path, header + "".join(restamp(rows, lambda t: t.strftime("%Y-%d-%m %H:%M:%S"))))
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], bad, "--out", work)
    assert rc == 1 and "swapped" in err
    assert tree(work) == before


@pytest.mark.xfail(strict=True, reason="a semicolon export with decimal commas and no input.decimal "
                   "is read with every value missing and exit 0 (pipeline/ingest.py; lead to fix)")
def test_undeclared_decimal_comma_is_refused(demo, work, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])
    bad = write_input(tmp_path, header.replace(",", ";")
                      + "".join(r.replace(",", ";").replace(".", ",") for r in rows))
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], bad, "--out", work)
    assert rc == 1 and str(bad) in err
    assert tree(work) == before


def _variant_config(demo, tmp_path, old, new) -> Path:
    text = demo["toml"].read_text()
    assert old in text
    path = tmp_path / "sites" / f"{SITE}.toml"
    path.parent.mkdir(exist_ok=True)
    path.write_text(text.replace(old, new, 1))
    return path


@pytest.mark.parametrize("old, new, needles", [
    ('swc = "percent"', 'swc = "percent"\nta = "furlong"', ["key 'input.units.ta'", "unknown unit"]),
    ('rules = "standard"', 'rules = "standard"\n[qc.override.variables.le]\nrange = "wide"',
     ["key 'qc.override.variables.le.range'"]),
    ('id = "demo-upland-grassland"', 'id = "../x"', ["key 'site.id'"]),
    ('id = "demo-upland-grassland"', 'id = "/tmp/x"', ["key 'site.id'"]),
    ('latitude = 47.05', 'latitude = "47.05"', ["key 'site.latitude'"]),
    ('irga = "closed-path"', 'irga = 3', ["key 'site.irga'"]),
], ids=["unknown unit", "rule override wrong type", "site id ../x", "absolute site id",
        "latitude as text", "irga as a number"])
def test_refused_configuration_leaves_everything_unchanged(old, new, needles, demo, work, tmp_path, capsys):
    toml = _variant_config(demo, tmp_path, old, new)
    before = tree(work)
    outside = tree(work.parent)
    rc, err = run_cli(capsys, toml, demo["weeks"][2], "--out", work)
    assert_refused(rc, err, str(toml), *needles)
    assert tree(work) == before
    assert tree(work.parent) == outside  # nothing written beside DIR either (site id ../x)


def test_rule_file_with_wrong_types_refused(demo, work, tmp_path, capsys):
    rules = tmp_path / "my_rules.toml"
    text = (ROOT / "qc_rules" / "standard.toml").read_text()
    rules.write_text(re.sub(r"(?m)^range = \[-200\.0, 1000\.0\]", 'range = "-200 to 1000"', text, count=1))
    toml = _variant_config(demo, tmp_path, 'rules = "standard"', f'rules = "{rules}"')
    before = tree(work)
    rc, err = run_cli(capsys, toml, demo["weeks"][2], "--out", work)
    assert_refused(rc, err, "my_rules.toml", "variables.le.range")
    assert tree(work) == before


# ---------------------------------------------------------------------------------------
# tolerated defects: a counted warning, and the same data as the clean file
# ---------------------------------------------------------------------------------------
def _tolerated(header: str, rows: list[str]):
    """(case id, file text, warning fragment or None, same data as the clean export?)."""
    body = "".join(rows)
    midnight = restamp(rows, lambda t: (f"{(t - pd.Timedelta(days=1)):%Y-%m-%d} 24:00:00"
                                        if (t.hour, t.minute) == (0, 0) else f"{t:%Y-%m-%d %H:%M:%S}"))
    jitter = restamp(rows, lambda t: f"{t + pd.Timedelta(seconds=(7 if t.minute == 30 else -5)):%Y-%m-%d %H:%M:%S}")
    return [
        ("rows out of order", header + "".join(rows[10:20] + rows[:10] + rows[20:]), "out of order", True),
        ("jittered stamps", header + "".join(jitter), "snapped to the nearest interval", True),
        ("24:00 for midnight", header + "".join(midnight), None, True),
        ("identical duplicate rows", header + "".join(rows[:30] + rows[25:]), "identical values", True),
        ("CRLF line ends", (header + body).replace("\n", "\r\n"), None, True),
        ("truncated last line", header + body[:-40], "truncated write", False),
        ("garbage in numeric cells",
         header + "".join(",".join(["#VALUE!" if k == 2 else f for k, f in enumerate(r.split(","))])
                          if i % 40 == 3 else r for i, r in enumerate(rows)), "non-numeric cell", False),
    ]


TOLERATED_CASES = ["rows out of order", "jittered stamps", "24:00 for midnight", "identical duplicate rows",
                   "CRLF line ends", "truncated last line", "garbage in numeric cells"]


@pytest.mark.parametrize("case", TOLERATED_CASES)
def test_tolerated_defect_is_a_counted_warning(case, demo, work, clean3, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])
    (text, fragment, same), = [(t, f, s) for c, t, f, s in _tolerated(header, rows) if c == case]
    path = write_input(tmp_path, text)
    rc, err = run_cli(capsys, demo["toml"], path, "--out", work)
    assert rc == 0, err
    warnings = summary(work / SITE)["warnings"]
    if fragment:
        hits = [w for w in warnings if fragment in w]
        assert hits and str(path) in hits[0], warnings
        assert re.search(r"\b\d+\b", hits[0])  # counted (or the row named)
    if same:
        assert_same_outputs(work / SITE, clean3 / SITE)
    SiteStore(work / SITE / "store").verify()


def test_implausible_values_for_the_unit_warn(demo, work, tmp_path, capsys):
    """Air temperature declared in kelvin while the logger writes degC: a warning naming ta."""
    toml = _variant_config(demo, tmp_path, 'swc = "percent"', 'swc = "percent"\nta = "K"')
    rc, err = run_cli(capsys, toml, demo["weeks"][2], "--out", work)
    assert rc == 0, err
    warnings = summary(work / SITE)["warnings"]
    assert any("ta" in w and "implausible" in w and "'K'" in w for w in warnings), warnings


def test_declared_decimal_comma_reads_the_same_values(demo, work, clean3, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])
    path = write_input(tmp_path, header.replace(",", ";") + "".join(r.replace(",", ";").replace(".", ",")
                                                                    for r in rows))
    toml = _variant_config(demo, tmp_path, "skip_rows = []", 'skip_rows = []\ndecimal = ","')
    rc, err = run_cli(capsys, toml, path, "--out", work)
    assert rc == 0, err
    ia, _ = frames(work / SITE)
    ib, _ = frames(clean3 / SITE)
    assert_frame_equal(ia[["timestamp_start", "le", "h", "ta", "le_filled"]],
                       ib[["timestamp_start", "le", "h", "ta", "le_filled"]])


# ---------------------------------------------------------------------------------------
# daylight-saving clocks (a fresh site: the exports moved to the switch dates)
# ---------------------------------------------------------------------------------------
def _dst_export(demo, tmp_path, start: str, switch_std: str, forward: bool) -> Path:
    """Week 2 moved to ``start``; stamps follow daylight-saving time around ``switch_std``."""
    header, rows = csv_parts(demo["weeks"][1])
    t0 = pd.Timestamp(rows[0].split(",", 1)[0])
    shift = pd.Timestamp(start) - t0.normalize()
    switch = pd.Timestamp(switch_std)  # the switch, in local standard time

    def stamp(t):
        t = t + shift
        summer = (t > switch) if forward else (t <= switch)
        return f"{t + pd.Timedelta(hours=1) if summer else t:%Y-%m-%d %H:%M:%S}"
    return write_input(tmp_path, header + "".join(restamp(rows, stamp)),
                       name=f"{SITE}_export_{pd.Timestamp(start):%Y%m%d}.csv")


def test_daylight_saving_repeated_hour_refused(demo, tmp_path, capsys):
    """Autumn (last Sunday of October 2025): the repeated hour holds other values: refused."""
    path = _dst_export(demo, tmp_path, "2025-10-23", "2025-10-26 02:00", forward=False)
    out = tmp_path / "out"
    rc, err = run_cli(capsys, demo["toml"], path, "--out", out)
    assert_refused(rc, err, str(path), "daylight-saving")
    assert tree(out) == {}


def test_daylight_saving_skipped_hour_warns(demo, tmp_path, capsys):
    """Spring (last Sunday of March 2025): the skipped hour is a warning naming the row."""
    path = _dst_export(demo, tmp_path, "2025-03-27", "2025-03-30 02:00", forward=True)
    out = tmp_path / "out"
    rc, err = run_cli(capsys, demo["toml"], path, "--out", out)
    assert rc == 0, err
    hits = [w for w in summary(out / SITE)["warnings"] if "daylight-saving" in w]
    assert hits and str(path) in hits[0] and "row " in hits[0]

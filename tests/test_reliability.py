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


def test_sixty_minute_file_in_a_declared_thirty_minute_stream_is_refused(demo, work, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])
    hourly = write_input(tmp_path, header + "".join(r for r in rows if r[14:16] == "00"))
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], hourly, "--out", work)
    assert_refused(rc, err, str(hourly))
    assert tree(work) == before


def test_whole_file_day_month_swapped_is_refused(demo, work, tmp_path, capsys):
    # a week with several days <= 12, so that every stamp of the edited file still parses
    for week in demo["weeks"]:
        header, rows = csv_parts(week)
        rows = [r for r in rows if pd.Timestamp(r.split(",", 1)[0]).day <= 12]
        if len({r.split(" ", 1)[0] for r in rows}) >= 3:
            break
    assert rows
    bad = write_input(tmp_path, header + "".join(restamp(rows, lambda t: t.strftime("%Y-%d-%m %H:%M:%S"))))
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], bad, "--out", work)
    assert rc == 1 and "swapped" in err
    assert tree(work) == before


def test_undeclared_decimal_comma_is_refused(demo, work, tmp_path, capsys):
    header, rows = csv_parts(demo["weeks"][2])
    bad = write_input(tmp_path, header.replace(",", ";")
                      + "".join(r.replace(",", ";").replace(".", ",") for r in rows))
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], bad, "--out", work)
    assert_refused(rc, err, str(bad))
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
        ("truncated last line", header + body[:-40], "truncated write", False),
        ("garbage in numeric cells",
         header + "".join(",".join(["#VALUE!" if k == 2 else f for k, f in enumerate(r.split(","))])
                          if i % 40 == 3 else r for i, r in enumerate(rows)), "non-numeric cell", False),
    ]


TOLERATED_CASES = ["rows out of order", "jittered stamps", "24:00 for midnight", "identical duplicate rows",
                   "truncated last line", "garbage in numeric cells"]


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
    if case == "garbage in numeric cells":
        expected = sum(1 for i in range(len(rows)) if i % 40 == 3)
        assert summary(work / SITE)["ingest"]["bad_cells"] == {str(path): expected}
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


# ---------------------------------------------------------------------------------------
# a week from another site
# ---------------------------------------------------------------------------------------
def test_export_of_another_sites_logger_layout_refused(demo, work, tmp_path, capsys):
    """Another demo site's export (its own logger layout) does not fit this site's stream."""
    other = sorted((demo["root"] / "raw" / "demo-valley-crop").glob("*.csv"))[0]
    path = write_input(tmp_path, other.read_bytes())  # renamed to match this site's file pattern
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], path, "--out", work)
    assert_refused(rc, err, str(path), "row 1", "not found")
    assert tree(work) == before


@pytest.mark.parametrize("hours", [
    0.5,
    2.0,
], ids=["7.5 degrees west", "30 degrees west"])
def test_week_from_a_distant_site_flagged_by_the_solar_clock_check(hours, demo, tmp_path, capsys):
    """The same logger layout, but the week was recorded ``15 * hours`` degrees of longitude
    further west: the sun runs late on the logger's clock by 4 min per degree (solar
    geometry), which the health stage's clock check must report for that week. Neighbouring
    sites (< 15 min, under 4 degrees apart) are below its threshold by design."""
    header, rows = csv_parts(demo["weeks"][1])
    path = write_input(tmp_path, header + "".join(
        restamp(rows, lambda t: f"{t + pd.Timedelta(hours=hours):%Y-%m-%d %H:%M:%S}")),
        name=f"{SITE}_export_20250303.csv")
    out = tmp_path / "out"
    for week in (demo["weeks"][0], path):
        rc, err = run_cli(capsys, demo["toml"], week, "--out", out)
        assert rc == 0, err
    health = summary(out / SITE)["health"]
    (week,) = [w for w in health["weeks"] if w["start"] == "2025-03-03"]
    clock = [f for f in health["findings"] if f["check"] == "clock_offset" and f["week"] == week["week"]]
    assert clock and clock[0]["severity"] == "act", (week, clock)
    # 4 min per degree: the Earth turns 360 degrees in 24 h (solar geometry); 10 min: our tolerance
    assert abs(week["clock_offset_minutes"] - 60 * hours) <= 10, week


# ---------------------------------------------------------------------------------------
# faults: a failure or a kill while writing
# ---------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def replace_targets(demo, baseline, tmp_path_factory) -> list[str]:
    """Destinations of every os.replace of a clean third-week run, in order."""
    out = tmp_path_factory.mktemp("count") / "out"
    shutil.copytree(baseline, out)
    calls = []
    real = os.replace

    def counting(src, dst, *a, **k):
        calls.append(str(dst))
        return real(src, dst, *a, **k)
    os.replace = counting
    try:
        run_site(demo["toml"], [demo["weeks"][2]], out, report=False)
    finally:
        os.replace = real
    return calls


def _check_readable(site_dir: Path) -> None:
    SiteStore(site_dir / "store").verify()
    names = set(OUTPUTS) | {p.name for p in site_dir.iterdir() if p.is_file()}
    for name in sorted(names):
        path = site_dir / name
        if name.endswith(".pdf"):
            assert path.read_bytes().startswith(b"%PDF")
        elif name.endswith(".parquet"):
            pq.read_table(path)
        elif name.endswith(".json"):
            json.loads(path.read_text())
        else:
            path.read_text()


def _run_with_failure(monkeypatch, owner, attr, nth, demo, out) -> None:
    """Add week 3 to ``out`` with ``owner.attr`` failing (a full disk, simulated in-process)
    at its ``nth`` call; what is left must be readable, with no staging or temporary files."""
    real = getattr(owner, attr)
    calls = []

    def failing(*a, **kw):
        calls.append(a)
        if len(calls) == nth:
            raise OSError(28, "No space left on device (simulated)")
        return real(*a, **kw)
    monkeypatch.setattr(owner, attr, failing)
    with pytest.raises(OSError, match="simulated"):
        run_site(demo["toml"], [demo["weeks"][2]], out, report=False)
    monkeypatch.setattr(owner, attr, real)
    site_dir = out / SITE
    _check_readable(site_dir)
    assert not list(site_dir.glob(".staging-*")) and not list(site_dir.rglob("*.tmp"))


def _fault_sweep(demo, baseline, clean3, tmp_path, monkeypatch, targets, which):
    manifest = max(i for i, t in enumerate(targets) if t.endswith("manifest.json"))
    renames = [i for i, t in enumerate(targets) if i > manifest]
    assert renames and all(t.startswith(str(Path(targets[renames[0]]).parent)) for t in
                           (targets[i] for i in renames))  # outputs renamed after the commit
    points = {"store data file": manifest - 1, "store manifest": manifest,
              "first output rename": renames[0], "last output rename": renames[-1]}
    ks = range(len(targets)) if which == "all" else [points[which]]
    for k in ks:
        out = tmp_path / f"k{k}"
        shutil.copytree(baseline, out)
        before = tree(out)
        _run_with_failure(monkeypatch, os, "replace", k + 1, demo, out)
        site_dir = out / SITE
        if k <= manifest:  # nothing renamed yet: everything exactly as it was
            assert tree(out) == before, k
        else:  # the store is committed; each output is either the old or the new complete file
            run_site(demo["toml"], [demo["weeks"][2]], out, report=False)  # the rerun recovers
            assert_same_outputs(site_dir, clean3 / SITE)


@pytest.mark.parametrize("which", ["store manifest", "first output rename"])
def test_failure_between_write_and_rename(which, demo, baseline, clean3, tmp_path, monkeypatch, replace_targets):
    """os.replace fails (a full disk, simulated in-process) at one point of the run's writes."""
    _fault_sweep(demo, baseline, clean3, tmp_path, monkeypatch, replace_targets, which)


@pytest.mark.parametrize("failing_write", [1, 4])
def test_failure_while_staging_outputs(failing_write, demo, baseline, tmp_path, monkeypatch):
    """Writing a staged output fails (the first, or a later one): store and outputs untouched."""
    from towerflow.atomic import StagedFolder

    out = tmp_path / "out"
    shutil.copytree(baseline, out)
    before = tree(out)
    _run_with_failure(monkeypatch, StagedFolder, "write_bytes", failing_write, demo, out)
    assert tree(out) == before


@pytest.mark.slow
def test_failure_at_every_rename(demo, baseline, clean3, tmp_path, monkeypatch, replace_targets):
    _fault_sweep(demo, baseline, clean3, tmp_path, monkeypatch, replace_targets, "all")


def _towerflow(*args) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "towerflow", "run", *map(str, args), "--no-report"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONWARNINGS": "ignore"})


def _sigkill_runs(demo, baseline, clean3, tmp_path, n_kills: int, seed: int) -> list[float]:
    """Kill ``towerflow run`` subprocesses (each adding week 3 to the baseline): half of them at
    a random moment shortly after the run starts writing (its staging folder appears), the
    others at a random moment of the run. Returns (seconds, phase) of each kill."""
    rng = random.Random(seed)
    out = tmp_path / "out"
    shutil.copytree(baseline, out)
    site_dir = out / SITE
    moments = []
    for i in range(n_kills):
        before = tree(out)
        proc = _towerflow(demo["toml"], demo["weeks"][2], "--out", out)
        t0 = time.perf_counter()
        if i % 2 == 0:
            stale = set(site_dir.glob(".staging-*"))  # a killed run's left-over is not this run's
            while proc.poll() is None and not set(site_dir.glob(".staging-*")) - stale:
                time.sleep(0.002)
            time.sleep(rng.uniform(0.0, 0.15))
        else:
            time.sleep(rng.uniform(1.5, 5.0))
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=60)  # reaped: its lock is then stale, not live
        elapsed = time.perf_counter() - t0
        _check_readable(site_dir)
        after = tree(out)
        committed = after[f"{SITE}/store/manifest.json"] != before[f"{SITE}/store/manifest.json"]
        staged = any(k.startswith(f"{SITE}/.staging-") for k in after)
        if proc.returncode != 0:  # killed: outputs change only after the store committed
            outputs_changed = [k for k in after if not k.startswith(f"{SITE}/store/")
                               and not k.startswith(f"{SITE}/.staging-") and after[k] != before.get(k)]
            if outputs_changed:
                assert committed
        phase = ("finished" if proc.returncode == 0 else "after the store commit" if committed
                 else "while staging outputs" if staged else "before writing")
        moments.append((round(elapsed, 2), phase))
        if proc.returncode == 0 or committed:  # the week is in: start the next kill afresh
            if i < n_kills - 1:
                shutil.rmtree(out)
                shutil.copytree(baseline, out)
    # the next run takes over the dead run's lock, removes its left-overs, gives the clean result
    run_site(demo["toml"], [demo["weeks"][2]], out, report=False)
    assert_same_outputs(site_dir, clean3 / SITE)
    assert not (site_dir / "store" / "store.lock").exists()
    assert not list(site_dir.glob(".staging-*"))
    return moments


def test_sigkill_of_a_real_run_leaves_readable_outputs(demo, baseline, clean3, tmp_path):
    _sigkill_runs(demo, baseline, clean3, tmp_path, n_kills=1, seed=1)


@pytest.mark.slow
def test_sigkill_of_a_real_run_many_times(demo, baseline, clean3, tmp_path):
    moments = _sigkill_runs(demo, baseline, clean3, tmp_path, n_kills=8, seed=2)
    print("kills (seconds after start, phase):", moments)


def test_corrupted_store_file_reported_by_name(demo, work, tmp_path, capsys):
    store = work / SITE / "store"
    (data,) = store.glob("stream-*.parquet")
    raw = bytearray(data.read_bytes())
    raw[len(raw) // 2] ^= 0xFF
    data.write_bytes(bytes(raw))
    before = tree(work)
    rc, err = run_cli(capsys, demo["toml"], demo["weeks"][2], "--out", work)
    assert_refused(rc, err, str(data), "corrupted")
    assert tree(work) == before
    with pytest.raises(StoreError, match=data.name):
        SiteStore(store).verify()


def test_unreadable_previous_output_does_not_block_the_run(demo, work, clean3, capsys):
    """A damaged intervals.parquet (not the store) is simply replaced by the new run."""
    (work / SITE / "intervals.parquet").write_bytes(b"PAR1 not really parquet")
    rc, err = run_cli(capsys, demo["toml"], demo["weeks"][2], "--out", work)
    assert rc == 0, err
    assert_same_outputs(work / SITE, clean3 / SITE)


# ---------------------------------------------------------------------------------------
# concurrency and idempotency
# ---------------------------------------------------------------------------------------
def test_two_runs_on_one_site_at_once(demo, work, clean3):
    """Both finish, or the second stops with the lock / 'run again' message; never corrupted."""
    a = _towerflow(demo["toml"], demo["weeks"][2], "--out", work)
    b = _towerflow(demo["toml"], demo["weeks"][2], "--out", work)
    results = [(p.wait(timeout=180), p.stderr.read()) for p in (a, b)]
    assert any(rc == 0 for rc, _ in results), results
    for rc, err in results:
        if rc != 0:
            assert rc == 1 and ("store is locked by pid" in err or "run again" in err), err
            assert err.strip().count("\n") == 0
    SiteStore(work / SITE / "store").verify()
    _check_readable(work / SITE)
    assert_same_outputs(work / SITE, clean3 / SITE)


def test_weeks_out_of_order_and_repeated_give_the_clean_result(demo, clean3, tmp_path, capsys):
    w1, w2, w3 = demo["weeks"]
    out = tmp_path / "shuffled"
    for week in (w3, w1, w2):
        rc, err = run_cli(capsys, demo["toml"], week, "--out", out)
        assert rc == 0, err
    assert_same_outputs(out / SITE, clean3 / SITE)
    store_before = tree(out / SITE / "store")
    rc, err = run_cli(capsys, demo["toml"], w2, "--out", out)  # the same week again
    assert rc == 0, err
    assert tree(out / SITE / "store") == store_before
    assert_same_outputs(out / SITE, clean3 / SITE)
    assert summary(out / SITE)["store"]["already_ingested"] == 1


def test_all_weeks_in_one_run_give_the_clean_result(demo, clean3, tmp_path, capsys):
    out = tmp_path / "together"
    rc, err = run_cli(capsys, demo["toml"], *reversed(demo["weeks"]), "--out", out)
    assert rc == 0, err
    assert_same_outputs(out / SITE, clean3 / SITE)


# ---------------------------------------------------------------------------------------
# security: configuration is data, paths are confined, the server is local
# ---------------------------------------------------------------------------------------
_FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__", "execfile"}
_FORBIDDEN_MODULES = {"pickle", "cPickle", "dill", "cloudpickle", "marshal", "shelve"}


def test_no_code_execution_paths_in_the_package():
    """No eval/exec/compile/__import__, no pickle-like loaders, no shell=True, no yaml.load."""
    import ast

    suspicious = re.compile(r"eval|exec|compile|__import__|pickle|dill|marshal|shelve|yaml|shell")
    found = []
    for folder in ("pipeline", "towerflow", "flows", "reports", "qc_rules"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            source = path.read_text()
            if not suspicious.search(source):
                continue
            tree_ = ast.parse(source, filename=str(path))
            for node in ast.walk(tree_):
                where = f"{path.relative_to(ROOT)}:{getattr(node, 'lineno', 0)}"
                if isinstance(node, ast.Call):
                    fn = node.func
                    name = fn.id if isinstance(fn, ast.Name) else fn.attr if isinstance(fn, ast.Attribute) else ""
                    if isinstance(fn, ast.Name) and name in _FORBIDDEN_CALLS:
                        found.append(f"{where}: {name}()")
                    if isinstance(fn, ast.Attribute) and name in ("load", "unsafe_load") and \
                            isinstance(fn.value, ast.Name) and fn.value.id == "yaml":
                        found.append(f"{where}: yaml.{name}()")
                    for kw in node.keywords:
                        if kw.arg == "shell" and not (isinstance(kw.value, ast.Constant) and kw.value.value is False):
                            found.append(f"{where}: shell=")
                elif isinstance(node, (ast.Import, ast.ImportFrom)):
                    names = [a.name for a in node.names] + ([node.module] if isinstance(node, ast.ImportFrom)
                                                            and node.module else [])
                    if any(n.split(".")[0] in _FORBIDDEN_MODULES for n in names):
                        found.append(f"{where}: import {names}")
    assert not found, found


def test_expression_in_configuration_is_plain_text(demo, tmp_path, capsys):
    marker = tmp_path / "executed"
    payload = f"__import__('os').system('touch {marker}')"
    toml = _variant_config(demo, tmp_path, 'name = "Demo Upland Grassland (invented)"',
                           f'name = "{payload}"')
    text = toml.read_text().replace('reason = "site visit: analyser cleaned, people at the tower"',
                                    f'reason = "{payload}"')
    toml.write_text(text)
    out = tmp_path / "out"
    rc, err = run_cli(capsys, toml, demo["weeks"][1], "--out", out)
    assert rc == 0, err
    assert not marker.exists()
    meta = json.loads(pq.read_schema(out / SITE / "intervals.parquet").metadata[b"towerflow"])
    assert meta["site_name"] == payload  # carried as the literal text


def test_expression_where_a_number_is_expected_is_refused(demo, work, tmp_path, capsys):
    marker = tmp_path / "executed"
    toml = _variant_config(demo, tmp_path, "elevation_m = 1240.0",
                           f"elevation_m = \"__import__('os').system('touch {marker}') or 1240\"")
    rc, err = run_cli(capsys, toml, demo["weeks"][2], "--out", work)
    assert_refused(rc, err, str(toml), "key 'site.elevation_m'")
    assert not marker.exists()


def test_network_data_glob_confined_to_the_network_folder(demo, tmp_path):
    from pipeline.config import load_network_config
    from pipeline.errors import ConfigError

    text = (demo["root"] / "network.toml").read_text()
    bad = re.sub(r'data = "raw/demo-upland-grassland/\*\.csv"', 'data = "../../elsewhere/*.csv"', text)
    assert bad != text
    net = demo["root"] / "network-escape.toml"
    net.write_text(bad)
    with pytest.raises(ConfigError) as info:
        load_network_config(net)
    assert info.value.key.startswith("network.sites[") and info.value.key.endswith(".data")


def test_site_output_folder_cannot_leave_dir(tmp_path):
    from towerflow.runner import site_output_dir

    assert site_output_dir(tmp_path, "demo-upland-grassland") == (tmp_path / "demo-upland-grassland").resolve()
    for bad in ("../x", "..", "/tmp/x", "a/../../x", ""):
        with pytest.raises(TowerflowError):
            site_output_dir(tmp_path, bad)


def test_documented_prefect_server_command_binds_localhost(demo, capsys, monkeypatch):
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    capsys.readouterr()
    rc = cli.main(["serve", str(demo["root"] / "network.toml"), "--cron", "0 6 * * 1"])
    err = capsys.readouterr().err
    assert rc == 1 and "prefect server start --host 127.0.0.1" in err and "0.0.0.0" not in err
    documented = []
    for doc in ("README.md", "DEVELOPERS.md", "towerflow/cli.py"):
        text = (ROOT / doc).read_text()
        for m in re.finditer(r"prefect server start[^\n`'\"]*", text):
            documented.append((doc, m.group(0)))
    assert documented
    for doc, command in documented:
        # --host 127.0.0.1, or no --host at all: Prefect's default host is 127.0.0.1 (checked in
        # test_prefect_server_default_host_is_localhost); never another address
        host = re.search(r"--host[ =](\S+)", command)
        assert host is None or host.group(1) in ("127.0.0.1", "localhost"), (doc, command)
    assert "0.0.0.0" not in (ROOT / "README.md").read_text()


@pytest.mark.slow
def test_prefect_server_default_host_is_localhost():
    from prefect.settings import get_current_settings

    assert get_current_settings().server.api.host == "127.0.0.1"


# ---------------------------------------------------------------------------------------
# network isolation
# ---------------------------------------------------------------------------------------
@pytest.mark.slow
def test_a_site_crashing_in_a_stage_does_not_stop_the_others(demo, tmp_path, capsys, monkeypatch):
    """One site's gap-filling raises an unexpected error: the others finish, exit status 1."""
    import pipeline.gapfill as gapfill

    real = gapfill.fill_gaps

    def crashing(frame, flags, site, rules, *a, **k):
        if site.id == "demo-ridge-forest":
            raise RuntimeError("simulated crash in the filling stage")
        return real(frame, flags, site, rules, *a, **k)
    monkeypatch.setattr(gapfill, "fill_gaps", crashing)
    out = tmp_path / "net"
    capsys.readouterr()
    rc = cli.main(["network", str(demo["root"] / "network.toml"), "--out", str(out), "--no-report",
                   "--workers", "1"])
    err = capsys.readouterr().err
    assert rc == 1 and "demo-ridge-forest" in err and "simulated crash" in err
    table = pd.read_csv(out / "network_summary.csv").set_index("site")
    assert table.loc["demo-ridge-forest", "status"] == "failed"
    assert (table.drop(index="demo-ridge-forest")["status"] == "ok").all() and len(table) == 3
    assert not (out / "demo-ridge-forest" / "intervals.parquet").exists()


def test_two_stream_site_weeks_in_any_order_give_the_same_outputs(demo, tmp_path, capsys):
    """The forest site (a 30-min flux logger and a 10-min met logger aggregated to 30 min):
    week by week in order, or every file of both loggers at once in reverse order."""
    site = "demo-ridge-forest"
    toml = demo["root"] / "sites" / f"{site}.toml"
    files = sorted((demo["root"] / "raw" / site).glob("*.csv"))
    weeks = sorted({f.stem.rsplit("_", 1)[1] for f in files})
    ordered = tmp_path / "ordered"
    for week in weeks:
        rc, err = run_cli(capsys, toml, *[f for f in files if f.stem.endswith(week)], "--out", ordered)
        assert rc == 0, err
    together = tmp_path / "together"
    rc, err = run_cli(capsys, toml, *reversed(files), "--out", together)
    assert rc == 0, err
    assert_same_outputs(ordered / site, together / site)

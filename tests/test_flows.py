"""The site and network jobs: Prefect flows, failure isolation, Dask, incremental runs, change log.

All data are invented (towerflow.demo, 14 days per site). Only the tests marked
``prefect`` use the session-wide Prefect test server (13–21 s to start); everything else
calls the plain functions the flows wrap. Expected values are consequences of the data
contract (CONTRACT §3–4) or of the invented inputs written here, never stored numbers.
"""
from __future__ import annotations

import glob
import json
import re
import shutil
from collections import defaultdict
from pathlib import Path

import pandas as pd
import pytest

from pipeline.config import load_network_config
from towerflow.cli import main
from towerflow.demo.network import write_demo_network
from towerflow.network import finish_network, run_network_local, site_jobs
from towerflow.runner import run_site

DAYS = 14
SEED = 7
BROKEN = "demo-ridge-forest"  # the site made to fail


def _frame(site_dir: Path, name: str = "intervals.parquet") -> pd.DataFrame:
    return pd.read_parquet(Path(site_dir) / name)


def _weeks(files: list[str]) -> list[list[str]]:
    """Logger exports grouped by the week in their file name (…_YYYYMMDD.csv)."""
    by_week = defaultdict(list)
    for f in files:
        by_week[re.search(r"_(\d{8})\.csv$", f).group(1)].append(f)
    return [sorted(by_week[k]) for k in sorted(by_week)]


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    """The invented demo network, 14 days per site; returns network.toml."""
    return write_demo_network(tmp_path_factory.mktemp("demo-net"), days=DAYS, seed=SEED)


@pytest.fixture(scope="module")
def broken_network(tmp_path_factory, demo) -> Path:
    """A copy of the demo network whose forest site names an unknown unit."""
    root = tmp_path_factory.mktemp("broken-net")
    shutil.copytree(demo.parent, root, dirs_exist_ok=True)
    toml = root / "sites" / f"{BROKEN}.toml"
    text = toml.read_text()
    assert 'ta = "K"' in text
    toml.write_text(text.replace('ta = "K"', 'ta = "kelvins"'))
    return root / "network.toml"


@pytest.fixture(scope="module")
def local_run(tmp_path_factory, broken_network):
    """The broken network through the CLI's default path (plain processes, one worker)."""
    out = tmp_path_factory.mktemp("local-out")
    code = main(["network", str(broken_network), "--out", str(out), "--no-report", "--workers", "1"])
    return code, out


# ---------------------------------------------------------------------------------------
# plain functions (no Prefect)
# ---------------------------------------------------------------------------------------


def test_network_isolates_a_broken_site(local_run, capsys):
    """CONTRACT §3: the other sites finish, the summary names the error, exit non-zero."""
    code, out = local_run
    assert code == 1
    summary = pd.read_csv(out / "network_summary.csv", keep_default_na=False)
    assert list(summary.columns[:3]) == ["site", "status", "error"]
    rows = summary.set_index("site")
    assert rows.loc[BROKEN, "status"] == "failed"
    error = rows.loc[BROKEN, "error"]
    assert "kelvins" in error and f"{BROKEN}.toml" in error and "input" in error  # file and key named
    assert "\n" not in error
    ok = rows[rows.status == "ok"]
    assert len(ok) == 2 and (ok.error == "").all()
    assert ok["closure_ebr"].astype(float).notna().all()
    for site in ok.index:
        assert (out / site / "intervals.parquet").exists()
    assert not (out / BROKEN / "intervals.parquet").exists()


def test_incremental_weekly_runs_equal_one_full_run(tmp_path, demo, capsys):
    """Week-by-week `towerflow run` and one run over all files give equal outputs."""
    cfg = demo.parent / "sites" / f"{BROKEN}.toml"  # two loggers (flux + 10-min met)
    files = sorted(glob.glob(str(demo.parent / "raw" / BROKEN / "*.csv")))
    weeks = _weeks(files)
    assert len(weeks) >= 3
    for week in weeks:
        assert main(["run", str(cfg), *week, "--out", str(tmp_path / "weekly"), "--no-report"]) == 0
    assert main(["run", str(cfg), *files, "--out", str(tmp_path / "full"), "--no-report"]) == 0
    for name in ("intervals.parquet", "daily.parquet"):
        pd.testing.assert_frame_equal(_frame(tmp_path / "weekly" / BROKEN, name),
                                      _frame(tmp_path / "full" / BROKEN, name))
    log = json.loads((tmp_path / "weekly" / BROKEN / "changes.json").read_text())
    assert log["new_intervals"] > 0
    assert any(r.startswith("new data were added") for r in log["reasons"])


@pytest.fixture(scope="module")
def grass_site(tmp_path_factory, demo):
    """The grassland's configuration copied to a folder the change-log tests may edit."""
    root = tmp_path_factory.mktemp("grass")
    cfg = root / "grass.toml"
    cfg.write_text((demo.parent / "sites" / "demo-upland-grassland.toml").read_text())
    files = sorted(glob.glob(str(demo.parent / "raw" / "demo-upland-grassland" / "*.csv")))
    return cfg, files, root / "out"


def _log(out: Path) -> tuple[dict, str]:
    site = out / "demo-upland-grassland"
    return json.loads((site / "changes.json").read_text()), (site / "changes.md").read_text()


def test_change_log_new_week_history_entry_rule_override(grass_site):
    """The change log names new data, a new [[history]] entry and a rule override, with periods."""
    cfg, files, out = grass_site
    weeks = _weeks(files)
    run_site(cfg, [f for w in weeks[:-1] for f in w], out, report=False)
    log, md = _log(out)
    assert log["first_run"] is True

    # 1. a new week: new data, new intervals after the previous end, no config/rule reason
    before = _frame(out / "demo-upland-grassland")
    run_site(cfg, weeks[-1], out, report=False)
    after = _frame(out / "demo-upland-grassland")
    log, md = _log(out)
    assert any(r.startswith("new data were added") for r in log["reasons"])
    assert not any("configuration" in r or "rule" in r for r in log["reasons"])
    assert log["new_intervals"] == len(after) - len(before)
    new_start = pd.Timestamp(log["new_period"][0])
    assert new_start > before["timestamp_start"].max()
    assert "new intervals" in md
    assert log["previous_provisional_from"] is not None
    for ch in log["changes"]:  # counts are consistent; periods are in local standard time
        assert 0 <= ch["n_before_provisional"] <= ch["n_intervals"]
        assert all(p.endswith("+01:00") for period in ch["periods"] for p in period)
    changed_flag = [c for c in log["changes"] if c["column"] in ("le_flag", "h_flag")]
    for ch in changed_flag:  # a new week re-tests only the despiking block it reaches (CONTRACT §4)
        assert ch["n_before_provisional"] == 0

    # 2. a new [[history]] entry excluding LE and H for one day inside the record
    day = (before["timestamp_start"].iloc[0] + pd.Timedelta(days=5)).strftime("%Y-%m-%d")
    next_day = (pd.Timestamp(day) + pd.Timedelta(days=1)).strftime("%Y-%m-%d")
    cfg.write_text(cfg.read_text() + f'\n[[history]]\nstart = "{day}"\nend = "{next_day}"\n'
                   'exclude = ["le", "h"]\nreason = "invented test visit"\n')
    run_site(cfg, [], out, report=False)
    log, md = _log(out)
    added = [r for r in log["reasons"] if r.startswith("[[history]] entry added")]
    assert len(added) == 1 and day in added[0] and "invented test visit" in added[0]
    assert not any(r.startswith("new data") for r in log["reasons"])
    le_flag = next(c for c in log["changes"] if c["column"] == "le_flag")
    # every changed LE flag lies in the excluded day (HISTORY bit, CONTRACT §4), local time
    for start, end in le_flag["periods"]:
        assert pd.Timestamp(start) >= pd.Timestamp(day).tz_localize("Etc/GMT-1")
        assert pd.Timestamp(end) < pd.Timestamp(next_day).tz_localize("Etc/GMT-1")
    assert le_flag["n_intervals"] == 48  # one day of 30-min intervals (the site's interval)
    # an exclusion flags the values (bit 64), it does not alter them (CONTRACT §4: as ingested)
    assert not any(c["column"] in ("le", "h") for c in log["changes"])
    assert "invented test visit" in md

    # 3. a rule override: the upper LE limit lowered to the record's 90th percentile (bit 2)
    upper = float(round(before["le"].quantile(0.9)))
    cfg.write_text(cfg.read_text().replace(
        "[qc]\n", f"[qc.override.variables.le]\nrange = [-200.0, {upper}]\n\n[qc]\n", 1))
    run_site(cfg, [], out, report=False)
    log, md = _log(out)
    assert any(r.startswith("rule override qc.override.variables.le.range") for r in log["reasons"])
    assert any(r.startswith("the effective rule set changed") and "variables.le.range" in r
               for r in log["reasons"])
    current = _frame(out / "demo-upland-grassland")
    newly_out_of_range = ((current["le"] > upper) & (current["le"] <= 1000)).sum()
    assert newly_out_of_range > 0
    le_flag = next(c for c in log["changes"] if c["column"] == "le_flag")
    assert le_flag["n_intervals"] >= newly_out_of_range

    # 4. nothing changed: the log says so
    run_site(cfg, [], out, report=False)
    log, md = _log(out)
    assert log["reasons"] == ["nothing changed in the inputs"] and log["changes"] == []


# ---------------------------------------------------------------------------------------
# Prefect (one session-wide test server)
# ---------------------------------------------------------------------------------------


@pytest.mark.prefect
def test_site_flow_end_to_end(prefect_server, tmp_path, demo):
    """The site flow (a task per stage, state through files) equals the plain runner."""
    from flows.site import site_flow

    cfg = demo.parent / "sites" / "demo-valley-crop.toml"
    files = sorted(glob.glob(str(demo.parent / "raw" / "demo-valley-crop" / "*.csv")))
    site_dir = Path(site_flow(str(cfg), files, str(tmp_path / "flow"), report=False))
    assert site_dir == (tmp_path / "flow" / "demo-valley-crop").resolve()
    assert not list(site_dir.glob(".work-*"))  # the work folder is removed
    run_site(cfg, files, tmp_path / "plain", report=False)
    for name in ("intervals.parquet", "daily.parquet"):
        pd.testing.assert_frame_equal(_frame(site_dir, name), _frame(tmp_path / "plain" / "demo-valley-crop", name))
    a = json.loads((site_dir / "summary.json").read_text())
    b = json.loads((tmp_path / "plain" / "demo-valley-crop" / "summary.json").read_text())
    for key in ("closure", "gaps", "spikes", "fill_skill", "provisional_from", "n_intervals"):
        assert a[key] == b[key]


@pytest.mark.prefect
def test_network_flow_on_dask_isolates_failure_and_matches_local(prefect_server, tmp_path, broken_network,
                                                                   local_run):
    """The network flow on a local Dask cluster of 2 workers, one site broken: the others
    complete, the summary names the error, and the outputs equal the local process run."""
    from flows.network import with_dask

    network = load_network_config(broken_network)
    _, local_out = local_run
    out = tmp_path / "dask"
    out.mkdir()
    results = with_dask(workers=2)(site_jobs(network, out, report=False))
    finish_network(network, out, results, report=False)
    status = {r["site"]: r["status"] for r in results}
    assert status[BROKEN] == "failed" and list(status.values()).count("ok") == 2
    summary = pd.read_csv(out / "network_summary.csv", keep_default_na=False).set_index("site")
    local = pd.read_csv(local_out / "network_summary.csv", keep_default_na=False).set_index("site")
    assert "kelvins" in summary.loc[BROKEN, "error"]
    pd.testing.assert_frame_equal(summary, local)  # same rows, statuses, errors and statistics
    for site in summary.index[summary.status == "ok"]:
        for fname in ("intervals.parquet", "daily.parquet"):
            pd.testing.assert_frame_equal(_frame(out / site, fname), _frame(local_out / site, fname))

"""The command line (CONTRACT §3): errors as one line naming file and row/key, exit status,
nothing written by a failed run, the options of `towerflow network`.

Invented data only (towerflow.demo, 8 days); no Prefect (plain runner).
"""
from __future__ import annotations

import glob
import json
import shutil
from pathlib import Path

import pandas as pd
import pytest

from towerflow.cli import build_parser, main
from towerflow.demo.network import write_demo_network

SITE = "demo-upland-grassland"


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    return write_demo_network(tmp_path_factory.mktemp("cli-demo"), days=8, seed=3)


@pytest.fixture()
def site(demo):
    cfg = demo.parent / "sites" / f"{SITE}.toml"
    files = sorted(glob.glob(str(demo.parent / "raw" / SITE / "*.csv")))
    return cfg, files


def _tree(folder: Path) -> dict:
    """Every file under ``folder`` with its bytes (to prove nothing changed)."""
    if not folder.exists():
        return {}
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _one_error_line(err: str) -> str:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("towerflow: error: ")
    return lines[0]


def test_run_missing_file(tmp_path, site, capsys):
    cfg, files = site
    missing = str(Path(files[0]).with_name("no-such-export.csv"))
    assert main(["run", str(cfg), files[0], missing, "--out", str(tmp_path), "--no-report"]) == 1
    line = _one_error_line(capsys.readouterr().err)
    assert "no-such-export.csv" in line and "not found" in line
    assert _tree(tmp_path) == {}  # nothing written, not even the site folder


def test_run_missing_config(tmp_path, capsys):
    assert main(["run", str(tmp_path / "nowhere.toml"), "--out", str(tmp_path / "out")]) == 1
    line = _one_error_line(capsys.readouterr().err)
    assert "nowhere.toml" in line
    assert not (tmp_path / "out").exists()


def test_run_broken_toml(tmp_path, site, capsys):
    cfg, files = site
    broken = tmp_path / "broken.toml"
    broken.write_text(cfg.read_text() + "\nlatitude = = 3\n")
    out = tmp_path / "out"
    assert main(["run", str(broken), *files, "--out", str(out), "--no-report"]) == 1
    line = _one_error_line(capsys.readouterr().err)
    assert "broken.toml" in line and "line" in line  # the file and the line at fault
    assert _tree(out) == {}


def test_run_unknown_unit_names_the_key(tmp_path, site, capsys):
    """CONTRACT §1: an unknown unit string is a configuration error naming the key."""
    cfg, files = site
    bad = tmp_path / "bad-unit.toml"
    bad.write_text(cfg.read_text().replace('swc = "percent"', 'swc = "percents"'))
    assert 'swc = "percents"' in bad.read_text()
    assert main(["run", str(bad), *files, "--out", str(tmp_path / "out"), "--no-report"]) == 1
    line = _one_error_line(capsys.readouterr().err)
    assert "bad-unit.toml" in line and "swc" in line and "percents" in line


def test_bad_csv_leaves_store_and_outputs_unchanged(tmp_path, site, capsys):
    """A broken file stops the run before anything is written (CONTRACT §3)."""
    cfg, files = site
    out = tmp_path / "out"
    assert main(["run", str(cfg), *files[:-1], "--out", str(out), "--no-report"]) == 0
    before = _tree(out)
    assert f"{SITE}/intervals.parquet" in before
    capsys.readouterr()
    lines = Path(files[-1]).read_text().splitlines()
    lines[5] = lines[5] + ",1.0,2.0"  # a row with two fields too many
    bad = tmp_path / Path(files[-1]).name
    bad.write_text("\n".join(lines) + "\n")
    assert main(["run", str(cfg), str(bad), "--out", str(out), "--no-report"]) == 1
    line = _one_error_line(capsys.readouterr().err)
    assert bad.name in line and "row" in line
    assert _tree(out) == before


def test_network_workers_and_summary(tmp_path, demo, capsys):
    """`towerflow network --workers 2` (process pool): every site ok, exit 0, summary rows."""
    out = tmp_path / "out"
    assert main(["network", str(demo), "--out", str(out), "--no-report", "--workers", "2"]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""  # quiet: nothing on stderr when all went well
    summary = pd.read_csv(out / "network_summary.csv", keep_default_na=False)
    assert sorted(summary["site"]) == sorted(p.stem for p in (demo.parent / "sites").glob("*.toml"))
    assert (summary["status"] == "ok").all() and (summary["error"] == "").all()
    for s in summary["site"]:
        assert json.loads((out / s / "summary.json").read_text())["site"] == s


def test_network_missing_network_file(tmp_path, capsys):
    assert main(["network", str(tmp_path / "none.toml"), "--out", str(tmp_path / "out")]) == 1
    assert "none.toml" in _one_error_line(capsys.readouterr().err)


def test_network_options_parse():
    args = build_parser().parse_args(["network", "n.toml", "--out", "o", "--dask", "--workers", "3"])
    assert args.dask and args.workers == 3 and args.dask_address is None
    args = build_parser().parse_args(["network", "n.toml", "--out", "o", "--dask-address", "tcp://127.0.0.1:8786"])
    assert args.dask_address == "tcp://127.0.0.1:8786"


def test_network_rejects_zero_workers(tmp_path, demo, capsys):
    assert main(["network", str(demo), "--out", str(tmp_path / "o"), "--workers", "0"]) == 1
    assert "--workers" in _one_error_line(capsys.readouterr().err)
    assert not (tmp_path / "o").exists()


def test_serve_without_server_is_one_line_error(tmp_path, demo, capsys, monkeypatch):
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    assert main(["serve", str(demo), "--cron", "0 6 * * 1", "--out", str(tmp_path / "o")]) == 1
    line = _one_error_line(capsys.readouterr().err)
    assert "prefect server start" in line


@pytest.mark.parametrize("cron, tz", [("61 * * * *", "UTC"), ("0 6 * * 1", "Mars/Base")])
def test_serve_rejects_bad_schedule(tmp_path, demo, capsys, monkeypatch, cron, tz):
    """A bad cron expression or time zone is one line naming the option; nothing is served.

    PREFECT_API_URL points at a closed port: the schedule is checked before any server call.
    """
    import towerflow.cli as cli

    monkeypatch.setenv("PREFECT_API_URL", "http://127.0.0.1:9/api")
    monkeypatch.setattr(cli, "_quiet_prefect", lambda verbose: None)  # keeps os.environ as it is
    assert main(["serve", str(demo), "--cron", cron, "--timezone", tz, "--out", str(tmp_path / "o")]) == 1
    line = _one_error_line(capsys.readouterr().err)
    assert "--cron" in line and "not a valid schedule" in line


def test_run_and_network_with_reports(tmp_path, demo, capsys):
    """With reports on: the site's qc_report.pdf and the network_report.pdf are written and
    readable (pypdf), after the data outputs."""
    from pypdf import PdfReader

    from pipeline.config import load_network_config
    from towerflow.network import finish_network

    cfg = demo.parent / "sites" / "demo-valley-crop.toml"  # the smallest site (60-min logger)
    files = sorted(glob.glob(str(demo.parent / "raw" / "demo-valley-crop" / "*.csv")))
    out = tmp_path / "out"
    assert main(["run", str(cfg), *files, "--out", str(out)]) == 0
    pdf = out / "demo-valley-crop" / "qc_report.pdf"
    assert len(PdfReader(pdf).pages) >= 1
    network = load_network_config(demo)
    results = [{"index": 0, "site": "demo-valley-crop", "status": "ok", "error": "", "timings": {}},
               {"index": 1, "site": "demo-ridge-forest", "status": "failed",
                "error": "demo-ridge-forest.toml: invented failure for the report", "timings": {}}]
    finish_network(network, out, results, report=True)
    assert len(PdfReader(out / "network_report.pdf").pages) >= 1
    summary = pd.read_csv(out / "network_summary.csv", keep_default_na=False)
    assert list(summary["status"]) == ["ok", "failed"]

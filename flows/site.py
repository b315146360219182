"""The weekly site job as a Prefect flow: one task per stage, passing folder paths.

ingest → qc → closure → filling → uncertainty → conductance → outputs → report. Between tasks the
state lives in a work folder (parquet + JSON) under DIR/SITE_ID/, removed at the end;
no frame travels through Prefect. Retries only where a failure can pass (the file
system); bad data raise :class:`~pipeline.errors.TowerflowError`, which is never retried.

Without a Prefect server (``PREFECT_API_URL`` unset), ``towerflow run`` does not use this
flow: it calls :func:`towerflow.runner.run_site` directly, which runs the same stages in
one process and saves Prefect's 10–20 s start-up.
"""
from __future__ import annotations

import json
import shutil
import tempfile
from pathlib import Path

import pandas as pd
from prefect import flow, task
from prefect.cache_policies import NO_CACHE

from pipeline.errors import TowerflowError

__all__ = ["site_flow", "save_state", "load_state"]


def _retry_on_os_error(task, task_run, state) -> bool:
    """Retry only failures that can pass (file system), never bad data."""
    try:
        state.result()
    except TowerflowError:
        return False
    except OSError:
        return True
    except Exception:
        return False
    return False


def save_state(state, folder: Path) -> Path:
    """Write a :class:`pipeline.process.SiteState` to ``folder`` (parquet + JSON)."""
    folder.mkdir(parents=True, exist_ok=True)
    state.frame_ingested.to_parquet(folder / "frame_ingested.parquet")
    state.frame.to_parquet(folder / "frame.parquet")
    state.flags.to_parquet(folder / "flags.parquet")
    for name, cols in state.columns.items():
        cols.to_parquet(folder / f"columns-{name}.parquet")
    for name, daily in state.daily.items():
        d = daily.copy()
        d.index = pd.to_datetime(pd.Index(d.index))
        d.to_parquet(folder / f"daily-{name}.parquet")
    for name, nb in state.neighbours.items():
        nb.to_parquet(folder / f"neighbour-{name}.parquet")
    from pipeline.outputs import json_ready

    meta = {"config": str(state.cfg.path), "interval_minutes": state.site.interval_minutes,
            "rules": state.rules, "summary": state.summary, "warnings": state.warnings,
            "columns": list(state.columns), "daily": list(state.daily),
            "neighbours": list(state.neighbours)}
    (folder / "state.json").write_text(json.dumps(json_ready(meta)))
    return folder


def load_state(folder: Path):
    """Read back what :func:`save_state` wrote."""
    from dataclasses import replace

    from pipeline.config import load_site_config
    from pipeline.process import SiteState

    meta = json.loads((folder / "state.json").read_text())
    cfg = load_site_config(meta["config"])
    cfg = replace(cfg, site=replace(cfg.site, interval_minutes=meta["interval_minutes"]))
    state = SiteState(cfg=cfg, rules=meta["rules"],
                      frame_ingested=pd.read_parquet(folder / "frame_ingested.parquet"),
                      frame=pd.read_parquet(folder / "frame.parquet"),
                      flags=pd.read_parquet(folder / "flags.parquet"),
                      summary=meta["summary"], warnings=meta["warnings"])
    for name in meta["columns"]:
        state.columns[name] = pd.read_parquet(folder / f"columns-{name}.parquet")
    for name in meta["daily"]:
        state.daily[name] = pd.read_parquet(folder / f"daily-{name}.parquet")
    for name in meta.get("neighbours", []):
        state.neighbours[name] = pd.read_parquet(folder / f"neighbour-{name}.parquet")
    return state


@task(name="ingest", cache_policy=NO_CACHE)
def ingest_task(config_path: str, files: list[str], out_dir: str, supersede: bool,
                rules_spec: str | None) -> str:
    """Parse the files, merge them into a staged copy of the store, build the working frame."""
    from towerflow.runner import prepare_site

    prepared = prepare_site(config_path, files, out_dir, supersede=supersede, rules_spec=rules_spec)
    prepared.site_dir.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=".work-", dir=prepared.site_dir))
    save_state(prepared.state, work)
    prepared.pending.save(work / "pending-store")
    return str(work)


def _stage_task(stage: str):
    @task(name=stage, cache_policy=NO_CACHE)
    def run(work: str) -> str:
        from pipeline.process import run_stage

        folder = Path(work)
        state = run_stage(stage, load_state(folder))
        save_state(state, folder)
        return work

    return run


qc_task = _stage_task("qc")
closure_task = _stage_task("closure")
filling_task = _stage_task("filling")
uncertainty_task = _stage_task("uncertainty")
conductance_task = _stage_task("conductance")


@task(name="outputs", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=2,
      retry_condition_fn=_retry_on_os_error)
def outputs_task(work: str) -> str:
    """Commit the staged store, then write the outputs atomically."""
    from towerflow.runner import finish_site

    folder = Path(work)
    site_dir = finish_site(load_state(folder), folder / "pending-store")
    return str(site_dir)


@task(name="report", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=2,
      retry_condition_fn=_retry_on_os_error)
def report_task(site_dir: str) -> str:
    from reports.site import write_site_report

    return str(write_site_report(Path(site_dir)))


@flow(name="towerflow-site", log_prints=False)
def site_flow(config_path: str, files: list[str], out_dir: str, supersede: bool = False,
              rules_spec: str | None = None, report: bool = True) -> str:
    """The weekly job for one site; returns the site's output folder."""
    work = ingest_task(config_path, files, out_dir, supersede, rules_spec)
    try:
        work = qc_task(work)
        work = closure_task(work)
        work = filling_task(work)
        work = uncertainty_task(work)
        work = conductance_task(work)
        site_dir = outputs_task(work)
    finally:
        shutil.rmtree(work, ignore_errors=True)
        try:  # a failed first run leaves no empty site folder behind
            Path(work).parent.rmdir()
        except OSError:
            pass
    if report:
        report_task(site_dir)
    return site_dir

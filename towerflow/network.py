"""Running a whole network: one job per site, isolated failures, the network summary.

The same site job (:func:`run_site_job`) runs in a local process pool (the default, no
Prefect server needed), or as Prefect tasks (``flows/network.py``) on threads or Dask.
"""
from __future__ import annotations

import glob
import json
import os
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path

import pandas as pd

from pipeline.config import NetworkConfig, load_network_config, load_site_config
from pipeline.errors import TowerflowError

from .atomic import atomic_write_bytes

__all__ = ["site_jobs", "run_site_job", "run_network_local", "write_network_summary", "one_line"]


def one_line(exc: BaseException) -> str:
    """The one-line message of an error: ours as they are, others with their type."""
    if isinstance(exc, TowerflowError):
        return str(exc)
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def site_jobs(network: NetworkConfig, out_dir: Path, *, report: bool = True) -> list[dict]:
    """One job description (plain, picklable) per site of the network."""
    jobs = []
    for i, site in enumerate(network.sites):
        files = sorted(glob.glob(str(site.data)))
        jobs.append({
            "index": i,
            "config": str(site.config),
            "files": files,
            "out_dir": str(out_dir),
            "rules": network.rules,
            "report": report,
            "network_file": str(network.path),
        })
    return jobs


_progress_queue = None  # set in pool workers when the parent shows a progress bar


def _init_worker(queue) -> None:
    """Pool-worker initializer: where to send (site, stage) progress messages."""
    global _progress_queue
    _progress_queue = queue


def run_site_job(job: dict, on_stage=None) -> dict:
    """Run one site; never raises: a failure is returned as ``status = "failed"``.

    ``on_stage`` (optional) is called with ``(index, stage name)`` as each stage starts; in a
    pool worker started by :func:`run_network_local` with progress on, the messages go to
    the parent's progress bar instead.
    """
    from .runner import run_site

    if on_stage is None and _progress_queue is not None:
        on_stage = lambda index, name: _progress_queue.put((index, name))  # noqa: E731
    index = job.get("index", 0)
    site_id = Path(job["config"]).stem
    cpu0 = time.process_time()
    try:
        try:
            site_id = load_site_config(job["config"]).site.id
        except Exception:  # the same error is raised again, properly, by run_site
            pass
        rules = job.get("rules")
        rules_path = None
        if rules and rules != "standard":
            candidate = Path(job["network_file"]).parent / rules
            rules_path = str(candidate) if candidate.exists() else rules
        outcome = run_site(job["config"], job["files"], job["out_dir"],
                           rules_spec=rules_path or rules, report=job.get("report", True),
                           supersede=job.get("supersede", False),
                           on_stage=(lambda name: on_stage(index, name)) if on_stage else None)
        return {"index": index, "site": outcome.site, "status": "ok", "error": "",
                "timings": {**outcome.timings, "cpu": time.process_time() - cpu0}}
    except Exception as exc:  # isolation: any failure of one site is reported, never raised
        return {"index": index, "site": site_id, "status": "failed",
                "error": one_line(exc), "timings": {}}


def run_network_local(jobs: list[dict], *, workers: int | None = None, on_done=None,
                      on_stage=None) -> list[dict]:
    """Run the jobs in a local process pool (``workers`` processes; 1 = in this process).

    Parameters
    ----------
    jobs : list of dict
        From :func:`site_jobs`.
    workers : int, optional
        Processes; default the smaller of the number of sites and of CPU cores.
    on_done : callable, optional
        Called in this process with each site's result dict as it finishes.
    on_stage : callable, optional
        Called in this process with ``(job index, stage name)`` as a site's stage starts.

    Returns
    -------
    list of dict
        One result per job, in job order.
    """
    workers = workers or min(len(jobs), os.cpu_count() or 1)
    results: list[dict] = []
    if workers <= 1 or len(jobs) <= 1:
        for job in jobs:
            res = run_site_job(job, on_stage=on_stage)
            results.append(res)
            if on_done:
                on_done(res)
        return results
    queue = listener = None
    if on_stage is not None:
        import multiprocessing
        import threading

        queue = multiprocessing.get_context().Queue()

        def listen():
            while (msg := queue.get()) is not None:
                on_stage(*msg)

        listener = threading.Thread(target=listen, daemon=True)
        listener.start()
    try:
        with ProcessPoolExecutor(max_workers=min(workers, len(jobs)), initializer=_init_worker,
                                 initargs=(queue,)) as pool:
            # the longest jobs first, so that no long site is left alone at the end
            order = sorted(jobs, key=_job_size, reverse=True)
            futures = {pool.submit(run_site_job, job): job for job in order}
            for fut in as_completed(futures):
                try:
                    res = fut.result()
                except Exception as exc:  # a worker died (killed, out of memory)
                    job = futures[fut]
                    res = {"index": job["index"], "site": Path(job["config"]).stem, "status": "failed",
                           "error": one_line(exc), "timings": {}}
                results.append(res)
                if on_done:
                    on_done(res)
    finally:
        if queue is not None:
            queue.put(None)
            listener.join(timeout=5)
    return sorted(results, key=lambda r: r["index"])


def _job_size(job: dict) -> int:
    """Bytes of input of a site job (its files), a proxy of its run time."""
    size = 0
    for f in job["files"]:
        try:
            size += os.path.getsize(f)
        except OSError:
            pass
    return size


def _site_row(out_dir: Path, result: dict) -> dict:
    row = {"site": result["site"], "status": result["status"], "error": result["error"]}
    summary_path = out_dir / result["site"] / "summary.json"
    if result["status"] != "ok" or not summary_path.exists():
        return row
    s = json.loads(summary_path.read_text())
    for key in ("ebr", "slope", "intercept", "r2", "n"):
        row[f"closure_{key}"] = (s.get("closure") or {}).get(key)
    for var in ("le", "h"):
        row[f"gap_fraction_{var}"] = (s.get("gaps") or {}).get(var)
        row[f"spikes_{var}"] = (s.get("spikes") or {}).get(var)
        skill = (s.get("fill_skill") or {}).get(var) or {}
        row[f"fill_rmse_{var}"] = skill.get("rmse")
    row["start"] = s.get("start")
    row["end"] = s.get("end")
    health = s.get("health") or {}
    findings = health.get("findings", []) if isinstance(health, dict) else []
    row["health_act"] = sum(1 for f in findings if f.get("severity") == "act")
    row["health_watch"] = sum(1 for f in findings if f.get("severity") == "watch")
    since = health.get("days_since_last_data") if isinstance(health, dict) else None
    if isinstance(since, dict):  # per variable: the fluxes matter most
        since = since.get("le", max((v for v in since.values() if v is not None), default=None))
    row["days_since_last_data"] = since
    return row


def write_network_summary(out_dir: Path, results: list[dict]) -> Path:
    """``network_summary.csv``: a row per site (CONTRACT §4), written atomically."""
    rows = [_site_row(out_dir, r) for r in results]
    frame = pd.DataFrame(rows)
    first = ["site", "status", "error"]
    frame = frame[first + [c for c in frame.columns if c not in first]]
    path = out_dir / "network_summary.csv"
    atomic_write_bytes(path, frame.to_csv(index=False).encode())
    return path


def load_network(path) -> NetworkConfig:
    return load_network_config(path)


def finish_network(network: NetworkConfig, out_dir: Path, results: list[dict], *, report: bool = True) -> None:
    """Write ``network_summary.csv`` and, unless told not to, ``network_report.pdf``."""
    write_network_summary(out_dir, results)
    if report:
        from reports.network import write_network_report

        write_network_report(out_dir, network_name=network.name)

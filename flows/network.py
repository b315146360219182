"""The network run as a Prefect flow: one task per site, failures isolated.

Each site is one task (a Prefect subflow costs about a second more per site here), which
calls the same site job as the local runner. The task runner decides where sites run:

* threads in this process (default of the flow),
* a local Dask cluster (``towerflow network --workers N``),
* an existing Dask scheduler (``towerflow network --dask-address tcp://HOST:8786``); the
  scheduler and every worker must have towerflow installed.

A failing site never stops the others: its error is returned, written to
``network_summary.csv`` and the report, and the CLI exits non-zero after all sites ran.
"""
from __future__ import annotations

import os

from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.task_runners import ThreadPoolTaskRunner

from towerflow.network import run_site_job

__all__ = ["network_flow", "site_task", "with_dask", "with_threads", "weekly_network_flow"]

site_task = task(run_site_job, name="site", cache_policy=NO_CACHE,
                 task_run_name="site-{job[index]}")


@flow(name="towerflow-network", task_runner=ThreadPoolTaskRunner(max_workers=2))
def network_flow(jobs: list[dict]) -> list[dict]:
    """Run every site job; returns one result dict per site (status ok / failed, error)."""
    futures = [site_task.submit(job) for job in jobs]
    results = []
    for job, fut in zip(jobs, futures):
        try:
            results.append(fut.result())
        except Exception as exc:  # the job itself never raises; this is the runner failing
            from towerflow.network import one_line

            results.append({"index": job["index"], "site": job["config"], "status": "failed",
                            "error": one_line(exc), "timings": {}})
    return results


def with_threads(workers: int | None = None):
    """The network flow on ``workers`` threads of this process (default: the CPU cores)."""
    import os

    return network_flow.with_options(task_runner=ThreadPoolTaskRunner(max_workers=workers or os.cpu_count() or 1))


def with_dask(*, address: str | None = None, workers: int | None = None):
    """The network flow on a Dask cluster: an existing scheduler or a local cluster of ``workers``."""
    try:
        from prefect_dask import DaskTaskRunner
    except ImportError as exc:  # pragma: no cover - optional dependency
        raise RuntimeError("Dask support needs the 'dask' extra: pip install 'towerflow[dask]'") from exc
    if address:
        runner = DaskTaskRunner(address=address)
    else:
        runner = DaskTaskRunner(cluster_kwargs={"n_workers": workers or os.cpu_count() or 1, "threads_per_worker": 1,
                                                "dashboard_address": None, "processes": True})
    return network_flow.with_options(task_runner=runner)


@flow(name="towerflow-network-weekly")
def weekly_network_flow(network_path: str, out_dir: str, report: bool = True, workers: int | None = None,
                        dask_address: str | None = None) -> dict:
    """What ``towerflow serve`` schedules: the network run plus its summary and report.

    Sites run on ``workers`` threads (default: the CPU cores) or, with ``dask_address``, on
    that Dask scheduler. The run fails (red in the Prefect UI) when any site failed; the
    others' outputs and the summary are written first.
    """
    from pathlib import Path

    from pipeline.config import load_network_config
    from towerflow.network import finish_network, site_jobs

    network = load_network_config(network_path)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    runner = with_dask(address=dask_address) if dask_address else with_threads(workers)
    results = runner(site_jobs(network, out, report=report))
    finish_network(network, out, results, report=report)
    failed = [r for r in results if r["status"] != "ok"]
    if failed:
        raise RuntimeError("; ".join(f"{r['site']}: {r['error']}" for r in failed))
    return {"sites": len(results), "failed": 0}

"""Benchmark: a network of 8 invented site-years, serially and on local worker processes.

Writes three invented demo networks of 365 days with different seeds
(:func:`towerflow.demo.network.write_demo_network`), gives their sites distinct ids and
lists 8 of them in one network TOML (grassland, conifer forest and irrigated crop, 30- and
60-min loggers, one with two loggers). Then times ``towerflow network`` the way the CLI
runs it (:func:`towerflow.network.run_network_local`, no Prefect, no PDF reports):

* ``serial``: ``workers=1``, every site in this process, one after another;
* ``parallel``: ``workers=N`` (default 2) local processes.

Besides wall times it reports the CPU seconds the sites used inside the workers (equal in
both modes when parallel running adds no work) and the share of the cores they got, with the
Linux CPU pressure over the run: on a machine shared with other work the wall-time
efficiency measures that load, not towerflow.

Parallel efficiency = serial / (N × parallel). Each timing starts from an empty output
folder (the first run of a network: every CSV parsed and stored). With ``--weekly`` it also
times a second run over the same files (the store exists; every file deduplicates), which
is what a weekly run costs besides its new week.

Run ``.venv/bin/python benchmarks/bench_network.py [--workers N] [--repeat R] [--data DIR]``;
prints a markdown table. ``run()`` returns the numbers for a benchmark suite runner.
All sites, places and values are invented.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import statistics
import tempfile
import time
import warnings
from pathlib import Path

N_SITES = 8
DAYS = 365
SEEDS = (11, 12, 13)


def make_network(folder: Path, *, n_sites: int = N_SITES, days: int = DAYS) -> Path:
    """Write (once) the invented network of ``n_sites`` site-years; returns its TOML."""
    from towerflow.demo.network import write_demo_network

    folder = Path(folder)
    network = folder / "network.toml"
    if network.exists():
        return network
    entries = []
    for seed in SEEDS:
        sub = folder / f"seed{seed}"
        demo = write_demo_network(sub, days=days, seed=seed)
        for cfg in sorted((demo.parent / "sites").glob("*.toml")):
            text = cfg.read_text()
            old_id = re.search(r'^id = "([a-z0-9-]+)"', text, re.M).group(1)
            new_id = f"{old_id}-s{seed}"
            new_cfg = sub / "sites" / f"{new_id}.toml"
            new_cfg.write_text(text.replace(f'id = "{old_id}"', f'id = "{new_id}"', 1))
            entries.append((new_cfg.relative_to(folder), (sub / "raw" / old_id).relative_to(folder)))
    lines = ['[network]', 'name = "Invented benchmark network"', 'rules = "standard"']
    for cfg, raw in entries[:n_sites]:
        lines += ["", "[[network.sites]]", f'config = "{cfg}"', f'data = "{raw}/*.csv"']
    network.write_text("\n".join(lines) + "\n")
    return network


def _time_network(network: Path, out: Path, workers: int) -> tuple[float, list[dict]]:
    from pipeline.config import load_network_config
    from towerflow.network import run_network_local, site_jobs

    jobs = site_jobs(load_network_config(network), out, report=False)
    t0 = time.perf_counter()
    results = run_network_local(jobs, workers=workers)
    elapsed = time.perf_counter() - t0
    failed = [r for r in results if r["status"] != "ok"]
    if failed:
        raise RuntimeError(f"benchmark sites failed: {failed}")
    return elapsed, results


def _spin(n: int) -> float:
    """Fixed CPU work (a pure Python loop), for the machine's own parallel ceiling."""
    x = 0.0
    for i in range(n):
        x += i * 0.5
    return x


def machine_efficiency(workers: int, *, n: int = 6_000_000) -> float:
    """Parallel efficiency of ``workers`` copies of fixed CPU work on this machine right now.

    1.0 on idle cores; lower when other processes share them. towerflow's efficiency can be
    read against this ceiling.
    """
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(workers) as pool:
        list(pool.map(_spin, [1000] * workers))  # start the workers
        t0 = time.perf_counter()
        for _ in range(workers):
            _spin(n)
        serial = time.perf_counter() - t0
        t0 = time.perf_counter()
        list(pool.map(_spin, [n] * workers))
        parallel = time.perf_counter() - t0
    return serial / (workers * parallel)


def _cpu_pressure_us() -> int | None:
    """Total microseconds in which some task waited for a CPU (Linux PSI), or None."""
    try:
        line = Path("/proc/pressure/cpu").read_text().splitlines()[0]
        return int(line.rsplit("total=", 1)[1])
    except (OSError, IndexError, ValueError):
        return None


def run(*, workers: int = 2, repeat: int = 1, data: Path | None = None, weekly: bool = False) -> dict:
    """Time the network serially and on ``workers`` processes; returns the numbers."""
    warnings.simplefilter("ignore")
    data = Path(data) if data else Path(tempfile.gettempdir()) / "towerflow-bench-network"
    data.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    network = make_network(data)
    make_s = time.perf_counter() - t0
    out = data / "out"
    timings = {"serial": [], "parallel": [], "serial_weekly": [], "parallel_weekly": []}
    cpu = {"serial": [], "parallel": []}
    per_site = {}
    pressure0 = _cpu_pressure_us()
    t_all = time.perf_counter()
    ceiling = []
    for _ in range(repeat):
        ceiling.append(machine_efficiency(workers))
        for mode, w in (("serial", 1), ("parallel", workers)):
            shutil.rmtree(out, ignore_errors=True)
            t, results = _time_network(network, out, w)
            timings[mode].append(t)
            cpu[mode].append(sum(r["timings"].get("cpu", 0.0) for r in results))
            if mode == "serial":
                per_site = {r["site"]: r["timings"].get("total") for r in results}
            if weekly:
                t, _ = _time_network(network, out, w)
                timings[f"{mode}_weekly"].append(t)
    elapsed = time.perf_counter() - t_all
    pressure1 = _cpu_pressure_us()
    shutil.rmtree(out, ignore_errors=True)
    serial = statistics.median(timings["serial"])
    parallel = statistics.median(timings["parallel"])
    res = {
        "sites": N_SITES, "days": DAYS, "workers": workers, "cpu_count": os.cpu_count(),
        "load_average_1min": os.getloadavg()[0], "make_data_s": make_s,
        "serial_s": serial, "parallel_s": parallel,
        "efficiency": serial / (workers * parallel),
        "machine_efficiency": statistics.median(ceiling),
        # CPU seconds the sites used (inside the workers): equal in both modes when running
        # in parallel adds no work; the share of the cores they got shows other load
        "serial_cpu_s": statistics.median(cpu["serial"]), "parallel_cpu_s": statistics.median(cpu["parallel"]),
        "parallel_core_share": statistics.median(cpu["parallel"]) / (workers * parallel),
        "serial_core_share": statistics.median(cpu["serial"]) / serial,
        # fraction of the run's wall time in which some runnable task waited for a core
        # (Linux pressure-stall information; near 0 on an otherwise idle machine)
        "cpu_pressure": ((pressure1 - pressure0) / 1e6 / elapsed) if pressure0 is not None else None,
        "slowest_site_s": max(per_site.values()), "sum_site_s": sum(per_site.values()),
        "per_site_s": per_site, "all": timings,
    }
    if weekly:
        res["serial_weekly_s"] = statistics.median(timings["serial_weekly"])
        res["parallel_weekly_s"] = statistics.median(timings["parallel_weekly"])
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--data", type=Path, default=None, help="folder for the invented network (kept)")
    ap.add_argument("--weekly", action="store_true", help="also time a second run over the same files")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    r = run(workers=args.workers, repeat=args.repeat, data=args.data, weekly=args.weekly)
    if args.json:
        print(json.dumps(r, indent=1))
        return
    print(f"| network: {r['sites']} invented site-years | value |\n|---|---|")
    print(f"| serial (workers=1) | {r['serial_s']:.1f} s |")
    print(f"| parallel (workers={r['workers']}) | {r['parallel_s']:.1f} s |")
    print(f"| parallel efficiency serial / ({r['workers']} × parallel) | {100 * r['efficiency']:.0f} % |")
    print(f"| same measure for fixed CPU work on this machine now (its ceiling) | "
          f"{100 * r['machine_efficiency']:.0f} % |")
    print(f"| slowest site / sum of sites (serial) | {r['slowest_site_s']:.1f} s / {r['sum_site_s']:.1f} s |")
    print(f"| CPU seconds of the sites: serial / parallel | {r['serial_cpu_s']:.1f} s / {r['parallel_cpu_s']:.1f} s |")
    print(f"| share of the cores the sites got: serial (of 1) / parallel (of {r['workers']}) | "
          f"{100 * r['serial_core_share']:.0f} % / {100 * r['parallel_core_share']:.0f} % |")
    if r["cpu_pressure"] is not None:
        print(f"| time some task waited for a core (PSI; ~0 when idle) | {100 * r['cpu_pressure']:.0f} % |")
    if "serial_weekly_s" in r:
        print(f"| rerun, store present: serial / parallel | {r['serial_weekly_s']:.1f} s / "
              f"{r['parallel_weekly_s']:.1f} s |")
    print(f"| 1-min load average at the end (cores: {r['cpu_count']}) | {r['load_average_1min']:.1f} |")


if __name__ == "__main__":
    main()

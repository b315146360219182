"""The benchmark suite: every stage of the site job for 1, 4 and 16 site-years, side by side.

Run from the repository root::

    .venv/bin/python benchmarks/run.py [--sizes 1 4 16] [--out benchmarks/results]

It writes invented data once (``--data``, default a folder under the system temp folder;
see ``benchmarks/_data.py``: one invented grassland site with 1, 4 or 16 years of weekly
CSV exports, the demo grassland logger layout), then measures, in one run:

* per size, in this process after a warm-up run (imports and first-call costs excluded,
  interpreter start-up excluded): the wall time of every stage of
  :func:`towerflow.runner.run_site` from an empty output folder (ingest = read files +
  store merge + working frame; QC; closure and health; filling; conductance; outputs =
  tables + writing + store commit), the PDF report
  (:func:`reports.site.write_site_report`) and the CPU time of the whole job;
* the input/output floor on the same CSV files: ``pandas.read_csv`` of every file,
  concatenated and written to one parquet file;
* per size, ``towerflow run CONFIG FILES --out DIR --no-report`` as a subprocess: wall time
  and peak resident memory (the child's own VmHWM), beside the peak of an interpreter
  that only imports the job (the fixed part of the memory);
* the similar-conditions filling speed-up over the plain per-gap loop
  (``benchmarks/bench_gapfill.py``);
* the network parallel efficiency: 8 invented site-years, workers=1 against workers=2
  (``benchmarks/bench_network.py``);
* ``towerflow demo`` as a subprocess (wall time, with the PDF reports, no Prefect).

The markdown table (stage × size, then the targets of issue 9 with met / not met) is
printed and written to ``<out>/<UTC date>-<git short sha>.md`` so versions can be compared.
Timings on a shared machine vary with its load: the 1-minute load average is recorded.
All data are invented.
"""
from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import re
import shutil
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import pandas as pd

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

from _data import write_site_years  # noqa: E402

#: rows of the stage table: (label, wall seconds from the timings, CPU stage name or key)
STAGE_ROWS = (
    ("ingest: read files", lambda t: t.get("read_files"), None),
    ("ingest: store merge", lambda t: t.get("store_merge"), None),
    ("ingest: working frame", lambda t: t.get("ingest"), None),
    ("**ingest**", lambda t: _sum(t, "read_files", "store_merge", "ingest"), "ingest"),
    ("**QC**", lambda t: t.get("qc"), "qc"),
    ("**closure** (+ health)", lambda t: t.get("closure"), "closure"),
    ("**filling**", lambda t: t.get("filling"), "filling"),
    ("**uncertainty** (of the filled values)", lambda t: t.get("uncertainty"), "uncertainty"),
    ("**conductance**", lambda t: t.get("conductance"), "conductance"),
    ("outputs: tables", lambda t: t.get("outputs"), None),
    ("outputs: write files", lambda t: t.get("write"), None),
    ("outputs: store commit", lambda t: t.get("store_commit"), None),
    ("**outputs**", lambda t: _sum(t, "outputs", "write", "store_commit"), "outputs"),
    ("**all stages but the PDF** (in-process)", lambda t: t.get("total"), "cpu_total"),
    ("**report** (PDF)", lambda t: t.get("report"), None),
)


def _cpu(t: dict, key):
    if key is None:
        return None
    if key == "cpu_total":
        return t.get("cpu_total")
    return (t.get("cpu") or {}).get(key)


def _cell(t: dict, wall_fn, cpu_key) -> str:
    wall, cpu = wall_fn(t), _cpu(t, cpu_key)
    return _fmt(wall) if cpu is None else f"{_fmt(wall)} ({_fmt(cpu)})"


def _sum(t: dict, *keys) -> float | None:
    values = [t.get(k) for k in keys]
    return None if any(v is None for v in values) else sum(values)


def _fmt(x, unit: str = "s") -> str:
    if x is None:
        return "–"
    if unit == "s":
        return f"{x:.2f}" if x < 10 else f"{x:.1f}"
    return f"{x:.0f}"


def machine() -> dict:
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    ram = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                ram = int(line.split()[1]) / 1024 ** 2
    except OSError:
        pass
    return {"cpus": os.cpu_count(), "cpu_model": cpu, "ram_gib": ram, "python": platform.python_version(),
            "pandas": pd.__version__}


def git_sha() -> str:
    try:
        sha = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True,
                             text=True, timeout=10).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=ROOT,
                               capture_output=True, text=True, timeout=10).stdout.strip()
        return (sha or "nogit") + ("-dirty" if dirty else "")
    except (OSError, subprocess.SubprocessError):
        return "nogit"


def _tool(name: str) -> str:
    """A console script of the running environment (``.venv/bin/towerflow``)."""
    candidate = Path(sys.executable).parent / name
    return str(candidate) if candidate.exists() else name


#: run a Python script or ``-c`` code as the child would, then report the peak resident memory
#: of the child's own address space (VmHWM of /proc/self/status). ru_maxrss from wait4 would
#: also count the benchmark's own pages, which a forked child holds until it executes.
_PEAK_WRAPPER = """
import runpy, sys
target, sys.argv = sys.argv[1], sys.argv[1:]
try:
    if target == "-c":
        exec(compile(_code, "<string>", "exec"), {"__name__": "__main__"})
    else:
        runpy.run_path(target, run_name="__main__")
finally:
    try:
        with open("/proc/self/status") as fh:
            kib = next(int(line.split()[1]) for line in fh if line.startswith("VmHWM:"))
        sys.stderr.write(f"\\nTOWERFLOW_BENCH_PEAK_KIB {kib}\\n")
    except (OSError, StopIteration):
        pass
"""


def run_child(args: list[str], *, cwd=None) -> tuple[float, float, int]:
    """Run a Python child (a script path with its arguments, or ``-c CODE``); return (wall s,
    peak resident memory MiB of the child itself, exit status)."""
    if args[0] == "-c":
        code = f"_code = {args[1]!r}\n" + _PEAK_WRAPPER
        cmd = [sys.executable, "-c", code, "-c"]
    else:
        cmd = [sys.executable, "-c", _PEAK_WRAPPER, *args]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
    if proc.returncode != 0:
        print(f"warning: {' '.join(args[:3])} … exited {proc.returncode}: {err[-400:]}", file=sys.stderr)
    found = re.findall(r"TOWERFLOW_BENCH_PEAK_KIB (\d+)", err)
    peak_kib = int(found[-1]) if found else usage.ru_maxrss  # ru_maxrss is in KiB on Linux
    return wall, peak_kib / 1024, proc.returncode


def io_floor(files) -> tuple[float, float]:
    """(wall s, CPU s) to read the CSV files with pandas.read_csv and write them as one parquet file."""
    with tempfile.TemporaryDirectory() as tmp:
        t0, c0 = time.perf_counter(), time.process_time()
        frames = [pd.read_csv(f) for f in files]
        pd.concat(frames, ignore_index=True).to_parquet(Path(tmp) / "floor.parquet")
        return time.perf_counter() - t0, time.process_time() - c0


def time_site(data, out: Path, *, report: bool) -> dict:
    """One in-process run of the site job from an empty output folder; its timings."""
    from towerflow.runner import run_site

    shutil.rmtree(out, ignore_errors=True)
    marks = []  # (stage, CPU clock) as each stage starts: per-stage CPU time

    def on_stage(name):
        marks.append((name, time.process_time()))

    c0 = time.process_time()
    outcome = run_site(data.config, list(data.files), out, report=False, on_stage=on_stage)
    c1 = time.process_time()
    timings = dict(outcome.timings)
    timings["cpu_total"] = c1 - c0
    ends = [c for _, c in marks[1:]] + [c1]
    timings["cpu"] = {name: end - start for (name, start), end in zip(marks, ends)}
    if report:
        try:
            from reports.site import write_site_report
        except ImportError:
            return timings
        t0 = time.perf_counter()
        write_site_report(outcome.out_dir)
        timings["report"] = time.perf_counter() - t0
    return timings


def bench_sizes(sizes, data_root: Path, work: Path, *, report: bool, repeat: int) -> dict:
    results = {}
    datasets = {}
    for n in sizes:
        t0 = time.perf_counter()
        datasets[n] = write_site_years(data_root / f"grassland-{n}y", n)
        print(f"data: {n} site-year(s), {len(datasets[n].files)} files, "
              f"{datasets[n].csv_bytes / 1e6:.1f} MB ({time.perf_counter() - t0:.0f} s)", file=sys.stderr)
    # warm-up: imports and first calls (scipy submodules, numba-free lazy imports) happen here
    first = datasets[min(sizes)]
    time_site(first, work / "warmup", report=report)
    # fixed memory: an interpreter that imports the job and does nothing
    _, base_rss, _ = run_child(["-c", "import towerflow.runner, towerflow.cli, pipeline.process,"
                                " pipeline.qc, pipeline.closure, pipeline.health, pipeline.gapfill,"
                                " pipeline.conductance, pipeline.outputs, scipy.optimize, scipy.stats"])
    for n in sizes:
        data = datasets[n]
        print(f"timing {n} site-year(s) …", file=sys.stderr)
        # floor and job alternate, so that a change of the machine's speed during the size's
        # rounds (other load on the shared cores) reaches both alike; the sizes run one after
        # another, smallest first, so that no larger record's heap is in the process yet
        floors, runs = [], []
        for _ in range(repeat):
            floors.append(io_floor(data.files))
            runs.append(time_site(data, work / f"run-{n}y", report=report))
        best = min(runs, key=lambda t: t["total"])
        out_dir = work / f"cli-{n}y"
        shutil.rmtree(out_dir, ignore_errors=True)
        wall, rss, status = run_child([_tool("towerflow"), "run", str(data.config),
                                       *map(str, data.files), "--out", str(out_dir), "--no-report"])
        results[n] = {
            "timings": best, "floor_s": min(f[0] for f in floors), "floor_cpu_s": min(f[1] for f in floors),
            "cli_wall_s": wall, "cli_peak_rss_mib": rss,
            "cli_status": status, "base_rss_mib": base_rss, "rows": data.rows,
            "files": len(data.files), "csv_mb": data.csv_bytes / 1e6,
        }
    shutil.rmtree(work, ignore_errors=True)
    return results


def bench_filling() -> dict | None:
    try:
        import bench_gapfill
    except ImportError:
        return None
    return bench_gapfill.run(days=365, repeat=1)


def bench_network(data_root: Path) -> dict | None:
    try:
        import bench_network
    except ImportError:
        return None
    return bench_network.run(workers=2, repeat=1, data=data_root / "network")


def bench_demo(work: Path) -> dict:
    out = work / "demo"
    shutil.rmtree(out, ignore_errors=True)
    wall, rss, status = run_child([_tool("towerflow"), "demo", "--out", str(out)])
    reports = len(list(out.rglob("*.pdf"))) if out.exists() else 0
    shutil.rmtree(out, ignore_errors=True)
    return {"wall_s": wall, "peak_rss_mib": rss, "status": status, "pdf_reports": reports}


def table(res: dict) -> str:
    sizes = sorted(res["sizes"])
    sz = res["sizes"]
    head = "| stage: wall s (CPU s) | " + " | ".join(f"{n} site-year{'s' if n > 1 else ''}" for n in sizes) + " |"
    lines = [head, "|---|" + "---:|" * len(sizes)]
    for label, fn, cpu_key in STAGE_ROWS:
        lines.append(f"| {label} | " + " | ".join(_cell(sz[n]["timings"], fn, cpu_key) for n in sizes) + " |")
    extra = (
        ("`towerflow run --no-report` subprocess wall", lambda r: _fmt(r["cli_wall_s"])),
        ("input/output floor (read_csv + to_parquet)", lambda r: f"{_fmt(r['floor_s'])} ({_fmt(r['floor_cpu_s'])})"),
        ("all stages but the PDF / floor", lambda r: f"{r['timings']['total'] / r['floor_s']:.1f} × "
         f"({r['timings']['cpu_total'] / r['floor_cpu_s']:.1f} ×)"),
        ("peak memory of the subprocess (MiB)", lambda r: _fmt(r["cli_peak_rss_mib"], "n")),
        ("peak memory above the bare imports (MiB)",
         lambda r: _fmt(r["cli_peak_rss_mib"] - r["base_rss_mib"], "n")),
        ("intervals / CSV files / CSV MB", lambda r: f"{r['rows']} / {r['files']} / {r['csv_mb']:.1f}"),
    )
    for label, fn in extra:
        lines.append(f"| {label} | " + " | ".join(fn(sz[n]) for n in sizes) + " |")
    return "\n".join(lines)


def targets(res: dict) -> list[tuple[str, str, bool | None]]:
    """(target, measured figure, met?) for issue 9's targets."""
    out = []
    sz = res["sizes"]
    if 1 in sz:
        r1 = sz[1]
        ratio = r1["timings"]["total"] / r1["floor_s"]
        cpu_ratio = r1["timings"]["cpu_total"] / r1["floor_cpu_s"]
        out.append(("one site-year, all stages but the PDF ≤ 10 × I/O floor",
                    f"wall {r1['timings']['total']:.2f} s = {ratio:.1f} × floor ({r1['floor_s']:.2f} s); "
                    f"CPU {r1['timings']['cpu_total']:.2f} s = {cpu_ratio:.1f} × floor CPU ({r1['floor_cpu_s']:.2f} s)",
                    ratio <= 10))
        if 16 in sz:
            r16 = sz[16]
            t = r16["timings"]["total"] / r1["timings"]["total"]
            tc = r16["timings"]["cpu_total"] / r1["timings"]["cpu_total"]
            out.append(("16 site-years ≤ 17 × one site-year", f"wall {t:.1f} ×, CPU {tc:.1f} ×", t <= 17))
            p1, p16 = r1["cli_peak_rss_mib"], r16["cli_peak_rss_mib"]
            data_ratio = r16["rows"] / r1["rows"]
            figure = f"peak {p1:.0f} → {p16:.0f} MiB = {p16 / p1:.1f} × for {data_ratio:.0f} × the data"
            ok = p16 / p1 <= data_ratio
            if 4 in sz:  # the marginal memory per site-year should not grow with the record
                p4 = sz[4]["cli_peak_rss_mib"]
                m_lo, m_hi = (p4 - p1) / 3, (p16 - p4) / 12
                figure += f"; per added site-year {m_lo:.0f} MiB (1→4), {m_hi:.0f} MiB (4→16)"
            out.append(("peak memory grows no faster than the data", figure, ok))
        if r1["timings"].get("report") is not None:
            rep = r1["timings"]["report"]
            out.append(("PDF report for one site-year ≤ 5 s", f"{rep:.2f} s", rep <= 5))
    f = res.get("filling")
    if f:
        out.append(("similar-conditions filling ≥ 10 × the plain per-gap loop, identical output",
                    f"{f['speedup_vs_plain_loop']:.0f} × ({f['plain_loop_s']:.2f} s → {f['vectorised_s']:.3f} s "
                    f"CPU; largest difference {f['max_abs_diff']:.1e} W m-2)",
                    f["speedup_vs_plain_loop"] >= 10 and f["max_abs_diff"] <= 1e-9))
    nw = res.get("network")
    if nw:
        out.append((f"network of {nw['sites']} site-years on {nw['workers']} workers: efficiency ≥ 80 %",
                    f"{100 * nw['efficiency']:.0f} % (serial {nw['serial_s']:.1f} s, parallel {nw['parallel_s']:.1f} s"
                    + (f"; CPU serial {nw['serial_cpu_s']:.1f} s, parallel {nw['parallel_cpu_s']:.1f} s; cores "
                       f"obtained: serial {nw['serial_core_share']:.2f} of 1, parallel "
                       f"{nw['parallel_core_share'] * nw['workers']:.2f} of {nw['workers']}"
                       if "parallel_core_share" in nw else "")
                    + (f"; the same measure for fixed CPU work on this machine at the time, its ceiling: "
                       f"{100 * nw['machine_efficiency']:.0f} %" if nw.get("machine_efficiency") else "") + ")",
                    nw["efficiency"] >= 0.8))
    d = res.get("demo")
    if d:
        out.append(("`towerflow demo` ≤ 60 s wall", f"{d['wall_s']:.1f} s ({d['pdf_reports']} PDF reports, "
                    f"exit {d['status']})", d["wall_s"] <= 60 and d["status"] == 0))
    return out


def markdown(res: dict) -> str:
    m = res["machine"]
    lines = [
        f"# towerflow benchmark {res['date']} ({res['git']})",
        "",
        f"Command: `{res['command']}`  ",
        f"Machine: {m['cpus']} CPUs ({m['cpu_model']}), {m['ram_gib']:.1f} GiB RAM, Python {m['python']}, "
        f"pandas {m['pandas']}; 1-min load average {res['load_start']:.1f} at the start, "
        f"{res['load_end']:.1f} at the end.  ",
        "Data: one invented grassland site, weekly 30-min CSV exports (`benchmarks/_data.py`). "
        "In-process timings after a warm-up run, from an empty output folder.",
        "",
        table(res),
        "",
        "| target (issue 9) | measured | met |",
        "|---|---|---|",
    ]
    for name, figure, ok in targets(res):
        lines.append(f"| {name} | {figure} | {'yes' if ok else 'NO'} |")
    return "\n".join(lines) + "\n"


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[1, 4, 16], help="site-years (default 1 4 16)")
    ap.add_argument("--out", type=Path, default=HERE / "results", help="folder for the markdown result")
    ap.add_argument("--data", type=Path, default=Path(tempfile.gettempdir()) / "towerflow-bench",
                    help="folder for the invented data (kept and reused)")
    ap.add_argument("--repeat", type=int, default=1, help="in-process runs per size (the fastest is kept)")
    ap.add_argument("--no-report", action="store_true", help="skip the PDF report timing")
    ap.add_argument("--skip", nargs="*", default=[], choices=["filling", "network", "demo"],
                    help="parts to leave out")
    ap.add_argument("--render", type=Path, default=None, metavar="RESULT.json",
                    help="only rewrite the markdown of an earlier run from its .json (no timing)")
    args = ap.parse_args(argv)
    if args.render is not None:
        res = json.loads(args.render.read_text(encoding="utf-8"))
        res["sizes"] = {int(k): v for k, v in res["sizes"].items()}
        text = markdown(res)
        print(text)
        args.render.with_suffix(".md").write_text(text, encoding="utf-8")
        return res
    warnings.simplefilter("ignore")
    os.environ.setdefault("PYTHONWARNINGS", "ignore")
    args.data.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="towerflow-bench-run-"))
    res = {
        "date": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "git": git_sha(), "machine": machine(), "load_start": os.getloadavg()[0],
        "command": " ".join([".venv/bin/python", "benchmarks/run.py", *(argv if argv is not None else sys.argv[1:])]),
    }
    res["sizes"] = bench_sizes(sorted(set(args.sizes)), args.data, work / "sites",
                               report=not args.no_report, repeat=args.repeat)
    if "filling" not in args.skip:
        print("timing the filling against the per-gap loop …", file=sys.stderr)
        res["filling"] = bench_filling()
    if "network" not in args.skip:
        print("timing the network (8 site-years, 1 and 2 workers) …", file=sys.stderr)
        res["network"] = bench_network(args.data)
    if "demo" not in args.skip:
        print("timing towerflow demo …", file=sys.stderr)
        res["demo"] = bench_demo(work)
    shutil.rmtree(work, ignore_errors=True)
    res["load_end"] = os.getloadavg()[0]
    text = markdown(res)
    print(text)
    args.out.mkdir(parents=True, exist_ok=True)
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d")
    path = args.out / f"{stamp}-{res['git']}.md"
    path.write_text(text, encoding="utf-8")
    (path.with_suffix(".json")).write_text(json.dumps(res, indent=1, default=str), encoding="utf-8")
    print(f"written {path}", file=sys.stderr)
    return res


if __name__ == "__main__":
    main()

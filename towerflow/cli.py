"""The ``towerflow`` command line (CONTRACT §3).

Quiet by default: a progress bar over sites and stages on a terminal, one line per result,
warnings counted. ``--verbose`` shows every warning and Prefect's logs. Errors: one line on
stderr naming the file and row or key, exit status 1 (2 for a usage error).

Prefect is used when it pays: ``towerflow run`` calls the site job directly unless a Prefect
server is configured (``PREFECT_API_URL``) or ``--prefect`` is given; ``towerflow network``
runs sites in a local process pool unless a server is configured, ``--prefect`` is given or
Dask is asked for (``--dask``, ``--dask-address``).
"""
from __future__ import annotations

import argparse
import os
import sys
import time
import warnings
from pathlib import Path

EXIT_OK, EXIT_ERROR, EXIT_USAGE = 0, 1, 2


def _quiet_prefect(verbose: bool) -> None:
    """Prefect settings that must be in the environment before Prefect is imported."""
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("DO_NOT_TRACK", "1")
    # without PREFECT_API_URL Prefect starts a temporary server; on a busy machine it needs
    # more than the default 20 s (measured: it timed out at load 7 on 2 cores)
    os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")
    if not verbose:
        os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")


def _prefect_api():
    """A context in which every Prefect client, Dask workers included, uses one API.

    With ``PREFECT_API_URL`` set, that server. Without it, one temporary server started
    here, whose address is put into Prefect's settings; the settings travel with each task,
    so Dask workers report to it instead of each starting a temporary server of their own
    (measured before this: each of two Dask workers started one; 146 s for 3 small sites).
    Remote Dask workers cannot reach a temporary server on 127.0.0.1: give them a real
    server (``prefect server start``) and set ``PREFECT_API_URL``.
    """
    import contextlib

    if os.environ.get("PREFECT_API_URL"):
        return contextlib.nullcontext()
    from prefect.server.api.server import SubprocessASGIServer
    from prefect.settings import PREFECT_API_URL, temporary_settings

    server = SubprocessASGIServer()  # Prefect's own process-wide temporary server, stopped at exit
    server.start(timeout=int(os.environ.get("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")))
    return temporary_settings(updates={PREFECT_API_URL: server.api_url})


def _console():
    from rich.console import Console

    return Console(stderr=True)


def _error(message: str) -> int:
    print(f"towerflow: error: {' '.join(str(message).split())}", file=sys.stderr)
    return EXIT_ERROR


class _Progress:
    """A rich progress bar over sites × stages (a no-op when stderr is not a terminal)."""

    def __init__(self, total: int, enabled: bool, *, stages_per_site: int = 1):
        self.enabled = enabled and sys.stderr.isatty()
        self.total = total
        self.stages_per_site = stages_per_site
        self._done: dict = {}
        self._bar = None

    def __enter__(self):
        if self.enabled:
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

            self._bar = Progress(TextColumn("{task.description:<40}"), BarColumn(), MofNCompleteColumn(),
                                 TimeElapsedColumn(), console=_console(), transient=True)
            self._bar.__enter__()
            self._task = self._bar.add_task("starting", total=self.total)
        return self

    def stage(self, site, name: str) -> None:
        """A site's stage starts: the previous one is done."""
        if self._bar is not None:
            seen = self._done.get(site, 0)
            self._done[site] = seen + 1
            self._bar.update(self._task, advance=1 if seen else 0, description=f"{site}: {name}")

    def site_done(self, site, text: str = "") -> None:
        """A site finished (or failed): count its remaining stages as done."""
        if self._bar is not None:
            left = self.stages_per_site - self._done.get(site, 0) + (1 if self._done.get(site) else 0)
            self._done[site] = self.stages_per_site + 1
            self._bar.update(self._task, advance=max(left, 0), description=text)

    def advance(self, n: int = 1, text: str = "") -> None:
        if self._bar is not None:
            self._bar.update(self._task, advance=n, description=text)

    def __exit__(self, *exc):
        if self._bar is not None:
            self._bar.__exit__(*exc)


def _print_site(outcome, verbose: bool) -> None:
    s = outcome.summary
    closure = s.get("closure") or {}
    gaps = s.get("gaps") or {}
    ebr = closure.get("ebr")
    line = (f"{outcome.site}: {s.get('n_intervals')} intervals {s.get('start', '')[:10]} to "
            f"{s.get('end', '')[:10]}; gaps LE {_pct(gaps.get('le'))}, H {_pct(gaps.get('h'))}; "
            f"EBR {ebr:.2f}" if isinstance(ebr, (int, float)) else
            f"{outcome.site}: {s.get('n_intervals')} intervals")
    print(line)
    print(f"  outputs in {outcome.out_dir}")
    n_warn = len(outcome.warnings)
    if n_warn:
        if verbose:
            for w in outcome.warnings:
                print(f"  warning: {w}", file=sys.stderr)
        else:
            print(f"  {n_warn} warning(s): see summary.json or run with --verbose", file=sys.stderr)


def _pct(x) -> str:
    return f"{100 * x:.0f} %" if isinstance(x, (int, float)) else "n/a"


def cmd_run(args) -> int:
    use_prefect = args.prefect or bool(os.environ.get("PREFECT_API_URL"))
    files = [str(f) for f in args.files]
    if use_prefect:
        _quiet_prefect(args.verbose)
        from flows.site import site_flow

        site_dir = site_flow(str(args.config), files, str(args.out), supersede=args.supersede,
                             rules_spec=args.rules, report=not args.no_report)
        print(f"outputs in {site_dir}")
        return EXIT_OK
    from .runner import run_site, stage_names

    stages = stage_names(not args.no_report)
    with _Progress(len(stages), enabled=not args.verbose, stages_per_site=len(stages)) as bar:
        outcome = run_site(args.config, files, args.out, supersede=args.supersede, rules_spec=args.rules,
                           report=not args.no_report,
                           on_stage=lambda name: bar.stage(Path(args.config).stem, name))
    _print_site(outcome, args.verbose)
    return EXIT_OK


def _run_network(network_path: Path, out_dir: Path, args) -> int:
    from pipeline.config import load_network_config

    from .network import finish_network, run_network_local, site_jobs
    from .runner import stage_names

    network = load_network_config(network_path)
    jobs = site_jobs(network, out_dir, report=not args.no_report)
    if args.workers is not None and args.workers < 1:
        return _error(f"--workers must be at least 1 (got {args.workers})")
    out_dir.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    use_dask = bool(args.dask_address) or args.dask
    use_prefect = use_dask or bool(os.environ.get("PREFECT_API_URL")) or args.prefect
    names = {j["index"]: Path(j["config"]).stem for j in jobs}
    if use_prefect:
        _quiet_prefect(args.verbose)
        from flows.network import network_flow, with_dask, with_threads

        if use_dask:
            flow_fn = with_dask(address=args.dask_address, workers=args.workers)
            where = f"the Dask scheduler {args.dask_address}" if args.dask_address else "a local Dask cluster"
        else:
            flow_fn = with_threads(args.workers)
            where = "Prefect threads"
        with _Progress(len(jobs), enabled=not args.verbose) as bar:
            bar.advance(0, f"starting Prefect; then {len(jobs)} sites on {where}")
            with _prefect_api():
                results = flow_fn(jobs)
            bar.advance(len(jobs), "done")
    else:
        stages = stage_names(not args.no_report)
        with _Progress(len(jobs) * len(stages), enabled=not args.verbose, stages_per_site=len(stages)) as bar:
            results = run_network_local(
                jobs, workers=args.workers,
                on_stage=(lambda i, name: bar.stage(names[i], name)) if bar.enabled else None,
                on_done=lambda r: bar.site_done(names[r["index"]], f"{r['site']}: {r['status']}"))
    finish_network(network, out_dir, results, report=not args.no_report)
    elapsed = time.perf_counter() - t0
    failed = [r for r in results if r["status"] != "ok"]
    for r in results:
        if r["status"] == "ok":
            print(f"{r['site']}: ok")
        else:
            print(f"towerflow: error: site {r['site']}: {r['error']}", file=sys.stderr)
    print(f"{len(results) - len(failed)} of {len(results)} sites ok in {elapsed:.1f} s; "
          f"network summary in {out_dir / 'network_summary.csv'}")
    return EXIT_ERROR if failed else EXIT_OK


def cmd_network(args) -> int:
    return _run_network(Path(args.network), Path(args.out), args)


def cmd_demo(args) -> int:
    from .demo.network import write_demo_network

    out = Path(args.out)
    t0 = time.perf_counter()
    network_path = write_demo_network(out / "raw", days=args.days, seed=args.seed)
    print(f"invented demo network written to {network_path.parent} in {time.perf_counter() - t0:.1f} s "
          "(all data are invented)")
    return _run_network(network_path, out, args)


def cmd_serve(args) -> int:
    if not os.environ.get("PREFECT_API_URL"):
        return _error("serve needs a running Prefect server: start one with "
                      "'prefect server start --host 127.0.0.1 --port 4200' and set "
                      "PREFECT_API_URL=http://127.0.0.1:4200/api")
    _quiet_prefect(args.verbose)
    from prefect.schedules import Cron

    from pipeline.config import load_network_config

    from flows.network import weekly_network_flow

    network = load_network_config(args.network)  # fail early on a broken network file
    try:
        from zoneinfo import ZoneInfo

        ZoneInfo(args.timezone)
        schedule = Cron(args.cron, timezone=args.timezone)
    except Exception as exc:  # croniter / zoneinfo reject it
        return _error(f"--cron {args.cron!r} / --timezone {args.timezone!r}: not a valid schedule ({exc})")
    ui = os.environ["PREFECT_API_URL"].rstrip("/").removesuffix("/api")
    print(f"serving the network '{network.name}' on schedule '{args.cron}' ({args.timezone}); "
          f"run history in the Prefect UI at {ui} (deployment 'towerflow-network-weekly/weekly'); "
          "stop with Ctrl-C")
    weekly_network_flow.serve(
        name="weekly",
        schedules=[schedule],
        parameters={"network_path": str(Path(args.network).resolve()),
                    "out_dir": str(Path(args.out).resolve()), "report": not args.no_report,
                    "workers": args.workers, "dask_address": args.dask_address},
    )
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    parser = argparse.ArgumentParser(
        prog="towerflow",
        description="Weekly quality control, gap-filling and canopy conductance for flux towers.")
    parser.add_argument("--version", action="version", version=f"towerflow {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    def common(p):
        p.add_argument("--verbose", action="store_true", help="show every warning and the full logs")
        p.add_argument("--no-report", action="store_true", help="write the data outputs only, no PDF")

    def network_opts(p):
        p.add_argument("--workers", type=int, default=None, metavar="N",
                       help="sites run at once (default: the local cores); with --dask, the local cluster's workers")
        p.add_argument("--dask", action="store_true",
                       help="run the sites on a local Dask cluster (through Prefect) of --workers processes")
        p.add_argument("--dask-address", default=None, metavar="ADDR",
                       help="run the sites on an existing Dask scheduler, e.g. tcp://10.0.0.5:8786 "
                            "(the scheduler and every worker need towerflow installed)")
        p.add_argument("--prefect", action="store_true",
                       help="orchestrate with Prefect even without a configured server "
                            "(PREFECT_API_URL); costs 10-20 s of start-up")

    p = sub.add_parser("demo", help="make the invented demo network and run the whole job on it")
    p.add_argument("--out", default="towerflow-demo", help="output folder (default: towerflow-demo)")
    p.add_argument("--days", type=int, default=None, help="length of the invented record in days")
    p.add_argument("--seed", type=int, default=20261202, help="random seed of the invented data")
    common(p)
    network_opts(p)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("run", help="add new logger files to a site's store and process the site")
    p.add_argument("config", type=Path, help="the site TOML")
    p.add_argument("files", nargs="*", type=Path, help="logger exports (CSV)")
    p.add_argument("--out", required=True, type=Path, help="output folder DIR (the site's store lives in DIR/SITE_ID/store)")
    p.add_argument("--supersede", action="store_true",
                   help="new values replace conflicting stored ones (the old ones stay in the store's log)")
    p.add_argument("--rules", default=None, help="rule set instead of the site's own (name or TOML path)")
    p.add_argument("--prefect", action="store_true", help="run as a Prefect flow")
    common(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("network", help="run every site of a network with the network's standard rules")
    p.add_argument("network", type=Path, help="the network TOML")
    p.add_argument("--out", required=True, type=Path, help="output folder DIR")
    common(p)
    network_opts(p)
    p.set_defaults(func=cmd_network)

    p = sub.add_parser("serve", help="serve the network run on a schedule against a Prefect server")
    p.add_argument("network", type=Path, help="the network TOML")
    p.add_argument("--cron", required=True, help='cron expression, e.g. "0 6 * * 1" (Mondays 06:00)')
    p.add_argument("--timezone", default="UTC", help="time zone of the cron expression (default UTC)")
    p.add_argument("--out", default="towerflow-output", type=Path, help="output folder DIR")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="sites run at once in each scheduled run (default: the local cores)")
    p.add_argument("--dask-address", default=None, metavar="ADDR",
                   help="run the sites on an existing Dask scheduler")
    common(p)
    p.set_defaults(func=cmd_serve)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from pipeline.errors import TowerflowError, TowerflowWarning

    if not args.verbose:
        warnings.simplefilter("ignore", TowerflowWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
    try:
        return args.func(args)
    except TowerflowError as exc:
        return _error(str(exc))
    except FileNotFoundError as exc:
        return _error(f"{exc.filename}: file not found")
    except OSError as exc:
        where = f"{exc.filename}: " if exc.filename else ""
        return _error(f"{where}{exc.strerror or exc}")
    except KeyboardInterrupt:
        return _error("interrupted; the store and earlier outputs are unchanged")
    except Exception as exc:  # a bug, not bad input: one line, the traceback with --verbose
        if args.verbose:
            raise
        from .network import one_line

        return _error(f"unexpected {one_line(exc)} (run with --verbose for the traceback)")


if __name__ == "__main__":
    sys.exit(main())

"""The weekly site job without an orchestrator: store, process, write, report.

``run_site`` is what ``towerflow run`` calls and what each site task of the network flow
runs. Order of work, so that a failure leaves the store and earlier outputs as they were:

1. load and validate the configuration and the rule set;
2. parse every new file (a broken file stops the run before anything is written);
3. merge the files into the store *in memory* and process the merged data;
4. write every output completely into a staging folder; then, holding the store's lock,
   commit the store (atomic: one manifest switch) and rename the staged outputs into place
   (each file atomically; every output names the run, so a reader can tell a complete set).
   A failure before the renames changes nothing; a crash during the renames (no data
   written then) leaves each output complete, old or new, and the next run repairs the set;
5. render the PDF report from the written outputs.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from pipeline import flags as flagbits
from pipeline.config import SiteConfig, load_site_config
from pipeline.errors import ConfigError, InputError
from pipeline.ingest import assign_stream, read_logger_file
from pipeline.outputs import column_metadata, json_ready
from pipeline.process import STAGES, SiteProducts
from pipeline.rules import load_rules

from . import __version__
from .atomic import StagedFolder, atomic_write_bytes
from .store import SiteStore

__all__ = ["run_site", "SiteOutcome", "site_output_dir", "write_parquet", "parquet_with_metadata", "rules_to_toml"]

#: columns compared for the change log
_CHANGE_COLUMNS = ("le", "h", "rn", "g", "rg", "ta", "vpd", "rh", "ustar", "le_flag", "h_flag",
                   "le_filled", "h_filled", "gs", "gs_closed", "omega")


@dataclass
class SiteOutcome:
    site: str
    out_dir: Path
    summary: dict
    timings: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    store_report: dict = field(default_factory=dict)


def site_output_dir(out_dir: Path, site_id: str) -> Path:
    """DIR/SITE_ID, refused if it would leave DIR (the id is validated, this is a second lock)."""
    out_dir = Path(out_dir).resolve()
    target = (out_dir / site_id).resolve()
    if target.parent != out_dir:
        raise ConfigError(f"site id {site_id!r} would write outside the output folder", key="site.id")
    return target


def rules_to_toml(rules: dict, *, header: str = "") -> str:
    """A rule set as TOML text that ``load_rules`` reads back to the same dict (tomli-w)."""
    import tomli_w

    lines = [f"# {line}" for line in header.splitlines()] if header else []
    return "\n".join(lines) + ("\n" if lines else "") + tomli_w.dumps(rules)


def parquet_with_metadata(frame: pd.DataFrame, *, file_metadata: dict, extra: dict | None = None) -> bytes:
    """``frame`` as parquet bytes with per-column metadata (unit, long_name, standard_name, flags)."""
    table = pa.Table.from_pandas(frame, preserve_index=False, nthreads=1)  # see atomic.parquet_bytes
    fields = []
    for f in table.schema:
        meta = column_metadata(f.name, extra)
        fields.append(f.with_metadata({k.encode(): str(v).encode() for k, v in meta.items()}))
    schema = pa.schema(fields, metadata={
        **(table.schema.metadata or {}),
        b"towerflow": json.dumps(json_ready(file_metadata)).encode(),
    })
    table = table.cast(schema)
    sink = pa.BufferOutputStream()
    # dictionary encoding for the text, integer, flag and time columns only: float columns
    # (measured values, nearly all distinct) would fill the dictionary and fall back to plain
    # encoding anyway, after the work; the values read back are the same
    dictionary = [f.name for f in table.schema if not pa.types.is_floating(f.type)]
    pq.write_table(table, sink, compression="zstd", use_dictionary=dictionary)
    return sink.getvalue().to_pybytes()


def write_parquet(path: Path, frame: pd.DataFrame, *, file_metadata: dict, extra: dict | None = None) -> None:
    """Write ``frame`` atomically with per-column metadata (:func:`parquet_with_metadata`)."""
    atomic_write_bytes(path, parquet_with_metadata(frame, file_metadata=file_metadata, extra=extra))


def _periods(index: pd.DatetimeIndex, changed: np.ndarray, gap: pd.Timedelta) -> list[list[str]]:
    """Contiguous periods (start, end) of changed intervals, merging runs closer than ``gap``."""
    if not changed.any():
        return []
    times = index[changed]
    breaks = np.flatnonzero(np.diff(times.asi8) > gap.value)
    starts = np.r_[0, breaks + 1]
    ends = np.r_[breaks, len(times) - 1]
    return [[times[s].isoformat(), times[e].isoformat()] for s, e in zip(starts, ends)]


def _flatten(table, prefix: str = "") -> dict:
    """Nested dicts → {"a.b.c": value} (lists kept as values)."""
    out = {}
    for key, value in (table or {}).items():
        name = f"{prefix}.{key}" if prefix else str(key)
        if isinstance(value, dict):
            out.update(_flatten(value, name))
        else:
            out[name] = value
    return out


def _dict_changes(old: dict, new: dict, *, limit: int = 12) -> list[str]:
    """``key: old → new`` lines for the keys that differ between two nested dicts."""
    a, b = _flatten(old), _flatten(new)
    lines = []
    for key in sorted(set(a) | set(b)):
        if a.get(key, "<unset>") != b.get(key, "<unset>"):
            lines.append(f"{key}: {a.get(key, '<unset>')!r} → {b.get(key, '<unset>')!r}")
    if len(lines) > limit:
        lines = lines[:limit] + [f"… and {len(lines) - limit} more"]
    return lines


def _history_label(entry: dict) -> str:
    what = [k for k in entry if k not in ("start", "end", "reason")]
    text = f"{entry.get('start', '?')} to {entry.get('end', '?')} ({', '.join(what) or 'no change'})"
    return text + (f": {entry['reason']}" if entry.get("reason") else "")


def _config_changes(old_text: str | None, new_text: str | None) -> list[str]:
    """What differs between two site TOML texts: [[history]] entries, rule overrides, other keys."""
    import tomllib

    if not old_text or not new_text:
        return ["the site configuration changed (the previous one was not kept, no detail)"]
    try:
        old, new = tomllib.loads(old_text), tomllib.loads(new_text)
    except tomllib.TOMLDecodeError:
        return ["the site configuration changed"]
    lines = []
    old_hist = [json.dumps(h, sort_keys=True, default=str) for h in old.pop("history", [])]
    new_hist = [json.dumps(h, sort_keys=True, default=str) for h in new.pop("history", [])]
    lines += ["[[history]] entry added: " + _history_label(json.loads(h)) for h in new_hist if h not in old_hist]
    lines += ["[[history]] entry removed: " + _history_label(json.loads(h)) for h in old_hist if h not in new_hist]
    old_override = (old.get("qc") or {}).pop("override", {})
    new_override = (new.get("qc") or {}).pop("override", {})
    lines += ["rule override " + c for c in _dict_changes({"qc.override": old_override},
                                                         {"qc.override": new_override})]
    lines += ["configuration " + c for c in _dict_changes(old, new)]
    return lines or ["the site configuration file changed (comments or layout only)"]


def change_log(previous: pd.DataFrame | None, current: pd.DataFrame, *, previous_meta: dict,
               current_meta: dict, new_rows: dict) -> dict:
    """Which variables and periods changed since the previous run, and why.

    Parameters
    ----------
    previous, current : pandas.DataFrame or None
        The previous run's ``intervals.parquet`` frame (None on a first run) and this run's.
    previous_meta, current_meta : dict
        The file metadata of both runs (``config_sha256``, ``rules_sha256``,
        ``site_config_toml``, ``effective_rules``, ``provisional_from``, ``software_version``,
        ``run_id``).
    new_rows : dict
        Rows the store gained in this run, per stream.

    Returns
    -------
    dict
        ``reasons`` (why values may have changed: new data, a configuration change with the
        [[history]] entries and rule keys that differ, a rule-set change, a new version),
        ``new_intervals`` and ``new_period``, ``changes`` (per column: intervals changed,
        how many lie before the previous run's ``provisional_from``, and the periods, in
        the site's local standard time; float columns also the largest change
        ``max_abs_change`` in the column's unit and how many values became missing or
        present), ``revised_before_provisional`` (intervals the previous run called final
        that changed).
    """
    reasons = []
    if previous is None:
        return {"first_run": True, "changes": [], "reasons": ["first run for this output folder"]}
    config_changed = previous_meta.get("config_sha256") != current_meta.get("config_sha256")
    rules_changed = previous_meta.get("rules_sha256") != current_meta.get("rules_sha256")
    if any(new_rows.values()):
        reasons.append("new data were added to the store: " +
                       ", ".join(f"{k}: {v} rows" for k, v in new_rows.items() if v))
    if config_changed:
        reasons += _config_changes(previous_meta.get("site_config_toml"), current_meta.get("site_config_toml"))
    if rules_changed:
        detail = _dict_changes(previous_meta.get("effective_rules") or {},
                               current_meta.get("effective_rules") or {})
        reasons.append("the effective rule set changed" + (": " + "; ".join(detail) if detail else ""))
    if previous_meta.get("software_version") != current_meta.get("software_version"):
        reasons.append(f"the towerflow version changed ({previous_meta.get('software_version')} → "
                       f"{current_meta.get('software_version')})")
    prev = previous.set_index("timestamp_start")
    cur = current.set_index("timestamp_start")
    tz = pd.DatetimeIndex(cur.index).tz
    prev.index = pd.DatetimeIndex(prev.index).tz_convert(tz) if tz is not None else pd.DatetimeIndex(prev.index)
    cur.index = pd.DatetimeIndex(cur.index)
    common = cur.index.intersection(prev.index)
    if tz is not None and common.tz is not None:
        common = common.tz_convert(tz)
    final_until = previous_meta.get("provisional_from")
    final_mask = np.zeros(len(common), dtype=bool)
    if final_until:
        final_mask = np.asarray(common < pd.Timestamp(final_until))
    changes = []
    revised = np.zeros(len(common), dtype=bool)
    gap = pd.Timedelta(days=1)
    for col in _CHANGE_COLUMNS:
        if col not in cur.columns:
            continue
        if col not in prev.columns:
            changes.append({"column": col, "periods": [], "note": "new column"})
            continue
        a = prev.loc[common, col].to_numpy()
        b = cur.loc[common, col].to_numpy()
        extra = {}
        if a.dtype.kind == "f" or b.dtype.kind == "f":
            a = a.astype(float)
            b = b.astype(float)
            diff = ~((a == b) | (np.isnan(a) & np.isnan(b)) | np.isclose(a, b, rtol=1e-9, atol=1e-9, equal_nan=True))
            both = diff & np.isfinite(a) & np.isfinite(b)
            extra = {"max_abs_change": float(np.max(np.abs(b[both] - a[both]))) if both.any() else None,
                     "n_now_missing": int((diff & np.isfinite(a) & ~np.isfinite(b)).sum()),
                     "n_now_present": int((diff & ~np.isfinite(a) & np.isfinite(b)).sum())}
        else:
            diff = a != b
        if diff.any():
            revised |= diff & final_mask
            changes.append({"column": col, "n_intervals": int(diff.sum()),
                            "n_before_provisional": int((diff & final_mask).sum()), **extra,
                            "periods": _periods(common, diff, gap)})
    n_revised = int(revised.sum())
    if n_revised and not (config_changed or rules_changed):
        reasons.append(f"{n_revised} intervals before the previous run's provisional_from "
                       f"({final_until}) changed: record-wide fits and choices (fill method, fitted "
                       "relations) use every week's data")
    added = cur.index.difference(prev.index)
    return {
        "first_run": False,
        "previous_run": previous_meta.get("run_id"),
        "previous_provisional_from": final_until,
        "reasons": reasons or ["nothing changed in the inputs"],
        "new_intervals": int(len(added)),
        "new_period": [added[0].isoformat(), added[-1].isoformat()] if len(added) else None,
        "revised_before_provisional": n_revised,
        "changes": changes,
    }


def _config_text(path) -> str | None:
    """The site TOML's text, kept in the outputs' metadata so the next change log can diff it."""
    try:
        return Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return None


def _read_previous(site_dir: Path) -> tuple[pd.DataFrame | None, dict]:
    path = site_dir / "intervals.parquet"
    if not path.exists():
        return None, {}
    try:
        table = pq.read_table(path)
    except Exception:  # an unreadable old output is not this run's problem: say so in the log
        return None, {"unreadable": True}
    meta = json.loads((table.schema.metadata or {}).get(b"towerflow", b"{}"))
    return table.to_pandas(), meta


def _changes_markdown(site: str, log: dict) -> str:
    lines = [f"# Changes in this run: {site}", ""]
    lines += [f"- {r}" for r in log.get("reasons", [])]
    if log.get("new_period"):
        lines.append(f"- {log['new_intervals']} new intervals, {log['new_period'][0]} to {log['new_period'][1]}")
    if log.get("changes"):
        if log.get("previous_provisional_from"):
            lines.append(f"- the previous run called values before {log['previous_provisional_from']} final; "
                         f"{log.get('revised_before_provisional', 0)} of them changed")
        lines += ["", "| column | intervals changed | of them before the previous provisional_from "
                  "| largest change | now missing / now present | periods |",
                  "|---|---|---|---|---|---|"]
        for ch in log["changes"]:
            periods = "; ".join(f"{a} to {b}" for a, b in ch.get("periods", [])[:6])
            if len(ch.get("periods", [])) > 6:
                periods += f"; … ({len(ch['periods'])} periods)"
            largest = ch.get("max_abs_change")
            largest = f"{largest:.3g}" if isinstance(largest, float) else ""
            presence = (f"{ch['n_now_missing']} / {ch['n_now_present']}" if "n_now_missing" in ch else "")
            lines.append(f"| {ch['column']} | {ch.get('n_intervals', '')} | {ch.get('n_before_provisional', '')} "
                         f"| {largest} | {presence} | {periods or ch.get('note', '')} |")
    elif not log.get("first_run"):
        lines += ["", "No earlier value changed."]
    return "\n".join(lines) + "\n"


_NEIGHBOUR_COLUMNS = ("ta", "rg", "vpd", "rh")


def load_neighbours(cfg: SiteConfig, out_dir: Path) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """The accepted meteorology of the site's ``[gapfill] neighbours`` from their latest outputs.

    Each neighbour's ``DIR/<id>/intervals.parquet`` (its most recent run in the same output
    folder) gives ta, rg, vpd and rh with their flags. A neighbour without outputs yet is
    skipped with a note; its values then join the filling from its next run on.
    """
    frames: dict[str, pd.DataFrame] = {}
    notes: list[str] = []
    for nid in cfg.gapfill.get("neighbours", []):
        path = site_output_dir(out_dir, nid) / "intervals.parquet"
        if not path.exists():
            notes.append(f"gapfill.neighbours: {nid} has no outputs in {out_dir} yet; not used in this run")
            continue
        try:
            names = set(pq.read_schema(path).names)
            wanted = [c for v in _NEIGHBOUR_COLUMNS for c in (v, f"{v}_flag") if c in names]
            table = pd.read_parquet(path, columns=["timestamp_start", *wanted])
        except Exception as exc:  # a broken neighbour output must not stop this site
            notes.append(f"gapfill.neighbours: {path} could not be read ({type(exc).__name__}); not used")
            continue
        frames[nid] = table.set_index("timestamp_start")
    return frames, notes


@dataclass
class PreparedSite:
    """A site after its files are parsed and merged (in a staged store) and the working frame built."""

    cfg: SiteConfig
    rules: dict
    site_dir: Path
    store: SiteStore
    pending: object  # the store's staged change, committed by finish_site
    state: object  # pipeline.process.SiteState after the ingest stage
    ingest_warnings: list[str] = field(default_factory=list)


def prepare_site(config_path, files, out_dir, *, supersede: bool = False,
                 rules_spec: str | None = None, timings: dict | None = None) -> PreparedSite:
    """Configuration, rules, parsing and the staged store merge; nothing is written to the store."""
    from pipeline.process import stage_ingest

    timings = {} if timings is None else timings
    cfg: SiteConfig = load_site_config(config_path)
    rules = load_rules(rules_spec or cfg.qc.get("rules", "standard"),
                       site_overrides=cfg.qc.get("override"), site_file=cfg.path,
                       relative_to=cfg.path.parent)
    site_dir = site_output_dir(Path(out_dir), cfg.site.id)  # created only when the run commits
    store = SiteStore(site_dir / "store")
    t0 = time.perf_counter()
    ingested = []
    warnings: list[str] = []
    files = [Path(f) for f in files]
    for path in files:  # every file first: a missing one stops the run before any work
        if not path.is_file():
            raise InputError("file not found" if not path.exists() else "not a file", file=path)
    for path in files:
        stream = assign_stream(path, cfg)
        item = read_logger_file(path, stream, cfg.site)
        ingested.append(item)
        warnings.extend(item.warnings)
    timings["read_files"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    pending = store.prepare(ingested, supersede=supersede)
    warnings.extend(getattr(pending, "warnings", []))
    timings["store_merge"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    state = stage_ingest(pending.frames, cfg, rules)
    timings["ingest"] = time.perf_counter() - t0
    state.warnings[:0] = warnings
    report = state.summary.setdefault("ingest", {})
    if isinstance(report, dict):  # the non-numeric cells of this run's files, counted per file
        bad = {str(item.path): int(item.n_bad_cells) for item in ingested}
        report["bad_cells"] = bad
        report["n_bad_cells"] = int(sum(bad.values()))
    state.neighbours, notes = load_neighbours(cfg, Path(out_dir))
    state.warnings.extend(notes)
    return PreparedSite(cfg=cfg, rules=rules, site_dir=site_dir, store=store, pending=pending,
                        state=state, ingest_warnings=warnings)


def finish_site(state, pending, *, timings: dict | None = None) -> Path:
    """Commit the staged store change, then write the outputs (each file atomically)."""
    from pipeline.process import stage_outputs

    from .store import load_pending

    timings = {} if timings is None else timings
    if isinstance(pending, (str, os.PathLike)):
        pending = load_pending(Path(pending))
    site_dir = site_output_dir(Path(pending.store_root).parent.parent, state.site.id)
    t0 = time.perf_counter()
    products = stage_outputs(state, software_version=__version__)
    timings["outputs"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    site_dir.mkdir(parents=True, exist_ok=True)
    # Every output is written completely into a staging folder first; then, under the store's
    # lock, the store change is committed and the staged files renamed into place. A failure
    # before the renames (a full disk, a broken output, the lock held, another run committed
    # first) leaves the store and the earlier outputs exactly as they were; holding the lock
    # across commit and renames keeps a slower concurrent run from renaming older outputs
    # over newer ones.
    store = getattr(pending, "store", None) or SiteStore(pending.store_root)
    with store.lock():
        _remove_stale_staging(site_dir)
        with StagedFolder(site_dir) as stage:
            _write_outputs(site_dir, state.cfg, products, state.rules, products.warnings, pending.report,
                           stage=stage)
            timings["write"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            pending.commit()
        timings["store_commit"] = time.perf_counter() - t0
    return site_dir


def _remove_stale_staging(site_dir: Path) -> None:
    """Staging folders left by a killed run (call only under the store's lock: outputs are
    staged only while it is held, so any staging folder found then is stale)."""
    for entry in site_dir.glob(".staging-*"):
        if entry.is_dir():
            shutil.rmtree(entry, ignore_errors=True)


def run_site(config_path: str | os.PathLike, files, out_dir: str | os.PathLike, *,
             supersede: bool = False, rules_spec: str | None = None, report: bool = True,
             on_stage=None) -> SiteOutcome:
    """The weekly job for one site: add ``files`` to the store, process, write outputs.

    Parameters
    ----------
    config_path : path
        The site TOML.
    files : iterable of paths
        New logger exports (may be empty: reprocess the store).
    out_dir : path
        DIR; the site's outputs and store live under DIR/SITE_ID/.
    supersede : bool
        New values replace conflicting stored ones (the old ones are kept in the store's log).
    rules_spec : str, optional
        Rule set to use instead of the site's own ``[qc] rules`` (the network's standard);
        the site's ``[qc.override]`` still applies on top.
    report : bool
        Render ``qc_report.pdf``.
    on_stage : callable, optional
        Called with each stage name as it starts (progress display).
    """
    from pipeline.process import run_stage

    timings: dict[str, float] = {}
    t_start = time.perf_counter()
    if on_stage:
        on_stage("ingest")
    prepared = prepare_site(config_path, files, out_dir, supersede=supersede, rules_spec=rules_spec,
                            timings=timings)
    state = prepared.state
    for name in ("qc", "closure", "filling", "uncertainty", "conductance"):
        if on_stage:
            on_stage(name)
        t0 = time.perf_counter()
        state = run_stage(name, state)
        timings[name] = time.perf_counter() - t0
    if on_stage:
        on_stage("outputs")
    site_dir = finish_site(state, prepared.pending, timings=timings)
    if report:
        if on_stage:
            on_stage("report")
        t0 = time.perf_counter()
        from reports.site import write_site_report

        write_site_report(site_dir)
        timings["report"] = time.perf_counter() - t0
    timings["total"] = time.perf_counter() - t_start
    summary = json.loads((site_dir / "summary.json").read_text())
    return SiteOutcome(site=prepared.cfg.site.id, out_dir=site_dir, summary=summary, timings=timings,
                       warnings=summary.get("warnings", []), store_report=prepared.pending.report)


def _write_outputs(site_dir: Path, cfg: SiteConfig, products: SiteProducts, rules: dict,
                   warnings: list[str], store_report: dict, *, stage: StagedFolder) -> None:
    """Write the outputs into ``stage`` (whose commit makes them durable and moves them into
    ``site_dir``). The change log compares with the previous ``site_dir / intervals.parquet``.
    """
    rules_toml = rules_to_toml(rules, header=(
        f"Effective rule set of the last run for site {cfg.site.id}.\n"
        "Pass this file as the site's [qc] rules to repeat the run exactly."))
    rules_sha = hashlib.sha256(rules_toml.encode()).hexdigest()
    processed_at = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    run_id = f"{processed_at}-{os.getpid()}"
    file_meta = {
        "site": cfg.site.id,
        "site_name": cfg.site.name,
        "software_version": __version__,
        "config_sha256": cfg.sha256,
        "site_config_toml": _config_text(cfg.path),
        "rules_sha256": rules_sha,
        "provisional_from": products.summary.get("provisional_from"),
        "effective_rules": rules,
        "processed_at": processed_at,
        "run_id": run_id,
        "flag_bits": {str(b): f"{n}: {m}" for b, (n, m) in flagbits.BITS.items()},
        "interval_minutes": cfg.site.interval_minutes,
        "utc_offset_hours": cfg.site.utc_offset_hours,
        "cautions": "Filled values are estimates. Any use for water accounting or irrigation "
                    "follows local rules and licensed practice.",
    }
    previous, previous_meta = _read_previous(site_dir)
    new_rows = store_report.get("new_rows", {}) if isinstance(store_report, dict) else {}
    log = change_log(previous, products.intervals, previous_meta=previous_meta,
                     current_meta=file_meta, new_rows=new_rows)

    from pipeline.uncertainty import COLUMN_METADATA as uncertainty_metadata

    small_meta = {k: v for k, v in file_meta.items() if k != "effective_rules"}
    stage.write_bytes("intervals.parquet", parquet_with_metadata(
        products.intervals, file_metadata=file_meta, extra=uncertainty_metadata))
    stage.write_bytes("daily.parquet", parquet_with_metadata(
        products.daily, file_metadata=small_meta, extra=uncertainty_metadata))
    totals = pd.DataFrame(products.summary.get("totals") or [])
    if len(totals):
        stage.write_bytes("totals.parquet", parquet_with_metadata(
            totals, file_metadata=small_meta, extra=uncertainty_metadata))
    stage.write_text("effective_rules.toml", rules_toml)
    stage.write_text("changes.json", json.dumps(json_ready(log), indent=1))
    stage.write_text("changes.md", _changes_markdown(cfg.site.id, log))
    summary = dict(products.summary)
    summary["warnings"] = list(dict.fromkeys(warnings))
    summary["run_id"] = run_id
    summary["processed_at"] = processed_at
    summary["rules_sha256"] = rules_sha
    summary["store"] = store_report
    stage.write_text("summary.json", json.dumps(json_ready(summary), indent=1))


def stage_names(report: bool = True) -> tuple[str, ...]:
    return STAGES + (("report",) if report else ())

"""The site job as a chain of pure stages over in-memory frames.

``process`` runs the whole chain; the stage functions are separate so that the Prefect
flow (``flows/site.py``) can run each as a task, passing the state through files.
No file I/O here.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import pandas as pd

from . import flags as flagbits
from .config import SiteConfig
from .rules import duration

__all__ = ["SiteState", "SiteProducts", "STAGES", "process", "run_stage"]

#: stage names in order (used by the flows, the progress bar and the benchmarks)
STAGES = ("ingest", "qc", "closure", "filling", "uncertainty", "conductance", "outputs")


@dataclass
class SiteState:
    """Everything a stage needs from the stages before it."""

    cfg: SiteConfig
    rules: dict
    frame_ingested: pd.DataFrame  # after history corrections, before QC (written to the outputs)
    frame: pd.DataFrame  # after QC adjustments (clipped rh, zeroed night rg, helper columns)
    flags: pd.DataFrame
    columns: dict[str, pd.DataFrame] = field(default_factory=dict)  # stage name -> columns
    daily: dict[str, pd.DataFrame] = field(default_factory=dict)
    summary: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    #: nearby sites' accepted meteorology for driver filling: {site id: frame with
    #: ta/rg/vpd/rh and their ``_flag`` columns on a tz-aware index}
    neighbours: dict[str, pd.DataFrame] = field(default_factory=dict)

    @property
    def site(self):
        return self.cfg.site


@dataclass
class SiteProducts:
    intervals: pd.DataFrame
    daily: pd.DataFrame
    summary: dict
    warnings: list[str]
    rules: dict


def _site_with_interval(cfg: SiteConfig, frame: pd.DataFrame):
    from dataclasses import replace

    if cfg.site.interval_minutes is not None:
        return cfg
    step = frame.index[1] - frame.index[0] if len(frame.index) > 1 else pd.Timedelta(minutes=30)
    site = replace(cfg.site, interval_minutes=int(step / pd.Timedelta(minutes=1)))
    return replace(cfg, site=site)


def stage_ingest(raw_by_stream: dict[str, pd.DataFrame], cfg: SiteConfig, rules: dict) -> SiteState:
    """Raw store frames → the working frame (canonical names and units, history applied)."""
    from .ingest import build_working_frame

    frame, flags, report = build_working_frame(raw_by_stream, cfg)
    cfg = _site_with_interval(cfg, frame)
    state = SiteState(cfg=cfg, rules=rules, frame_ingested=frame, frame=frame, flags=flags)
    state.summary["ingest"] = report if isinstance(report, dict) else {}
    for w in (report or {}).get("warnings", []) if isinstance(report, dict) else []:
        state.warnings.append(str(w))
    return state


def stage_qc(state: SiteState) -> SiteState:
    from .qc import run_qc

    result = run_qc(state.frame, state.flags, state.site, state.rules)
    state.frame, state.flags = result.frame, result.flags
    state.summary.update(result.summary)
    state.warnings.extend(result.warnings)
    return state


def _absorb(state: SiteState, name: str, result) -> SiteState:
    """Take a stage's :class:`~pipeline.stage.StageResult` into the state under ``name``."""
    state.columns[name] = result.columns
    state.summary.update(result.summary)
    state.warnings.extend(result.warnings)
    if result.daily is not None:
        state.daily[name] = result.daily
    return state


def stage_closure(state: SiteState) -> SiteState:
    from .closure import assess_closure
    from .health import assess_health

    _absorb(state, "closure", assess_closure(state.frame, state.flags, state.site, state.rules))
    health = assess_health(state.frame, state.flags, state.site, state.rules)
    _absorb(state, "health", health)
    if "suspect_clock" in health.columns:
        suspect = health.columns["suspect_clock"].to_numpy(dtype=bool)
        flags = state.flags.copy()
        for var in flags.columns:
            flagbits.set_bit(flags, var, suspect, flagbits.CLOCK)
        state.flags = flags
    return state


def stage_filling(state: SiteState) -> SiteState:
    from .gapfill import fill_gaps

    frame = state.frame
    closure = state.columns.get("closure")
    if closure is not None and "available_energy" in closure and "available_energy" not in frame:
        frame = frame.assign(available_energy=closure["available_energy"])
    result = fill_gaps(frame, state.flags, state.site, state.rules, neighbours=state.neighbours or None)
    return _absorb(state, "filling", result)


def stage_uncertainty(state: SiteState) -> SiteState:
    """Random and filling errors per interval, and ET totals with their bands."""
    from .uncertainty import assess_uncertainty

    result = assess_uncertainty(state.frame, state.flags, state.site, state.rules,
                                filling=state.columns["filling"], fill_summary=state.summary,
                                closure=state.columns.get("closure"))
    return _absorb(state, "uncertainty", result)


def stage_conductance(state: SiteState) -> SiteState:
    from .conductance import compute_conductance

    result = compute_conductance(
        state.frame, state.flags, state.site, state.rules,
        closed=state.columns.get("closure"),
        aerodynamic=state.cfg.conductance.get("aerodynamic", "ustar"),
        kb_inverse=state.cfg.conductance.get("kb_inverse"),
        le_filled=state.columns["filling"]["le_filled"] if "filling" in state.columns else None,
    )
    return _absorb(state, "conductance", result)


def _daily_core(state: SiteState) -> pd.DataFrame:
    """CONTRACT daily columns that rest on several stages: et_mm, complete_day, le_measured_fraction."""
    from .conductance import et_mm_daily

    fill = state.columns["filling"]
    frame = state.frame
    interval = state.site.interval
    frozen = frame["snow_or_frozen"] if "snow_or_frozen" in frame else None
    et = et_mm_daily(fill["le_filled"], frame["ta"], frozen, interval)
    local_day = pd.Series(frame.index.normalize().tz_localize(None), index=frame.index)
    per_day = pd.DataFrame({
        "present": fill["le_filled"].notna().to_numpy(),
        "measured": (fill["le_fill_method"] == "measured").to_numpy(),
    }, index=local_day.to_numpy())
    grouped = per_day.groupby(level=0)
    expected = pd.Timedelta(days=1) / interval
    out = pd.DataFrame({
        "complete_day": grouped["present"].sum() == expected,
        "le_measured_fraction": grouped["measured"].sum() / expected,
    })
    out.index.name = "date"
    et = et.copy()
    et.index = pd.to_datetime(et.index)
    out = out.join(et.rename("et_mm") if isinstance(et, pd.Series) else et, how="left")
    # a partial day's sum would understate the day's ET: only complete days get a total
    out["et_mm"] = out["et_mm"].where(out["complete_day"])
    return out[["et_mm", "complete_day", "le_measured_fraction"]]


def provisional_from(index: pd.DatetimeIndex, rules: dict) -> pd.Timestamp:
    """First interval whose values may change when the next week arrives.

    Despiking blocks and filling windows reach forward in time: an interval within the
    longest such reach of the end of the record can still change.
    """
    reach = [duration(rules.get("despike", {}).get("block", "13 days"))]
    gap_rules = rules.get("gapfill", {})
    for key, value in gap_rules.items():
        if key.endswith("window") or key.endswith("windows"):
            values = value if isinstance(value, list) else [value]
            for v in values:
                try:
                    reach.append(duration(v))
                except (ValueError, TypeError):
                    pass
    longest = max(reach)
    return max(index[0], index[-1] - longest)


def _history_summary(cfg: SiteConfig) -> list[dict]:
    """The site-history periods, for the reports' time axes."""
    from .history import history_periods

    table = history_periods(cfg.history)
    records = []
    for row in table.to_dict("records"):
        records.append({k: (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in row.items()})
    return records


def stage_outputs(state: SiteState, *, software_version: str = "") -> SiteProducts:
    from .outputs import daily_table, intervals_table

    parts = [state.columns[k] for k in ("filling", "uncertainty", "conductance", "closure", "health")
             if k in state.columns]
    helper_cols = [c for c in ("is_day", "snow_or_frozen") if c in state.frame and c not in state.frame_ingested]
    if helper_cols:
        parts.append(state.frame[helper_cols])
    intervals = intervals_table(state.frame_ingested, state.flags, *parts, interval=state.site.interval)
    daily_parts = [_daily_core(state)]
    for key in ("closure", "conductance", "filling", "uncertainty"):
        if key in state.daily:
            d = state.daily[key].copy()
            d.index = pd.to_datetime(pd.Index(d.index))
            daily_parts.append(d)
    daily = daily_table(daily_parts)
    index = state.frame.index
    summary = {
        "site": state.site.id,
        "start": index[0].isoformat(),
        "end": (index[-1] + state.site.interval).isoformat(),
        "n_intervals": int(len(index)),
        "provisional_from": provisional_from(index, state.rules).isoformat(),
    }
    for key in ("closure", "gaps", "spikes", "fill_skill"):
        summary[key] = state.summary.get(key, {})
    for key, value in state.summary.items():
        summary.setdefault(key, value)
    summary["history"] = _history_summary(state.cfg)
    summary["warnings"] = list(dict.fromkeys(state.warnings))
    summary["software_version"] = software_version
    summary["config_sha256"] = state.cfg.sha256
    return SiteProducts(intervals=intervals, daily=daily, summary=summary,
                        warnings=summary["warnings"], rules=state.rules)


def run_stage(name: str, state, **kwargs):
    """Run one named stage on the state (``ingest`` takes ``(raw, cfg, rules)``)."""
    return {
        "qc": stage_qc,
        "closure": stage_closure,
        "filling": stage_filling,
        "uncertainty": stage_uncertainty,
        "conductance": stage_conductance,
    }[name](state, **kwargs)


def process(raw_by_stream: dict[str, pd.DataFrame], cfg: SiteConfig, rules: dict, *,
            software_version: str = "", timings: dict | None = None,
            on_stage=None) -> SiteProducts:
    """Run every stage on the site's raw store frames and return the output tables."""
    timings = {} if timings is None else timings

    def _timed(name, fn, *args, **kw):
        if on_stage is not None:
            on_stage(name)
        t0 = time.perf_counter()
        out = fn(*args, **kw)
        timings[name] = time.perf_counter() - t0
        return out

    state = _timed("ingest", stage_ingest, raw_by_stream, cfg, rules)
    state = _timed("qc", stage_qc, state)
    state = _timed("closure", stage_closure, state)
    state = _timed("filling", stage_filling, state)
    state = _timed("uncertainty", stage_uncertainty, state)
    state = _timed("conductance", stage_conductance, state)
    return _timed("outputs", stage_outputs, state, software_version=software_version)

"""The pages of the site quality report, one function per page.

Each page function takes the :class:`Context` and returns a matplotlib ``Figure``. A page
whose inputs are missing still appears, with a note in place of the missing figure, so the
report always has the same pages in the same order.
"""
from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass

import matplotlib.dates as mdates
import numpy as np
import pandas as pd
from matplotlib import colormaps
from matplotlib.figure import Figure

from pipeline import flags as flagbits

from . import style
from ._data import (VARIABLE_ORDER, SiteOutputs, accepted_values, fmt, get, history_lines, history_periods,
                    label, local_naive, num, primary_reason, unit_of)

CAUTION = ("Filled values are estimates; use for water accounting or irrigation follows local rules "
           "and licensed practice.")

# The report computes no physics of its own: ET, EBR, gs and omega come from the outputs;
# the only conversions are unit scalings for display (m s-1 -> mm s-1, W m-2 x s -> MJ m-2).


@dataclass
class Context:
    out: SiteOutputs
    header: str
    footer: str
    time: pd.Series | None  # naive local start times
    day_index: np.ndarray | None  # day number since the first day, per interval
    slot: np.ndarray | None  # time-of-day bin, per interval
    days: pd.DatetimeIndex | None  # the days of the grid
    n_slots: int
    history: list

    @property
    def frame(self) -> pd.DataFrame | None:
        return self.out.intervals


def build_context(out: SiteOutputs) -> Context:
    header = f"site {out.site} | {out.period_text()}"
    version = out.summary.get("software_version") or out.file_meta.get("software_version") or "unknown"
    processed = out.summary.get("processed_at") or out.file_meta.get("processed_at") or ""
    footer = f"towerflow {version} site quality report" + (f" | processed {processed}" if processed else "")
    n_slots = max(1, int(round(pd.Timedelta(days=1) / out.interval)))
    time = day_index = slot = days = None
    if out.intervals is not None and len(out.intervals):
        time = local_naive(out.intervals["timestamp_start"])
        day = time.dt.normalize()
        first = day.iloc[0]
        day_index = ((day - first) // pd.Timedelta(days=1)).to_numpy().astype(np.int64)
        slot = ((time - day) // out.interval).to_numpy().astype(np.int64)
        slot = np.clip(slot, 0, n_slots - 1)
        days = pd.date_range(first, day.iloc[-1], freq="D")
    return Context(out=out, header=header, footer=footer, time=time, day_index=day_index, slot=slot,
                   days=days, n_slots=n_slots, history=history_periods(out))


# ---------------------------------------------------------------------------- helpers

def _page(ctx: Context, title: str) -> Figure:
    return style.new_page(title, header=ctx.header, footer=ctx.footer)


def _date_axis(ax) -> None:
    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))


def _time_axis_common(ctx: Context, ax, *, history_labels: bool = True, outline: bool = False) -> None:
    _date_axis(ax)
    if ctx.time is not None and len(ctx.time):
        ax.set_xlim(ctx.time.iloc[0], ctx.time.iloc[-1] + ctx.out.interval)
    style.shade_history(ax, ctx.history, label=history_labels, outline=outline)


def _text_block(ax, lines: list[str], *, size: float = 8.0, width: int = 95, max_lines: int = 60,
                title: str | None = None) -> None:
    ax.set_axis_off()
    wrapped: list[str] = []
    for line in lines:
        pieces = textwrap.wrap(line, width=width, subsequent_indent="    ") or [""]
        wrapped.extend(pieces)
    if len(wrapped) > max_lines:
        extra = len(wrapped) - max_lines + 1
        wrapped = wrapped[:max_lines - 1] + [f"... {extra} more line(s): see summary.json"]
    y = 1.0
    if title:
        ax.text(0.0, y, title, fontsize=size + 1.5, fontweight="bold", va="top", transform=ax.transAxes)
        y -= 0.055 * (size / 8.0) * (30 / max(30, max_lines))
    ax.text(0.0, y, "\n".join(wrapped), fontsize=size, va="top", ha="left", transform=ax.transAxes,
            linespacing=1.35)


def _axis_label(ctx: Context, var: str, what: str | None = None) -> str:
    unit = unit_of(ctx.out, var)
    base = what or label(var)
    return f"{base} ({unit})" if unit else base


def _grid(ctx: Context, values: np.ndarray) -> np.ndarray:
    """Day x time-of-day grid of one series (NaN where there is no value)."""
    grid = np.full((len(ctx.days), ctx.n_slots), np.nan)
    grid[ctx.day_index, ctx.slot] = values
    return grid


def _robust_limits(*arrays, lo=1.0, hi=99.0) -> tuple[float, float] | None:
    stacked = np.concatenate([np.asarray(a, float).ravel() for a in arrays])
    stacked = stacked[np.isfinite(stacked)]
    if not stacked.size:
        return None
    vmin, vmax = np.percentile(stacked, [lo, hi])
    if vmax <= vmin:
        vmax = vmin + 1.0
    return float(vmin), float(vmax)


def _step_fill(ax, starts, values, width: pd.Timedelta, *, bottom=None, **kw) -> None:
    """Bars of equal ``width`` from ``starts`` drawn as one stepped polygon (fast for a year of days);
    missing values leave gaps."""
    starts = pd.DatetimeIndex(pd.to_datetime(starts))
    if not len(starts):
        return
    x = np.append(mdates.date2num(starts), mdates.date2num(starts[-1] + width))
    v = np.asarray(values, dtype=float)
    y = np.append(v, v[-1])
    b = np.zeros_like(y) if bottom is None else np.append(np.asarray(bottom, float), np.asarray(bottom, float)[-1])
    ax.fill_between(x, b, y + b if bottom is not None else y, step="post", linewidth=0, **kw)


# ---------------------------------------------------------------------------- page 1: overview

def _coverage_and_reasons(ctx: Context) -> tuple[list[str], list[str], list[list[str]]]:
    frame = ctx.frame
    variables = [v for v in VARIABLE_ORDER if v in frame.columns]
    counts = {}
    for v in variables:
        fcol = f"{v}_flag"
        if fcol in frame.columns:
            counts[v] = flagbits.count_by_reason(frame[fcol].fillna(flagbits.MISSING).astype(np.int64))
    present_reasons = [name for _, (name, _) in flagbits.BITS.items()
                       if any(counts.get(v, {}).get(name, 0) for v in variables)]
    header = ["variable (unit)", "accepted"] + [_REASON_HEADERS.get(r, r) for r in present_reasons]
    rows = []
    n = len(frame)
    for v in variables:
        acc = np.isfinite(accepted_values(frame, v)).sum()
        row = [f"{label(v)} ({unit_of(ctx.out, v)})", f"{100.0 * acc / n:.1f} %" if n else "n/a"]
        row += [str(counts.get(v, {}).get(r, 0) or "") for r in present_reasons]
        rows.append(row)
    return variables, header, rows


_REASON_HEADERS = {
    "missing": "missing", "out_of_range": "out of\nrange", "spike": "spike", "instrument_flag": "instrument\nflag",
    "wet": "wet", "low_turbulence": "low turbulence", "history_exclusion": "history\nexclusion",
    "inconsistent": "inconsistent", "flat_line": "flat\nline", "excluded_sector": "excluded\nsector",
    "snow_or_frozen": "snow or\nfrozen", "suspect_clock": "suspect\nclock",
}


def _text_table(ax, header: list[str], rows: list[list[str]], *, top: float, size: float = 7.2) -> float:
    """A light table drawn as one text per column (fast to render); returns the bottom in axes units.

    The first column is left-aligned; the others are right-aligned numbers whose headers are
    written upwards so that a dozen narrow columns fit.
    """
    n_cols = len(header)
    first_right = 0.30
    rest = (1.0 - first_right) / max(1, n_cols - 1)
    rights = [first_right + rest * k for k in range(1, n_cols)]
    fig = ax.figure
    height_pts = ax.get_position().height * fig.get_figheight() * 72.0
    line = size * 1.45 / height_pts  # axes units per table line
    header_height = 50.0 / height_pts  # room for upright headers, ~50 pt
    y_head = top - header_height
    ax.text(0.0, y_head + 0.2 * line, header[0], fontsize=size - 0.4, fontweight="bold", ha="left", va="bottom",
            transform=ax.transAxes)
    for j, h in enumerate(header[1:], start=1):
        ax.text(rights[j - 1] - 0.25 * rest, y_head + 0.2 * line, h.replace("\n", " "), fontsize=size - 0.6,
                fontweight="bold", rotation=90, ha="center", va="bottom", transform=ax.transAxes)
    y_body = y_head - 0.35 * line
    ax.text(0.0, y_body, "\n".join(r[0] for r in rows), fontsize=size, ha="left", va="top",
            linespacing=1.45, transform=ax.transAxes)
    for j in range(1, n_cols):
        ax.text(rights[j - 1] - 0.05 * rest, y_body, "\n".join(r[j] for r in rows), fontsize=size, ha="right",
                va="top", linespacing=1.45, transform=ax.transAxes)
    ax.plot([0, 1], [y_head] * 2, color="#333333", linewidth=0.6, transform=ax.transAxes)
    bottom = y_body - len(rows) * line * 1.02
    ax.plot([0, 1], [bottom] * 2, color="#333333", linewidth=0.6, transform=ax.transAxes)
    return bottom


def page_overview(ctx: Context) -> Figure:
    fig = _page(ctx, "Overview")
    out, s = ctx.out, ctx.out.summary
    # left: coverage and rejections table
    ax_table = fig.add_axes([0.035, 0.08, 0.50, 0.83])
    ax_table.set_axis_off()
    if ctx.frame is None or not len(ctx.frame):
        style.note(ax_table, "No interval data could be read: " + "; ".join(out.problems or ["unknown reason"]))
    else:
        _, header, rows = _coverage_and_reasons(ctx)
        ax_table.text(0.0, 1.0, "Coverage and rejected values by reason (number of intervals)",
                      fontsize=9.5, fontweight="bold", va="top", transform=ax_table.transAxes)
        ax_table.text(0.0, 0.965, "accepted: share of intervals with an accepted value; a value rejected "
                      "for several reasons counts under each.", fontsize=7, va="top", color="#444444",
                      transform=ax_table.transAxes)
        bottom = _text_table(ax_table, header, rows, top=0.92)
        hist = history_lines(out)
        if hist:
            _text_block(fig.add_axes([0.035, 0.08, 0.50, max(0.05, 0.83 * (bottom - 0.03))]),
                        ["Site-history periods (shaded grey on time axes):"] + hist, size=7, width=110,
                        max_lines=10)
    # right: key figures
    lines = []
    n_int = s.get("n_intervals", len(ctx.frame) if ctx.frame is not None else "n/a")
    lines.append(f"Period: {out.period_text()} ({n_int} intervals of {int(out.interval / pd.Timedelta(minutes=1))} min)")
    if s.get("provisional_from"):
        lines.append(f"Provisional from {pd.Timestamp(s['provisional_from']).strftime('%Y-%m-%d %H:%M')}: "
                     "values after this may still change when next week's data arrive.")
    c = s.get("closure") or {}
    lines += ["", "ENERGY-BALANCE CLOSURE (intervals with H, LE, Rn, G all accepted)",
              f"  EBR = sum(H+LE)/sum(Rn-G) = {fmt(c.get('ebr'))};  OLS: slope {fmt(c.get('slope'))}, "
              f"intercept {fmt(c.get('intercept'), '.1f')} W m-2, r² {fmt(c.get('r2'))}, n = {c.get('n', 'n/a')}"]
    cd = s.get("closure_daily") or {}
    if cd:
        lines.append(f"  daily sums: EBR {fmt(cd.get('ebr'))}, slope {fmt(cd.get('slope'))}, "
                     f"r² {fmt(cd.get('r2'))}, n = {cd.get('n', 'n/a')} days")
    monthly = s.get("closure_monthly") or []
    if isinstance(monthly, list) and monthly:
        parts = [f"{m.get('month', '?')}: {fmt(m.get('ebr'))}" for m in monthly if isinstance(m, dict)]
        lines.append("  monthly EBR (drift): " + ", ".join(parts))
    gaps, spikes = s.get("gaps") or {}, s.get("spikes") or {}
    lines += ["", "GAPS AND SPIKES",
              "  without accepted value: " + ", ".join(
                  f"{label(v)} {fmt(100 * num(gaps.get(v)), '.1f')} %" for v in ("le", "h") if v in gaps) or "  n/a",
              "  spikes removed: " + (", ".join(f"{label(v)} {n}" for v, n in spikes.items()) or "n/a")]
    lines += ["", "FILL SKILL (accepted values hidden and filled again)"]
    skill = s.get("fill_skill") or {}
    any_skill = False
    for v in ("le", "h"):
        sk = skill.get(v) if isinstance(skill, dict) else None
        if isinstance(sk, dict):
            any_skill = True
            lines.append(f"  {label(v)}: RMSE {fmt(sk.get('rmse'), '.1f')} W m-2, bias {fmt(sk.get('bias'), '+.1f')} "
                         f"W m-2, r² {fmt(sk.get('r2'))}, n = {sk.get('n', 'n/a')}"
                         + (f", method {sk['method']}" if sk.get("method") else ""))
    if not any_skill:
        lines.append("  not available in summary.json")
    clock = get(s, "health", "clock", default={}) or {}
    offsets = [num(d.get("offset_minutes")) for d in clock.get("daily_offsets", []) if isinstance(d, dict)]
    offsets = [o for o in offsets if not math.isnan(o)]
    lines += ["", "LOGGER CLOCK (against solar time on clear days)"]
    if offsets:
        lines.append(f"  median offset {np.median(offsets):+.1f} min over {len(offsets)} clear days; "
                     f"steps: {len(clock.get('steps') or [])}; drift " +
                     (f"{fmt(clock.get('drift_minutes_per_week'), '+.1f')} min/week"
                      if not math.isnan(num(clock.get("drift_minutes_per_week"))) else "none detected"))
    else:
        lines.append("  no clear day to check the clock")
    if clock.get("suspect_weeks"):
        lines.append("  suspect weeks: " + ", ".join(map(str, clock["suspect_weeks"])))
    warnings = [str(w) for w in (s.get("warnings") or [])]
    unit_warn = [str(w) for w in (get(s, "ingest", "unit_warnings", default=[]) or [])]
    lines += ["", f"WARNINGS ({len(warnings) + len(unit_warn)})"]
    for w in unit_warn:
        lines.append(f"  unit: {w}")
    for w in warnings:
        lines.append(f"  - {w}")
    if not warnings and not unit_warn:
        lines.append("  none")
    for p in out.problems:
        lines.append(f"  report input: {p}")
    ax_text = fig.add_axes([0.56, 0.16, 0.405, 0.76])
    _text_block(ax_text, lines, size=7.4, width=86, max_lines=62)
    fig.text(0.56, 0.085, "CAUTION: " + CAUTION, fontsize=8.5, fontweight="bold", va="bottom", wrap=True,
             color="#000000", bbox={"boxstyle": "round,pad=0.5", "facecolor": "#FFF4D6",
                                    "edgecolor": style.OKABE_ITO["orange"]})
    return fig


# ---------------------------------------------------------------------------- page 2: health

_SEVERITY_ORDER = {"act": 0, "watch": 1, "ok": 2}


def _week_range(weeks: list[str]) -> str:
    weeks = sorted(set(weeks))
    if len(weeks) <= 3:
        return ", ".join(weeks)
    return f"{weeks[0]} .. {weeks[-1]} ({len(weeks)} weeks)"


def page_health(ctx: Context) -> Figure:
    fig = _page(ctx, "Sensor health: what to check at the next visit")
    health = ctx.out.summary.get("health") or {}
    findings = [f for f in (health.get("findings") or []) if isinstance(f, dict)]
    ax = fig.add_axes([0.035, 0.44, 0.93, 0.46])
    if not findings:
        style.note(ax, "No health diagnostics in summary.json.")
    else:
        groups: dict[tuple[str, str], dict] = {}
        for f in findings:
            key = (str(f.get("check", "?")), str(f.get("severity", "ok")))
            g = groups.setdefault(key, {"weeks": [], "message": ""})
            g["weeks"].append(str(f.get("week", "")))
            g["message"] = str(f.get("message", ""))  # the latest week's message
        alerts = sorted(((k, g) for k, g in groups.items() if k[1] != "ok"),
                        key=lambda kg: (_SEVERITY_ORDER.get(kg[0][1], 3), kg[0][0]))
        ok_checks = sorted({k[0] for k in groups if k[1] == "ok"} - {k[0] for k, _ in alerts})
        counts = {sev: sum(1 for f in findings if f.get("severity") == sev) for sev in ("act", "watch", "ok")}
        lines = [f"{counts['act']} finding(s) to act on, {counts['watch']} to watch, {counts['ok']} checks passed "
                 "(one line per check and severity; the message is that of the latest week)."]
        ax.set_axis_off()
        ax.text(0.0, 1.0, lines[0], fontsize=8, va="top", transform=ax.transAxes)
        y = 0.93
        if not alerts:
            ax.text(0.0, y, "Nothing to act on or watch: every weekly check passed.", fontsize=9,
                    color=style.ROLE["ok"], fontweight="bold", va="top", transform=ax.transAxes)
            y -= 0.08
        max_rows = 11
        for (check, sev), g in alerts[:max_rows]:
            wrapped = textwrap.wrap(g["message"], 150) or [""]
            ax.text(0.0, y, sev.upper(), fontsize=8, fontweight="bold", va="top", transform=ax.transAxes,
                    color="white", bbox={"boxstyle": "round,pad=0.25", "facecolor": style.ROLE.get(sev, "#777777"),
                                         "edgecolor": "none"})
            ax.text(0.06, y, f"{check.replace('_', ' ')}  [{_week_range(g['weeks'])}]", fontsize=8,
                    fontweight="bold", va="top", transform=ax.transAxes)
            ax.text(0.06, y - 0.04, "\n".join(wrapped[:2]), fontsize=7.4, va="top", transform=ax.transAxes,
                    color="#222222")
            y -= 0.045 + 0.04 * min(2, len(wrapped))
        if len(alerts) > max_rows:
            ax.text(0.0, y, f"... and {len(alerts) - max_rows} more (see summary.json, health.findings)",
                    fontsize=7.5, va="top", transform=ax.transAxes)
            y -= 0.05
        if ok_checks:
            ax.text(0.0, max(y, 0.0), "Passed every week: " + ", ".join(c.replace("_", " ") for c in ok_checks),
                    fontsize=7.5, va="top", color="#444444", transform=ax.transAxes)
    # bottom: weekly diagnostics
    weeks = [w for w in (health.get("weeks") or []) if isinstance(w, dict)]
    panels = [
        ("clock_offset_minutes", "Logger clock offset", "offset from solar time (min)"),
        ("ebr", "Weekly energy-balance ratio", "EBR (-)"),
        ("rg_clear_sky_ratio", "Rg against clear sky (best day)", "Rg / clear-sky Rg (-)"),
        ("night_rh_max", "Night-time maximum RH", "RH (%)"),
    ]
    starts = pd.to_datetime([w.get("start") for w in weeks], errors="coerce") if weeks else None
    for i, (key, title, ylab) in enumerate(panels):
        ax = fig.add_axes([0.06 + i * 0.235, 0.08, 0.18, 0.30])
        vals = np.array([num(w.get(key)) for w in weeks]) if weeks else np.array([])
        if not weeks or not np.isfinite(vals).any():
            style.note(ax, f"{title}:\nno weekly value")
            continue
        ok = np.isfinite(vals) & ~pd.isna(starts)
        ax.plot(starts[ok], vals[ok], marker="o", markersize=3, color=style.OKABE_ITO["blue"])
        if key == "clock_offset_minutes":
            ax.axhline(0, color="#777777", linewidth=0.8)
        if key in ("ebr", "rg_clear_sky_ratio"):
            ax.axhline(1.0, color="#777777", linewidth=0.8, linestyle="--")
        ax.set_title(title)
        ax.set_ylabel(ylab)
        ax.set_xlabel("week start", loc="left")
        _date_axis(ax)
    return fig


# ---------------------------------------------------------------------------- page 3: availability

def page_availability(ctx: Context) -> Figure:
    fig = _page(ctx, "Data availability over time")
    ax = fig.add_axes([0.10, 0.20, 0.80, 0.70])
    frame = ctx.frame
    if frame is None or not len(frame):
        style.note(ax, "No interval data.")
        return fig
    variables = [v for v in VARIABLE_ORDER if v in frame.columns]
    n_days = len(ctx.days)
    per_day = np.bincount(ctx.day_index, minlength=n_days).astype(float)
    rows = []
    for v in variables:
        acc = np.isfinite(accepted_values(frame, v))
        rows.append(np.bincount(ctx.day_index, weights=acc, minlength=n_days) / ctx.n_slots)
    for extra in ("le_filled", "h_filled"):
        if extra in frame.columns:
            present = frame[extra].notna().to_numpy()
            rows.append(np.bincount(ctx.day_index, weights=present, minlength=n_days) / ctx.n_slots)
            variables.append(extra)
    matrix = np.vstack(rows)
    matrix[:, per_day == 0] = np.nan
    x0, x1 = mdates.date2num(ctx.days[0]), mdates.date2num(ctx.days[-1] + pd.Timedelta(days=1))
    cmap = colormaps[style.SEQUENTIAL_CMAP].with_extremes(bad="#FFFFFF")
    im = ax.imshow(matrix, aspect="auto", interpolation="nearest", cmap=cmap, vmin=0, vmax=1,
                   extent=[x0, x1, len(variables) - 0.5, -0.5])
    ax.set_yticks(range(len(variables)))
    ax.set_yticklabels([label(v) if not v.endswith("_filled") else f"{label(v[:-7])} filled" for v in variables])
    ax.grid(False)
    _time_axis_common(ctx, ax, outline=True)
    ax.set_xlabel("date (local standard time)")
    ax.set_ylabel("variable")
    ax.set_title("Share of each day's intervals with an accepted value (filled series: with any value)")
    cax = fig.add_axes([0.915, 0.20, 0.012, 0.70])
    cb = fig.colorbar(im, cax=cax)
    cb.set_label("share of the day's intervals (-)")
    fig.text(0.10, 0.10, "Dark = no accepted value that day; white = outside the record. Dashed frames: corrections and "
             "exclusions of the site history (numbers as on the overview page); blue band on top: irrigation.", fontsize=7.5, color="#444444")
    return fig


# ---------------------------------------------------------------------------- page 4: heat maps

def page_heatmaps(ctx: Context) -> Figure:
    fig = _page(ctx, "LE and H by day and time of day: before QC, after QC, after filling")
    frame = ctx.frame
    rows = (("le", "Latent heat flux LE"), ("h", "Sensible heat flux H"))
    stages = ("as ingested (before QC)", "accepted (after QC)", "gap-filled")
    for r, (var, name) in enumerate(rows):
        axes = [fig.add_axes([0.06 + c * 0.295, 0.56 - r * 0.43, 0.265, 0.32]) for c in range(3)]
        if frame is None or var not in frame.columns:
            for ax in axes:
                style.note(ax, f"No {label(var)} in intervals.parquet.")
            continue
        raw = frame[var].to_numpy(dtype=float, na_value=np.nan)
        acc = accepted_values(frame, var)
        filled = (frame[f"{var}_filled"].to_numpy(dtype=float, na_value=np.nan)
                  if f"{var}_filled" in frame.columns else None)
        limits = _robust_limits(acc) or _robust_limits(raw) or (0.0, 1.0)
        cmap = colormaps[style.SEQUENTIAL_CMAP].with_extremes(bad="#FFFFFF")
        x0 = mdates.date2num(ctx.days[0])
        x1 = mdates.date2num(ctx.days[-1] + pd.Timedelta(days=1))
        im = None
        for c, (ax, values) in enumerate(zip(axes, (raw, acc, filled))):
            if values is None:
                style.note(ax, f"No {var}_filled column: the filled series is not available.")
                continue
            im = ax.imshow(_grid(ctx, values).T, aspect="auto", origin="lower", interpolation="nearest",
                           cmap=cmap, vmin=limits[0], vmax=limits[1], extent=[x0, x1, 0, 24])
            ax.grid(False)
            _date_axis(ax)
            style.shade_history(ax, ctx.history, label=False, outline=True)
            ax.set_yticks([0, 6, 12, 18, 24])
            ax.set_title(f"{name}, {stages[c]}", fontsize=8.5)
            ax.set_ylabel("time of day (h, local standard time)" if c == 0 else "")
        if im is not None:
            cax = fig.add_axes([0.945, 0.56 - r * 0.43, 0.01, 0.32])
            cb = fig.colorbar(im, cax=cax, extend="both")
            cb.set_label(_axis_label(ctx, var))
    fig.text(0.06, 0.045, "Dates and times in local standard time. White: no value. Dashed frames: site-history "
             "corrections and exclusions.\nColour scale: 1st to 99th percentile of the accepted values, shared by "
             "the three panels of a row; values beyond it are shown at the end colours.",
             fontsize=7.5, color="#444444", va="bottom")
    return fig


# ---------------------------------------------------------------------------- page 5: time series

def _reason_scatter(ctx: Context, ax, var: str) -> None:
    frame = ctx.frame
    raw = frame[var].to_numpy(dtype=float, na_value=np.nan)
    acc = accepted_values(frame, var)
    t = ctx.time.to_numpy()
    ax.plot(t, acc, color="#333333", linewidth=0.5, label="accepted", rasterized=True)
    fcol = f"{var}_flag"
    if fcol in frame.columns:
        reasons = primary_reason(frame[fcol].fillna(flagbits.MISSING).to_numpy())
        rejected = np.isfinite(raw) & (reasons != "")
        names, counts = np.unique(reasons[rejected], return_counts=True)
        for name, count in sorted(zip(names, counts), key=lambda nc: -nc[1]):
            sel = rejected & (reasons == name)
            colour, marker = style.REASON_STYLE.get(name, ("#777777", "o"))
            ax.scatter(t[sel], raw[sel], s=7, marker=marker, color=colour, linewidths=0.6,
                       label=f"{name.replace('_', ' ')} ({count})", rasterized=True, zorder=3)
    # keep the scale on the plausible range so a few wild values do not flatten the rest
    lim = _robust_limits(raw, lo=0.2, hi=99.8)
    if lim:
        pad = 0.1 * (lim[1] - lim[0])
        ax.set_ylim(lim[0] - pad, lim[1] + pad)
    _time_axis_common(ctx, ax)
    ax.set_ylabel(_axis_label(ctx, var))
    ax.legend(loc="upper left", bbox_to_anchor=(1.005, 1.0), fontsize=7, title="rejected by reason (n)",
              title_fontsize=7, markerscale=1.5)


def page_timeseries(ctx: Context) -> Figure:
    fig = _page(ctx, "LE and H with rejected values marked by reason")
    frame = ctx.frame
    for r, (var, name) in enumerate((("le", "Latent heat flux LE"), ("h", "Sensible heat flux H"))):
        ax = fig.add_axes([0.06, 0.57 - r * 0.44, 0.74, 0.31])
        if frame is None or var not in frame.columns:
            style.note(ax, f"No {label(var)} in intervals.parquet.")
            continue
        _reason_scatter(ctx, ax, var)
        ax.set_title(f"{name}: accepted values (line) and rejected values (markers, first reason)")
        ax.set_xlabel("date (local standard time)")
    fig.text(0.06, 0.045, "A value rejected for several reasons is marked by the first in the flag-bit order "
             "(pipeline/flags.py); the overview page counts every reason. The y-axis spans the 0.2nd to 99.8th "
             "percentile of the ingested values.", fontsize=7.5, color="#444444")
    return fig


# ---------------------------------------------------------------------------- page 6: closure

def page_closure(ctx: Context) -> Figure:
    fig = _page(ctx, "Energy-balance closure")
    frame, s = ctx.frame, ctx.out.summary
    ax = fig.add_axes([0.07, 0.14, 0.36, 0.74])
    have = frame is not None and all(v in frame.columns for v in ("h", "le", "rn"))
    if not have:
        style.note(ax, "H, LE or Rn missing: no closure scatter.")
    elif "g" not in frame.columns or not np.isfinite(accepted_values(frame, "g")).any():
        style.note(ax, "No ground heat flux (G) at this site:\nthe interval closure scatter is omitted.\n"
                       "Closure is assessed on daily sums of Rn only\n(see the daily energy-balance ratio).")
    else:
        x = accepted_values(frame, "rn") - accepted_values(frame, "g")
        y = accepted_values(frame, "h") + accepted_values(frame, "le")
        ok = np.isfinite(x) & np.isfinite(y)
        if ok.sum() < 3:
            style.note(ax, "Fewer than 3 intervals with H, LE, Rn and G all accepted.")
        else:
            x, y = x[ok], y[ok]
            ax.scatter(x, y, s=3, alpha=0.35, color=style.OKABE_ITO["blue"], linewidths=0, rasterized=True,
                       label=f"intervals (n = {ok.sum()})")
            lo = float(min(np.percentile(x, 0.1), np.percentile(y, 0.1)))
            hi = float(max(np.percentile(x, 99.9), np.percentile(y, 99.9)))
            line = np.array([lo, hi])
            ax.plot(line, line, color=style.ROLE["one_to_one"], linestyle="--", linewidth=1, label="1:1")
            c = s.get("closure") or {}
            slope, intercept = num(c.get("slope")), num(c.get("intercept"))
            source = "summary.json"
            if math.isnan(slope) or math.isnan(intercept):
                slope, intercept = np.polyfit(x, y, 1)
                source = "fitted here"
            ax.plot(line, intercept + slope * line, color=style.ROLE["fit"], linewidth=1.5,
                    label=f"OLS fit ({source}): y = {slope:.2f} x {intercept:+.1f}")
            ax.set_xlim(lo, hi)
            ax.set_ylim(lo, hi)
            ax.set_aspect("equal", adjustable="box")
            ax.legend(loc="upper left")
            ebr = num(c.get("ebr"))
            ax.text(0.98, 0.03, f"EBR {ebr:.2f}\nr² {num(c.get('r2')):.2f}", transform=ax.transAxes, ha="right",
                    va="bottom", fontsize=8)
        ax.set_xlabel("available energy Rn − G (W m-2)")
        ax.set_ylabel("turbulent flux H + LE (W m-2)")
        ax.set_title("Interval closure: H + LE against Rn − G")
    # daily EBR series
    ax2 = fig.add_axes([0.52, 0.56, 0.44, 0.32])
    daily = ctx.out.daily
    if daily is None or "ebr" not in daily.columns or not daily["ebr"].notna().any():
        style.note(ax2, "No daily energy-balance ratio in daily.parquet.")
    else:
        ebr = daily["ebr"].to_numpy(dtype=float, na_value=np.nan)
        ax2.plot(daily["date"], ebr, marker="o", markersize=2.5, linewidth=0.8, color=style.ROLE["ebr"],
                 label="daily EBR (daily sums)")
        ax2.axhline(1.0, color=style.ROLE["one_to_one"], linestyle="--", linewidth=0.8, label="full closure")
        overall = num(get(s, "closure", "ebr"))
        if not math.isnan(overall):
            ax2.axhline(overall, color=style.ROLE["fit"], linewidth=0.8, label=f"whole period {overall:.2f}")
        finite = ebr[np.isfinite(ebr)]
        if finite.size:  # every day visible, within a sane window (a near-zero denominator can explode)
            ax2.set_ylim(max(-0.5, min(float(finite.min()), 0.5)) - 0.05, min(2.5, max(float(finite.max()), 1.1)) + 0.05)
        _time_axis_common(ctx, ax2)
        ax2.set_ylabel("EBR (-)")
        ax2.set_xlabel("date (local standard time)")
        ax2.legend(loc="upper left", bbox_to_anchor=(0.0, -0.2), ncol=2)
    no_g = frame is None or "g" not in frame.columns
    ax2.set_title("Daily energy-balance ratio Σ(H + LE) / Σ(Rn − G)" + (" (no G: Rn only)" if no_g else ""))
    # monthly closure
    ax3 = fig.add_axes([0.52, 0.09, 0.44, 0.27])
    monthly = [m for m in (s.get("closure_monthly") or []) if isinstance(m, dict)]
    if not monthly:
        style.note(ax3, "No monthly closure statistics in summary.json.")
    else:
        months = [str(m.get("month", "?")) for m in monthly]
        pos = np.arange(len(months))
        ax3.bar(pos - 0.2, [num(m.get("ebr")) for m in monthly], width=0.4, color=style.ROLE["ebr"], label="EBR")
        ax3.bar(pos + 0.2, [num(m.get("slope")) for m in monthly], width=0.4, color=style.OKABE_ITO["sky_blue"],
                label="OLS slope")
        ax3.axhline(1.0, color=style.ROLE["one_to_one"], linestyle="--", linewidth=0.8, label="full closure")
        ax3.set_xticks(pos)
        ax3.set_xticklabels(months, rotation=0 if len(months) <= 8 else 45)
        ax3.set_ylabel("ratio (-)")
        ax3.set_xlabel("month")
        tops = [num(m.get(k)) for m in monthly for k in ("ebr", "slope")]
        tops = [t for t in tops if not math.isnan(t)]
        ax3.set_ylim(0, max([1.3] + [t + 0.3 for t in tops]))
        ax3.legend(loc="upper right", ncol=3)
    ax3.set_title("Closure by month (a trend points to a drifting sensor)")
    return fig


# ---------------------------------------------------------------------------- page 7: fill skill

def page_fill(ctx: Context) -> Figure:
    fig = _page(ctx, "Gap filling: skill and what was filled")
    s = ctx.out.summary
    validation = s.get("fill_validation") or {}
    for c, var in enumerate(("le", "h")):
        ax = fig.add_axes([0.06 + c * 0.32, 0.50, 0.25, 0.38])
        pair = validation.get(var) if isinstance(validation, dict) else None
        obs = np.asarray((pair or {}).get("observed") or [], dtype=float) if isinstance(pair, dict) else np.array([])
        fil = np.asarray((pair or {}).get("filled") or [], dtype=float) if isinstance(pair, dict) else np.array([])
        if obs.size == 0 or obs.size != fil.size:
            sk = get(s, "fill_skill", var, default={})
            extra = (f"\n\nSkill from summary.json:\nRMSE {fmt(sk.get('rmse'), '.1f')} W m-2,"
                     f" r² {fmt(sk.get('r2'))},\nn = {sk.get('n', 'n/a')}") if isinstance(sk, dict) and sk else ""
            style.note(ax, f"No hidden-versus-filled pairs\nfor {label(var)} (fill_validation\nmissing in "
                           f"summary.json).{extra}")
            continue
        ok = np.isfinite(obs) & np.isfinite(fil)
        obs, fil = obs[ok], fil[ok]
        ax.scatter(obs, fil, s=4, alpha=0.4, color=style.ROLE[var], linewidths=0, rasterized=True)
        lo, hi = float(min(obs.min(), fil.min())), float(max(obs.max(), fil.max()))
        ax.plot([lo, hi], [lo, hi], color=style.ROLE["one_to_one"], linestyle="--", linewidth=1, label="1:1")
        rmse = float(np.sqrt(np.mean((fil - obs) ** 2))) if obs.size else math.nan
        bias = float(np.mean(fil - obs)) if obs.size else math.nan
        ax.text(0.03, 0.97, f"n = {obs.size}\nRMSE {rmse:.1f} W m-2\nbias {bias:+.1f} W m-2", va="top",
                transform=ax.transAxes, fontsize=7.5)
        ax.set_xlim(lo, hi)
        ax.set_ylim(lo, hi)
        ax.set_aspect("equal", adjustable="box")
        ax.set_xlabel(f"hidden measured {label(var)} (W m-2)")
        ax.set_ylabel(f"filled {label(var)} (W m-2)")
        ax.set_title(f"{label(var)}: hidden values filled again")
        ax.legend(loc="lower right")
    # per-method skill table
    ax = fig.add_axes([0.70, 0.50, 0.27, 0.38])
    by_method = get(s, "fill_skill", "by_method", default={})
    lines = []
    if isinstance(by_method, dict):
        for var, methods in by_method.items():
            if not isinstance(methods, dict):
                continue
            chosen = get(s, "fill_skill", var, "method", default="")
            lines.append(f"{label(var)}:")
            for m, sk in methods.items():
                if isinstance(sk, dict):
                    mark = " (chosen)" if m == chosen else ""
                    lines.append(f"  {m.replace('_', ' ')}{mark}: RMSE {fmt(sk.get('rmse'), '.1f')}, "
                                 f"bias {fmt(sk.get('bias'), '+.1f')}, r² {fmt(sk.get('r2'))}, n {sk.get('n', '')}")
    if lines:
        _text_block(ax, lines, size=7.2, width=60, max_lines=24, title="Skill by method (W m-2)")
    else:
        style.note(ax, "No per-method skill in summary.json.")
    # quality over time: share of each quality class per week
    frame = ctx.frame
    for c, var in enumerate(("le", "h")):
        axq = fig.add_axes([0.07 + c * 0.48, 0.13, 0.40, 0.26])
        qcol = f"{var}_fill_quality"
        if frame is None or qcol not in frame.columns:
            style.note(axq, f"No {qcol} column.")
            continue
        q = frame[qcol].astype("string").fillna("missing").to_numpy()
        week = ctx.time.dt.to_period("W").dt.start_time
        classes = ["measured", "good", "fair", "poor", "missing"]
        table = pd.crosstab(week.to_numpy(), q).reindex(columns=classes, fill_value=0)
        shares = table.div(table.sum(axis=1), axis=0)
        bottom = np.zeros(len(shares))
        colours = {"measured": style.ROLE["quality_measured"], "good": style.ROLE["quality_good"],
                   "fair": style.ROLE["quality_fair"], "poor": style.ROLE["quality_poor"], "missing": "#FFFFFF"}
        for cls in classes:
            if shares[cls].sum() == 0:
                continue
            _step_fill(axq, shares.index, shares[cls].to_numpy(), pd.Timedelta(days=7), bottom=bottom.copy(),
                       color=colours[cls], label=cls)
            bottom += shares[cls].to_numpy()
        axq.set_ylim(0, 1)
        axq.set_ylabel("share of the week's intervals (-)")
        axq.set_xlabel("week (local standard time)")
        _time_axis_common(ctx, axq, history_labels=False, outline=True)
        axq.set_title(f"{label(var)}: measured and filled values by quality class")
        axq.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=5, fontsize=7)
    return fig


# ---------------------------------------------------------------------------- page 8: conductance

def page_conductance(ctx: Context) -> Figure:
    fig = _page(ctx, "Surface conductance and decoupling")
    daily, frame = ctx.out.daily, ctx.frame
    ax1 = fig.add_axes([0.07, 0.56, 0.55, 0.32])
    ax2 = fig.add_axes([0.07, 0.12, 0.55, 0.32])
    if daily is None or "gs_median" not in daily.columns or not daily["gs_median"].notna().any():
        style.note(ax1, "No daily gs_median in daily.parquet.")
    else:
        gs_mm = daily["gs_median"].to_numpy(dtype=float, na_value=np.nan) * 1000.0  # m s-1 -> mm s-1
        ax1.plot(daily["date"], gs_mm, marker="o", markersize=2.5, linewidth=0.8, color=style.ROLE["gs"],
                 label="gs, median of valid daytime intervals")
        if "gs_closed_median" in daily.columns:
            ax1.plot(daily["date"], daily["gs_closed_median"].to_numpy(dtype=float, na_value=np.nan) * 1000.0,
                     marker=".", markersize=2, linewidth=0.6, linestyle="--", color=style.OKABE_ITO["sky_blue"],
                     label="gs from closure-corrected LE")
        _time_axis_common(ctx, ax1)
        ax1.set_ylabel("surface conductance gs (mm s-1)")
        ax1.set_xlabel("date (local standard time)")
        ax1.legend(loc="upper left")
    ax1.set_title("Seasonal course of the surface conductance (daily median)")
    if daily is None or "omega_mean" not in daily.columns or not daily["omega_mean"].notna().any():
        style.note(ax2, "No daily omega_mean in daily.parquet.")
    else:
        ax2.plot(daily["date"], daily["omega_mean"].to_numpy(dtype=float, na_value=np.nan), marker="o",
                 markersize=2.5, linewidth=0.8, color=style.ROLE["omega"], label="omega, mean of valid daytime intervals")
        ax2.set_ylim(0, 1)
        _time_axis_common(ctx, ax2)
        ax2.set_ylabel("decoupling coefficient omega (-)")
        ax2.set_xlabel("date (local standard time)")
        ax2.legend(loc="upper left")
    ax2.set_title("Seasonal course of the decoupling coefficient (0 coupled, 1 decoupled)")
    # gs against VPD
    ax3 = fig.add_axes([0.70, 0.30, 0.27, 0.50])
    vpd_col = next((c for c in ("vpd", "vpd_filled") if frame is not None and c in frame.columns), None)
    if frame is None or "gs" not in frame.columns or vpd_col is None:
        style.note(ax3, "gs against VPD needs gs and VPD\nin intervals.parquet"
                        + ("" if vpd_col else " (no VPD column)") + ".")
    else:
        valid = (frame["gs_valid"].fillna(False).to_numpy(dtype=bool) if "gs_valid" in frame.columns
                 else np.ones(len(frame), bool))
        gs = frame["gs"].to_numpy(dtype=float, na_value=np.nan) * 1000.0
        vpd = (accepted_values(frame, "vpd") if vpd_col == "vpd"
               else frame[vpd_col].to_numpy(dtype=float, na_value=np.nan))
        ok = valid & np.isfinite(gs) & np.isfinite(vpd)
        if ok.sum() < 5:
            style.note(ax3, "Fewer than 5 valid intervals\nfor gs against VPD.")
        else:
            ax3.scatter(vpd[ok], gs[ok], s=4, alpha=0.35, color=style.ROLE["gs"], linewidths=0, rasterized=True,
                        label=f"valid intervals (n = {ok.sum()})")
            edges = np.unique(np.quantile(vpd[ok], np.linspace(0, 1, 11)))
            if edges.size > 2:
                which = np.clip(np.digitize(vpd[ok], edges[1:-1]), 0, edges.size - 2)
                med = pd.Series(gs[ok]).groupby(which).median()
                centre = pd.Series(vpd[ok]).groupby(which).median()
                ax3.plot(centre.to_numpy(), med.to_numpy(), color=style.OKABE_ITO["black"], marker="s",
                         markersize=3, linewidth=1.2, label="median per VPD decile")
            ax3.set_ylim(0, float(np.percentile(gs[ok], 99.5)) * 1.05)
            ax3.set_xlim(left=0)
            ax3.legend(loc="upper right")
        ax3.set_xlabel("vapour pressure deficit VPD (kPa)")
        ax3.set_ylabel("surface conductance gs (mm s-1)")
    ax3.set_title("gs against VPD")
    cf = ctx.out.summary.get("conductance_filters") or {}
    if isinstance(cf, dict) and cf.get("n_intervals"):
        fig.text(0.70, 0.20, f"{cf.get('n_valid', 'n/a')} of {cf['n_intervals']} intervals pass every "
                 "conductance filter.", fontsize=7.5, color="#444444", wrap=True)
    fig.text(0.70, 0.16, "gs in mm s-1 = 1000 x the m s-1 of intervals.parquet.", fontsize=7.5, color="#444444")
    return fig


# ---------------------------------------------------------------------------- page 9: diurnal

def _diurnal(ctx: Context, values: np.ndarray) -> np.ndarray:
    ok = np.isfinite(values)
    sums = np.bincount(ctx.slot[ok], weights=values[ok], minlength=ctx.n_slots)
    counts = np.bincount(ctx.slot[ok], minlength=ctx.n_slots)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = sums / counts
    mean[counts < 3] = np.nan
    return mean


def page_diurnal(ctx: Context) -> Figure:
    fig = _page(ctx, "Mean diurnal courses")
    frame = ctx.frame
    ax1 = fig.add_axes([0.07, 0.14, 0.40, 0.74])
    hours = (np.arange(ctx.n_slots) + 0.5) * (24.0 / ctx.n_slots)  # interval centres
    if frame is None or not len(frame):
        style.note(ax1, "No interval data.")
        return fig
    missing = []
    for var in ("rn", "g", "h", "le", "rg"):
        if var not in frame.columns:
            missing.append(label(var))
            continue
        ax1.plot(hours, _diurnal(ctx, accepted_values(frame, var)), color=style.ROLE[var], linewidth=1.4,
                 label=f"{label(var)} accepted")
    for var in ("le", "h"):
        if f"{var}_filled" in frame.columns:
            ax1.plot(hours, _diurnal(ctx, frame[f"{var}_filled"].to_numpy(dtype=float, na_value=np.nan)),
                     color=style.ROLE[var], linewidth=1.0, linestyle="--", label=f"{label(var)} gap-filled")
    ax1.axhline(0, color="#777777", linewidth=0.6)
    ax1.set_xlim(0, 24)
    ax1.set_xticks(range(0, 25, 3))
    ax1.set_xlabel("time of day (h, local standard time; interval centres)")
    ax1.set_ylabel("energy flux (W m-2)")
    ax1.set_title("Energy fluxes, whole period")
    ax1.legend(loc="upper left")
    if missing:
        ax1.text(0.99, 0.02, "not measured at this site: " + ", ".join(missing), transform=ax1.transAxes,
                 ha="right", va="bottom", fontsize=7.5, color="#444444")
    # LE by month
    ax2 = fig.add_axes([0.56, 0.14, 0.40, 0.74])
    column = "le_filled" if "le_filled" in frame.columns else ("le" if "le" in frame.columns else None)
    if column is None:
        style.note(ax2, "No LE in intervals.parquet.")
        return fig
    values = (frame[column].to_numpy(dtype=float, na_value=np.nan) if column == "le_filled"
              else accepted_values(frame, "le"))
    month = ctx.time.dt.to_period("M").to_numpy()
    months = pd.unique(month)
    cmap = colormaps[style.SEQUENTIAL_CMAP]
    for i, m in enumerate(months):
        sel = month == m
        ok = sel & np.isfinite(values)
        sums = np.bincount(ctx.slot[ok], weights=values[ok], minlength=ctx.n_slots)
        counts = np.bincount(ctx.slot[ok], minlength=ctx.n_slots)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(counts >= 3, sums / np.maximum(counts, 1), np.nan)
        ax2.plot(hours, mean, color=cmap(i / max(1, len(months) - 1)), linewidth=1.3, label=str(m))
    ax2.axhline(0, color="#777777", linewidth=0.6)
    ax2.set_xlim(0, 24)
    ax2.set_xticks(range(0, 25, 3))
    ax2.set_xlabel("time of day (h, local standard time; interval centres)")
    ax2.set_ylabel("latent heat flux LE (W m-2)")
    ax2.set_title("LE by month" + (" (gap-filled)" if column == "le_filled" else " (accepted)"))
    ax2.legend(loc="upper left", ncol=2 if len(months) > 6 else 1, title="month")
    return fig


# ---------------------------------------------------------------------------- page 10: drivers

def _daily_stat(ctx: Context, values: np.ndarray, how: str) -> np.ndarray:
    n_days = len(ctx.days)
    ok = np.isfinite(values)
    counts = np.bincount(ctx.day_index[ok], minlength=n_days)
    sums = np.bincount(ctx.day_index[ok], weights=values[ok], minlength=n_days)
    need = 0.8 * ctx.n_slots  # a daily value from at least 80 % of the day (common practice)
    with np.errstate(invalid="ignore", divide="ignore"):
        if how == "mean":
            out = sums / counts
        else:  # "sum" of a per-interval amount
            out = sums.astype(float)
    out[counts < need] = np.nan
    return out


def page_drivers(ctx: Context) -> Figure:
    fig = _page(ctx, "Meteorological drivers and evapotranspiration (daily)")
    frame, daily = ctx.frame, ctx.out.daily
    boxes = [[0.07, 0.56, 0.40, 0.32], [0.56, 0.56, 0.40, 0.32], [0.07, 0.12, 0.40, 0.32], [0.56, 0.12, 0.40, 0.32]]
    axes = [fig.add_axes(b) for b in boxes]
    days = ctx.days
    seconds = ctx.out.interval / pd.Timedelta(seconds=1)
    # 1 global radiation, daily total
    ax = axes[0]
    if frame is None or "rg" not in frame.columns or not np.isfinite(accepted_values(frame, "rg")).any():
        style.note(ax, "No global radiation (Rg) at this site: no daily radiation figure.\n"
                       "Day and night then come from solar geometry.")
    else:
        rg = _daily_stat(ctx, accepted_values(frame, "rg") * seconds / 1e6, "sum")  # W m-2 x s -> MJ m-2
        _step_fill(ax, days, rg, pd.Timedelta(days=1), color=style.OKABE_ITO["orange"])
        ax.set_ylabel("Rg daily total (MJ m-2 d-1)")
        ax.set_title("Global radiation (days with >= 80 % accepted)")
        _time_axis_common(ctx, ax, history_labels=False, outline=True)
        ax.set_xlabel("date (local standard time)")
    # 2 air temperature and VPD
    ax = axes[1]
    if frame is None or "ta" not in frame.columns:
        style.note(ax, "No air temperature in intervals.parquet.")
    else:
        ax.plot(days, _daily_stat(ctx, accepted_values(frame, "ta"), "mean"), color=style.OKABE_ITO["vermillion"],
                label="Ta daily mean")
        ax.set_ylabel("air temperature Ta (degC)")
        ax.set_title("Air temperature and vapour pressure deficit (daily means)")
        _time_axis_common(ctx, ax, history_labels=False)
        ax.set_xlabel("date (local standard time)")
        vpd_col = next((c for c in ("vpd", "vpd_filled") if c in frame.columns), None)
        if vpd_col:
            twin = ax.twinx()
            v = accepted_values(frame, "vpd") if vpd_col == "vpd" else frame[vpd_col].to_numpy(float, na_value=np.nan)
            twin.plot(days, _daily_stat(ctx, v, "mean"), color=style.OKABE_ITO["blue"], label="VPD daily mean")
            twin.set_ylabel("VPD (kPa)")
            twin.grid(False)
            twin.spines["right"].set_visible(True)
            h1, l1 = ax.get_legend_handles_labels()
            h2, l2 = twin.get_legend_handles_labels()
            ax.legend(h1 + h2, l1 + l2, loc="upper left")
        else:
            ax.legend(loc="upper left")
    # 3 precipitation
    ax = axes[2]
    if frame is None or "precip" not in frame.columns:
        style.note(ax, "No precipitation at this site.")
    else:
        _step_fill(ax, days, _daily_stat(ctx, accepted_values(frame, "precip"), "sum"), pd.Timedelta(days=1),
                   color=style.OKABE_ITO["sky_blue"])
        ax.set_ylabel("precipitation (mm d-1)")
        ax.set_title("Precipitation (days with >= 80 % accepted)")
        _time_axis_common(ctx, ax, history_labels=False, outline=True)
        ax.set_xlabel("date (local standard time)")
    # 4 ET
    ax = axes[3]
    if daily is None or "et_mm" not in daily.columns or not daily["et_mm"].notna().any():
        style.note(ax, "No daily ET in daily.parquet (no complete day).")
    else:
        _step_fill(ax, daily["date"], daily["et_mm"].to_numpy(dtype=float, na_value=np.nan), pd.Timedelta(days=1),
                   color=style.ROLE["et"], label="ET from gap-filled LE (complete days)")
        if "et_reference_mm" in daily.columns and daily["et_reference_mm"].notna().any():
            ax.plot(daily["date"] + pd.Timedelta(hours=12), daily["et_reference_mm"].to_numpy(float, na_value=np.nan),
                    color=style.OKABE_ITO["black"], marker=".", markersize=3, linewidth=0.8,
                    label="reference ET (FAO-56)")
        ax.set_ylabel("evapotranspiration (mm d-1)")
        ax.set_title("Daily evapotranspiration (estimate: includes filled values)")
        _time_axis_common(ctx, ax, history_labels=False, outline=True)
        ax.set_xlabel("date (local standard time)")
        ax.legend(loc="upper left")
    return fig


def _fmt(value, digits: int = 1) -> str:
    return "n/a" if value is None or (isinstance(value, float) and not np.isfinite(value)) else f"{value:.{digits}f}"


def page_totals(ctx: Context) -> Figure:
    """ET totals per month and for the record, with the random/filling band and the closure bracket."""
    fig = _page(ctx, "Evapotranspiration totals and their uncertainty")
    summary = ctx.out.summary or {}
    totals = summary.get("totals") or []
    daily = ctx.out.daily
    ax_table = fig.add_axes([0.05, 0.50, 0.90, 0.38])
    ax_table.axis("off")
    if not totals:
        style.note(ax_table, "No totals in summary.json (the uncertainty stage did not run).")
    else:
        header = ["period", "ET (mm)", "95 % band (mm)", "sd (mm)", "ET closed (mm)", "filled", "in long gaps"]
        rows = []
        for rec in totals:
            rows.append([
                str(rec.get("period", "")) + ("" if rec.get("complete", True) else " (part)"),
                _fmt(rec.get("et_mm")),
                f"{_fmt(rec.get('et_mm_p025'))} to {_fmt(rec.get('et_mm_p975'))}",
                _fmt(rec.get("et_mm_sd")),
                _fmt(rec.get("et_closed_mm")),
                f"{100 * (rec.get('filled_fraction') or 0):.0f} %",
                f"{100 * (rec.get('long_gap_fraction') or 0):.0f} %",
            ])
        top = _text_table(ax_table, header, rows[:18], top=0.98)
        note = (summary.get("uncertainty") or {}).get("dominant")
        lines = [note] if note else []
        lines.append("ET from gap-filled LE; 'ET closed' from the Bowen-ratio-closed LE (the closure bracket). "
                     "Filled values are estimates; use for water accounting or irrigation follows local rules "
                     "and licensed practice.")
        import textwrap

        wrapped = "\n".join(textwrap.fill(line, 170) for line in lines)
        ax_table.text(0.0, top - 0.04, wrapped, fontsize=7.5, ha="left", va="top", transform=ax_table.transAxes)
    ax = fig.add_axes([0.07, 0.08, 0.86, 0.32])
    if daily is None or "et_mm" not in daily.columns or not daily["et_mm"].notna().any():
        style.note(ax, "No daily ET in daily.parquet (no complete day).")
    else:
        dates = pd.to_datetime(daily["date"])
        et = daily["et_mm"].to_numpy(dtype=float, na_value=np.nan)
        ax.plot(dates, np.nancumsum(et), color=style.ROLE["et"], label="cumulative ET from gap-filled LE")
        if {"et_mm_p025", "et_mm_p975"} <= set(daily.columns):
            lo = daily["et_mm_p025"].to_numpy(dtype=float, na_value=np.nan)
            hi = daily["et_mm_p975"].to_numpy(dtype=float, na_value=np.nan)
            ax.fill_between(dates, np.nancumsum(et) - (et - lo), np.nancumsum(et) + (hi - et),
                            color=style.ROLE["et"], alpha=0.25, linewidth=0,
                            label="daily 95 % band around the running total")
        if "et_closed_mm" in daily.columns:
            ax.plot(dates, np.nancumsum(daily["et_closed_mm"].to_numpy(dtype=float, na_value=np.nan)),
                    color=style.OKABE_ITO["vermillion"], linestyle="--", label="cumulative ET, energy balance closed")
        ax.set_ylabel("cumulative ET over complete days (mm)")
        ax.set_xlabel("date (local standard time)")
        ax.set_title("Running ET total: random band and closure bracket")
        _time_axis_common(ctx, ax, history_labels=False)
        ax.legend(loc="upper left")
    return fig


#: the pages in order: (title used in the table of contents, builder)
PAGES = (
    ("Overview", page_overview),
    ("Sensor health", page_health),
    ("Data availability", page_availability),
    ("Heat maps of LE and H", page_heatmaps),
    ("Time series with rejected values", page_timeseries),
    ("Energy-balance closure", page_closure),
    ("Gap filling", page_fill),
    ("Surface conductance and decoupling", page_conductance),
    ("Mean diurnal courses", page_diurnal),
    ("Drivers and evapotranspiration", page_drivers),
    ("Evapotranspiration totals", page_totals),
)

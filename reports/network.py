"""The network report, ``network_report.pdf``: every site on one page, ranked by need for a visit.

Reads ``network_summary.csv`` in the network's output folder and, for each site that ran,
its ``SITE/summary.json`` and ``SITE/daily.parquet``. Page 1 is a table with one row per
site, the sites needing a visit first with the reason; the following pages show small
multiples of each site's daily energy-balance ratio and evapotranspiration.
"""
from __future__ import annotations

import ast
import json
import math
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import matplotlib.dates as mdates
import matplotlib.patches as mpatches
import numpy as np
import pandas as pd

from . import style
from ._data import fmt, num
from .site import _write_pdf_atomically

__all__ = ["write_network_report", "rank_sites", "VISIT_THRESHOLDS"]

#: When a site is listed as needing a visit. Display thresholds of the report, not QC rules:
#: a gap fraction above one half and an energy-balance ratio outside 0.6-1.2 are common
#: practice for "look at this site"; stale data for more than 3 days means a missed week
#: of the weekly job is near (common practice).
VISIT_THRESHOLDS = {
    "max_days_since_last_data": 3.0,
    "max_gap_fraction": 0.5,
    "ebr_range": (0.6, 1.2),
}

SITES_PER_PAGE = 5


@dataclass
class SiteRow:
    site: str
    status: str
    error: str
    values: dict
    urgency: float = 0.0
    reasons: list[str] = field(default_factory=list)
    daily: pd.DataFrame | None = None
    summary: dict = field(default_factory=dict)


def _days_since(value, summary: dict) -> tuple[float, str]:
    """Largest days-since-last-data over the site's variables, and which variable."""
    candidates = [value, (summary.get("health") or {}).get("days_since_last_data") if isinstance(summary, dict) else None]
    for raw in candidates:
        if raw is None or (isinstance(raw, float) and math.isnan(raw)) or raw == "":
            continue
        if isinstance(raw, str) and raw.strip().startswith("{"):
            try:
                raw = json.loads(raw)
            except ValueError:
                try:
                    raw = ast.literal_eval(raw)
                except (ValueError, SyntaxError):
                    continue
        if isinstance(raw, dict):
            pairs = [(num(v), k) for k, v in raw.items() if not math.isnan(num(v))]
            if pairs:
                d, var = max(pairs)
                return d, var
            continue
        d = num(raw)
        if not math.isnan(d):
            return d, ""
    return math.nan, ""


def rank_sites(table: pd.DataFrame, summaries: dict[str, dict] | None = None) -> list[SiteRow]:
    """Order the sites so that those needing a visit come first, each with its reasons.

    Urgency: a failed run first, then findings to act on, stale data, large gaps, closure
    out of range, findings to watch; ties keep the table's order.
    """
    summaries = summaries or {}
    rows: list[SiteRow] = []
    for _, rec in table.iterrows():
        values = {k: rec.get(k) for k in table.columns}
        site = str(rec.get("site", "?"))
        status = str(rec.get("status", "") or "").strip() or "unknown"
        error = rec.get("error")
        error = "" if error is None or (isinstance(error, float) and math.isnan(error)) else str(error)
        row = SiteRow(site=site, status=status, error=error, values=values, summary=summaries.get(site, {}))
        if status != "ok":
            row.urgency += 1000
            row.reasons.append(f"processing failed: {error or 'no message'}")
        act = num(values.get("health_act"))
        if act > 0:
            row.urgency += 100 * act
            checks = sorted({str(f.get("check", "?")).replace("_", " ")
                             for f in (row.summary.get("health") or {}).get("findings", []) or []
                             if isinstance(f, dict) and f.get("severity") == "act"})
            row.reasons.append(f"{int(act)} health finding(s) to act on" + (f" ({', '.join(checks)})" if checks else ""))
        days, var = _days_since(values.get("days_since_last_data"), row.summary)
        values["_days_since"] = days
        if days > VISIT_THRESHOLDS["max_days_since_last_data"]:
            row.urgency += 50 + min(days, 50)
            row.reasons.append(f"no accepted {var or 'data'} for {days:.1f} days")
        gaps = max(num(values.get("gap_fraction_le")), num(values.get("gap_fraction_h")))
        if gaps > VISIT_THRESHOLDS["max_gap_fraction"]:
            row.urgency += 20
            row.reasons.append(f"{100 * gaps:.0f} % of LE or H without an accepted value")
        ebr = num(values.get("closure_ebr"))
        lo, hi = VISIT_THRESHOLDS["ebr_range"]
        if not math.isnan(ebr) and not (lo <= ebr <= hi):
            row.urgency += 10
            row.reasons.append(f"energy-balance ratio {ebr:.2f} outside {lo}-{hi}")
        watch = num(values.get("health_watch"))
        if watch > 0:
            row.urgency += watch
            row.reasons.append(f"{int(watch)} finding(s) to watch")
        rows.append(row)
    order = sorted(range(len(rows)), key=lambda i: (-rows[i].urgency, i))
    return [rows[i] for i in order]


def _read_site(out_dir: Path, site: str) -> tuple[dict, pd.DataFrame | None]:
    summary: dict = {}
    daily = None
    folder = out_dir / site
    try:
        loaded = json.loads((folder / "summary.json").read_text())
        summary = loaded if isinstance(loaded, dict) else {}
    except (OSError, ValueError):
        pass
    try:
        daily = pd.read_parquet(folder / "daily.parquet")
        if "date" in daily.columns:
            daily["date"] = pd.to_datetime(daily["date"].astype(str), errors="coerce")
            daily = daily.dropna(subset=["date"]).sort_values("date")
        else:
            daily = None
    except Exception:  # a missing or unreadable file becomes a note on the page
        daily = None
    return summary, daily


def _period(values: dict, summary: dict) -> str:
    start = summary.get("start") or values.get("start")
    end = summary.get("end") or values.get("end")
    out = []
    for v in (start, end):
        try:
            out.append(pd.Timestamp(v).strftime("%Y-%m-%d") if v is not None and str(v) not in ("", "nan") else "?")
        except (ValueError, TypeError):
            out.append("?")
    return f"{out[0]} to {out[1]}"


def _table_page(network_name: str, rows: list[SiteRow], header: str, footer: str):
    fig = style.new_page("Sites ranked by need for a visit", header=header, footer=footer)
    ax = fig.add_axes([0.035, 0.08, 0.93, 0.83])
    ax.set_axis_off()
    columns = [("#", 0.0, "left"), ("site", 0.025, "left"), ("period", 0.17, "left"),
               ("LE / H\ncoverage", 0.36, "right"), ("spikes\nLE / H", 0.415, "right"),
               ("EBR", 0.455, "right"), ("slope", 0.495, "right"), ("fill RMSE\nLE / H (W m-2)", 0.58, "right"),
               ("health\nact / watch", 0.645, "right"), ("days since\nlast data", 0.71, "right"),
               ("why visit first (reason) / error", 0.73, "left")]
    size = 7.3
    for name, x, ha in columns:
        ax.text(x, 1.0, name, fontsize=size, fontweight="bold", ha=ha, va="top", linespacing=1.1,
                transform=ax.transAxes)
    ax.plot([0, 1], [0.955, 0.955], color="#333333", linewidth=0.6, transform=ax.transAxes)
    y = 0.945
    height_pts = 0.83 * fig.get_figheight() * 72.0
    line = size * 1.4 / height_pts
    for rank, row in enumerate(rows, start=1):
        v = row.values
        cov = "/".join(fmt(100 * (1 - num(v.get(f"gap_fraction_{x}"))), ".0f", "-") for x in ("le", "h")) + " %"
        cells = [str(rank), row.site, _period(v, row.summary), cov,
                 "/".join(fmt(v.get(f"spikes_{x}"), ".0f", "-") for x in ("le", "h")),
                 fmt(v.get("closure_ebr")), fmt(v.get("closure_slope")),
                 "/".join(fmt(v.get(f"fill_rmse_{x}"), ".0f", "-") for x in ("le", "h")),
                 f"{fmt(v.get('health_act'), '.0f', '-')} / {fmt(v.get('health_watch'), '.0f', '-')}",
                 fmt(v.get("_days_since"), ".1f", "-")]
        reason = "; ".join(row.reasons) if row.reasons else "no reason for a visit"
        wrapped = textwrap.wrap(reason, 62)[:4] or [""]
        colour = style.ROLE["act"] if row.status != "ok" or row.urgency >= 20 else (
            style.ROLE["watch"] if row.urgency > 0 else style.ROLE["ok"])
        ax.add_patch(mpatches.Rectangle(
            (0.018, y - line * 0.85), 0.004, line * 0.8, color=colour, transform=ax.transAxes))
        for (name, x, ha), text in zip(columns, cells):
            ax.text(x, y, text, fontsize=size, ha=ha, va="top", transform=ax.transAxes,
                    fontweight="bold" if name == "site" else "normal")
        ax.text(0.73, y, "\n".join(wrapped), fontsize=size, ha="left", va="top", transform=ax.transAxes,
                linespacing=1.25, color="#000000" if row.reasons else "#555555")
        y -= line * (max(1, len(wrapped)) * 1.1 + 0.5)
        ax.plot([0, 1], [y + line * 0.3] * 2, color="#DDDDDD", linewidth=0.5, transform=ax.transAxes)
        if y < 0.12:
            ax.text(0.0, y, f"... {len(rows) - rank} more site(s): see network_summary.csv", fontsize=size,
                    va="top", transform=ax.transAxes)
            break
    ax.text(0.0, 0.0, "Coloured mark: red = visit (failed run, finding to act on, stale data, large gaps or "
            "closure out of range), orange = findings to watch, green = nothing to do. Coverage = share of "
            "intervals with an accepted value; EBR and slope from intervals with H, LE, Rn and G accepted; "
            "fill RMSE from hidden accepted values filled again. Thresholds: see reports/network.py "
            "VISIT_THRESHOLDS.", fontsize=6.8, color="#444444", va="bottom", wrap=True, transform=ax.transAxes)
    return fig


def _multiples_page(rows: list[SiteRow], page_index: int, n_pages: int, header: str, footer: str):
    title = "Daily energy-balance ratio and evapotranspiration per site"
    if n_pages > 1:
        title += f" ({page_index + 1} of {n_pages})"
    fig = style.new_page(title, header=header, footer=footer)
    dates = [r.daily["date"] for r in rows if r.daily is not None and len(r.daily)]
    xlim = None
    if dates:
        lo = min(d.min() for d in dates)
        hi = max(d.max() for d in dates) + pd.Timedelta(days=1)
        xlim = (lo, hi)
    n = SITES_PER_PAGE
    h = 0.80 / n
    et_max = [np.nanmax(r.daily["et_mm"].to_numpy(dtype=float, na_value=np.nan)) for r in rows
              if r.daily is not None and "et_mm" in r.daily.columns and r.daily["et_mm"].notna().any()]
    et_top = max(et_max) * 1.05 if et_max and max(et_max) > 0 else None
    for i, row in enumerate(rows):
        top = 0.905 - i * h
        ax_e = fig.add_axes([0.215, top - h + 0.035, 0.34, h - 0.05])
        ax_t = fig.add_axes([0.625, top - h + 0.035, 0.34, h - 0.05])
        fig.text(0.035, top - h / 2, row.site, fontsize=8.5, fontweight="bold", va="center", ha="left", wrap=True)
        if row.status != "ok":
            fig.text(0.035, top - h / 2 - 0.025, "run failed", fontsize=7.5, color=style.ROLE["act"], va="center")
        for ax, col, colour, ylab in ((ax_e, "ebr", style.ROLE["ebr"], "EBR (-)"),
                                      (ax_t, "et_mm", style.ROLE["et"], "ET (mm d-1)")):
            daily = row.daily
            if daily is None or col not in daily.columns or not daily[col].notna().any():
                why = row.error if row.status != "ok" and row.error else f"no daily {col} in daily.parquet"
                style.note(ax, textwrap.shorten(why, 90))
                continue
            values = daily[col].to_numpy(dtype=float, na_value=np.nan)
            if col == "ebr":
                ax.plot(daily["date"], values, marker="o", markersize=1.8, linewidth=0.7, color=colour)
                ax.axhline(1.0, color=style.ROLE["one_to_one"], linestyle="--", linewidth=0.7)
                finite = values[np.isfinite(values)]
                ax.set_ylim(max(-0.2, min(0.4, float(np.percentile(finite, 2)) - 0.05)),
                            min(2.0, max(1.2, float(np.percentile(finite, 98)) + 0.05)))
            else:
                x = mdates.date2num(pd.DatetimeIndex(daily["date"]))
                ax.fill_between(np.append(x, x[-1] + 1), 0, np.append(values, values[-1]), step="post",
                                color=colour, linewidth=0)
                ax.set_ylim(0, et_top)  # one ET scale for every site on the page, to compare them
            if xlim:
                ax.set_xlim(*xlim)
            locator = mdates.AutoDateLocator(minticks=3, maxticks=7)
            ax.xaxis.set_major_locator(locator)
            ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
            ax.set_ylabel(ylab)
            if i == len(rows) - 1:
                ax.set_xlabel("date (local standard time)")
        if i == 0:
            ax_e.set_title("Daily energy-balance ratio Σ(H+LE)/Σ(Rn−G)")
            ax_t.set_title("Daily evapotranspiration from gap-filled LE")
    fig.text(0.215, 0.03, "Dates in each site's local standard time; the same date axis for all sites. "
             "ET only on complete days; it includes filled values (estimates).", fontsize=7, color="#444444")
    return fig


def write_network_report(out_dir: Path, *, network_name: str) -> Path:
    """Render ``out_dir/network_report.pdf`` from ``network_summary.csv`` and the site outputs.

    Parameters
    ----------
    out_dir : Path
        The network's output folder (holds ``network_summary.csv`` and one folder per site).
    network_name : str
        Shown in the header of every page.

    Returns
    -------
    Path
        The written PDF (replaced atomically). A missing summary table yields a one-page
        report saying so; a missing site file yields a note in that site's panels.
    """
    out_dir = Path(out_dir)
    csv = out_dir / "network_summary.csv"
    try:
        table = pd.read_csv(csv, dtype={"site": str, "status": str, "error": str}, keep_default_na=True)
    except (OSError, ValueError, pd.errors.EmptyDataError):
        table = pd.DataFrame(columns=["site", "status", "error"])
    if "site" not in table.columns:
        table = pd.DataFrame(columns=["site", "status", "error"])
    summaries, dailies = {}, {}
    for site in table["site"].astype(str):
        summaries[site], dailies[site] = _read_site(out_dir, site)
    rows = rank_sites(table, summaries)
    for row in rows:
        row.daily = dailies.get(row.site)
    periods = [_period(r.values, r.summary) for r in rows if r.status == "ok"]
    span = ""
    if periods:
        starts = sorted(p.split(" to ")[0] for p in periods if not p.startswith("?"))
        ends = sorted(p.split(" to ")[1] for p in periods if not p.endswith("?"))
        if starts and ends:
            span = f" | {starts[0]} to {ends[-1]}"
    n_failed = sum(1 for r in rows if r.status != "ok")
    header = f"network {network_name} | {len(rows)} site(s), {n_failed} failed{span}"
    version = next((r.summary.get("software_version") for r in rows if r.summary.get("software_version")), "")
    footer = f"towerflow {version} network report".replace("  ", " ")
    figures = []
    with style.report_style():
        if not len(rows):
            fig = style.new_page("Sites ranked by need for a visit", header=header, footer=footer)
            style.note(fig.add_axes([0.1, 0.3, 0.8, 0.4]),
                       f"No site in {csv.name}" + ("" if csv.exists() else " (file missing)") + ".")
            figures.append(fig)
        else:
            figures.append(_table_page(network_name, rows, header, footer))
            chunks = [rows[i:i + SITES_PER_PAGE] for i in range(0, len(rows), SITES_PER_PAGE)]
            for k, chunk in enumerate(chunks):
                figures.append(_multiples_page(chunk, k, len(chunks), header, footer))
        style.number_pages(figures)
    return _write_pdf_atomically(out_dir / "network_report.pdf", figures,
                                 title=f"towerflow network report: {network_name}",
                                 subject="Every site of the network, ranked by need for a visit")

"""Coverage of the ET uncertainty band on invented site records with known truth.

For each seed an invented site (``towerflow.demo.simulate.simulate_site``, noise, spikes,
gaps and site-history faults on) is run through QC → closure → filling → uncertainty
(``pipeline.qc.run_qc``, ``pipeline.closure.assess_closure``, ``pipeline.gapfill.fill_gaps``,
``pipeline.uncertainty.assess_uncertainty``) and the whole-record ET interval is compared
with the truth:

- the random and filling band (p025–p975) against the NOISE-FREE MEASURED total
  (``true_le``: the truth a perfect instrument with the same closure gap would record).
  The band does not and cannot cover the systematic closure error;
- the closure bracket, from the lower band end of ET to the upper band end of ET closed
  (LE closed by the closure stage's Bowen-ratio factors), against the closed total
  (``true_le_closed``), reported separately.

Both truths are converted to mm with the same latent heat (the pipeline's ta and snow
flag) as the estimate. Also reported: the band's width (% of ET), the estimated against the
injected random-error sd of LE. Run::

    .venv/bin/python benchmarks/uncertainty_coverage.py [--seeds 20] [--days 120] [--kind grassland]

Invented data only. Not pass/fail: tests/test_uncertainty.py holds the slow check.
"""
from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import pandas as pd

from pipeline import flags as flagbits
from pipeline import micromet
from pipeline.closure import assess_closure
from pipeline.config import SiteInfo
from pipeline.errors import TowerflowWarning
from pipeline.gapfill import fill_gaps
from pipeline.qc import run_qc
from pipeline.rules import standard_rules
from pipeline.uncertainty import assess_uncertainty
from towerflow.demo.simulate import simulate_site


def working_frame(sim):
    """The working frame and flags of an invented site, as ingest would build them:
    MISSING where blank, INSTRUMENT where the upstream flag says reject, the history's
    corrections applied and its exclusions flagged (HISTORY), site parameters as columns."""
    s = sim.meta["site"]
    site = SiteInfo(id="invented-site", name="Invented site", latitude=s["latitude"],
                    longitude=s["longitude"], elevation_m=s["elevation_m"],
                    utc_offset_hours=s["utc_offset_hours"], canopy_height_m=s["canopy_height_m"],
                    measurement_height_m=s["measurement_height_m"], irga=s["irga"],
                    interval_minutes=s["interval_minutes"])
    obs = sim.observed
    canon = [c for c in obs.columns if c not in ("le_upstream_flag", "signal_strength")]
    frame = obs[canon].copy()
    frame.index.name = "timestamp_start"
    flags = pd.DataFrame({c: np.where(frame[c].isna(), flagbits.MISSING, 0).astype(flagbits.FLAG_DTYPE)
                          for c in canon}, index=frame.index)
    up = obs["le_upstream_flag"].to_numpy() == 2
    flags["le"] = np.where(up, flags["le"].to_numpy() | flagbits.INSTRUMENT, flags["le"]).astype(flagbits.FLAG_DTYPE)
    frame["canopy_height_m"] = sim.truth["canopy_height_m"].to_numpy()
    frame["measurement_height_m"] = sim.truth["measurement_height_m"].to_numpy()
    frame["irga"] = s["irga"]
    frame["irrigated"] = sim.truth["irrigation"].to_numpy() > 0
    for entry in sim.meta["history"]:
        m = (frame.index >= entry["start"]) & (frame.index < entry["end"])
        for var, corr in entry.get("correct", {}).items():
            frame.loc[m, var] = frame.loc[m, var] * corr.get("scale", 1.0) + corr.get("offset", 0.0)
        for var in entry.get("exclude", []):
            if var in flags:
                flags.loc[m, var] = flags.loc[m, var] | flagbits.HISTORY
    return site, frame, flags


def run_one(kind: str, seed: int, days: int, start: str = "2025-04-01", rules: dict | None = None):
    """One invented record through the stages; returns the truths and the stage results."""
    rules = standard_rules() if rules is None else rules
    sim = simulate_site(kind, seed=seed, days=days, start=start)
    site, frame, flags = working_frame(sim)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TowerflowWarning)
        q = run_qc(frame, flags, site, rules)
        clo = assess_closure(q.frame, q.flags, site, rules)
        fill = fill_gaps(q.frame.assign(available_energy=clo.columns["available_energy"]), q.flags, site, rules)
        unc = assess_uncertainty(q.frame, q.flags, site, rules, filling=fill.columns,
                                 fill_summary=fill.summary, closure=clo.columns)
    fz = q.frame["snow_or_frozen"].astype("boolean").fillna(False).to_numpy(dtype=bool) \
        if "snow_or_frozen" in q.frame else np.zeros(len(q.frame), dtype=bool)
    ta = q.frame["ta"].interpolate(limit_direction="both").fillna(20.0).to_numpy()
    seconds = site.interval.total_seconds()
    have = np.isfinite(fill.columns["le_filled"].to_numpy(dtype=float))
    true_mm = float(np.sum(micromet.evaporation_mm(sim.truth["true_le"].to_numpy(), ta, seconds, frozen=fz)[have]))
    true_closed_mm = float(np.sum(micromet.evaporation_mm(sim.truth["true_le_closed"].to_numpy(), ta,
                                                          seconds, frozen=fz)[have]))
    measured = (fill.columns["le_fill_method"] == "measured").to_numpy()
    noise = sim.meta["noise"]["le"]
    injected_sd = noise["a"] + noise["b"] * np.abs(sim.truth["true_le"].to_numpy())
    estimated_sd = unc.columns["le_random_sd"].to_numpy()
    return {"sim": sim, "unc": unc, "fill": fill, "true_mm": true_mm, "true_closed_mm": true_closed_mm,
            "injected_sd_mean": float(np.mean(injected_sd[measured])),
            "estimated_sd_mean": float(np.nanmean(estimated_sd[measured]))}


def coverage(kind: str = "grassland", seeds=range(20), days: int = 120, start: str = "2025-04-01",
             rules: dict | None = None) -> dict:
    """Run the seeds and collect coverage of the band and of the closure bracket."""
    rows = []
    for seed in seeds:
        r = run_one(kind, int(seed), days, start, rules=rules)
        rec = r["unc"].summary["totals"][-1]
        lo_b = min(rec["et_mm_p025"], rec["et_closed_mm_p025"])
        hi_b = max(rec["et_mm_p975"], rec["et_closed_mm_p975"])
        rows.append({
            "seed": int(seed), "et_mm": rec["et_mm"], "p025": rec["et_mm_p025"], "p975": rec["et_mm_p975"],
            "true_mm": r["true_mm"], "covered": rec["et_mm_p025"] <= r["true_mm"] <= rec["et_mm_p975"],
            "width_pct": 100.0 * (rec["et_mm_p975"] - rec["et_mm_p025"]) / rec["et_mm"],
            "z": (rec["et_mm"] - r["true_mm"]) / rec["et_mm_sd"],
            "et_closed_mm": rec["et_closed_mm"], "true_closed_mm": r["true_closed_mm"],
            "bracket_contains_closed_truth": lo_b <= r["true_closed_mm"] <= hi_b,
            "closed_error_pct": 100.0 * (rec["et_closed_mm"] - r["true_closed_mm"]) / r["true_closed_mm"],
            "filled_fraction": rec["filled_fraction"],
            "filled_after_rain": rec["filled_after_rain_fraction"],
            "sd_ratio": r["estimated_sd_mean"] / r["injected_sd_mean"],
        })
    table = pd.DataFrame(rows)
    return {"table": table, "coverage": float(table["covered"].mean()),
            "median_width_pct": float(table["width_pct"].median()),
            "bracket_coverage": float(table["bracket_contains_closed_truth"].mean())}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--days", type=int, default=120)
    ap.add_argument("--kind", default="grassland")
    ap.add_argument("--start", default="2025-04-01")
    ap.add_argument("--correlation-time", default=None,
                    help="override [uncertainty] fill_error_correlation_time, e.g. '3 days'")
    args = ap.parse_args()
    rules = standard_rules()
    if args.correlation_time:
        rules["uncertainty"]["fill_error_correlation_time"] = args.correlation_time
    t0 = time.perf_counter()
    res = coverage(args.kind, range(args.seeds), args.days, args.start, rules=rules)
    elapsed = time.perf_counter() - t0
    pd.set_option("display.width", 200)
    print(res["table"].round(3).to_string(index=False))
    t = res["table"]
    print(f"\n{args.kind}, {args.seeds} seeds × {args.days} days from {args.start}, fill-error correlation "
          f"time {rules['uncertainty']['fill_error_correlation_time']}, {elapsed:.0f} s")
    print(f"band (95 %) covers the noise-free measured total: {res['coverage']:.0%} "
          f"(target ≥ 90 %); median width {res['median_width_pct']:.1f} % of ET; "
          f"sd of z = (estimate − truth)/sd: {t['z'].std(ddof=1):.2f} (1 = calibrated)")
    print(f"closure bracket [ET p025, ET closed p975] contains the closed truth: {res['bracket_coverage']:.0%}; "
          f"ET closed − closed truth: median {t['closed_error_pct'].median():+.1f} %")
    print(f"estimated / injected mean random sd of measured LE: median {t['sd_ratio'].median():.3f} "
          f"(range {t['sd_ratio'].min():.3f}–{t['sd_ratio'].max():.3f})")


if __name__ == "__main__":
    main()

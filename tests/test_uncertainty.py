"""Random error, filling error and the uncertainty of ET totals (pipeline.uncertainty).

Invented data only. Expected values name their source; "derived" marks a value that
follows from the stated distribution by hand (module notes of pipeline.uncertainty).
"""
from __future__ import annotations

import importlib.util
import math
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from pipeline import flags as flagbits
from pipeline import micromet
from pipeline.config import SiteInfo
from pipeline.errors import TowerflowWarning
from pipeline.rules import standard_rules
from pipeline.uncertainty import (LAPLACE_MEAN_ABS_DIFFERENCE, LAPLACE_MEDIAN_ABS_DIFFERENCE,
                                  _gap_ar1, assess_uncertainty, fill_error_sd, fit_random_error,
                                  gap_labels, pair_mask, random_error_sd, simulate_errors,
                                  time_of_day_spread)

_BENCH = Path(__file__).resolve().parents[1] / "benchmarks" / "uncertainty_coverage.py"


def _bench():
    spec = importlib.util.spec_from_file_location("uncertainty_coverage", _BENCH)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


# ----------------------------------------------------------------------------------------
# constants of the Laplace difference
# ----------------------------------------------------------------------------------------


def test_laplace_difference_constants_match_sampling():
    """E|ε1−ε2| = (3/(2√2))σ and median|ε1−ε2| ≈ 0.8105σ for Laplace errors (derived)."""
    assert LAPLACE_MEAN_ABS_DIFFERENCE == pytest.approx(1.06066, rel=1e-5)  # derived: 3/(2√2)
    assert LAPLACE_MEDIAN_ABS_DIFFERENCE == pytest.approx(1.14619 / math.sqrt(2), rel=1e-4)  # derived
    rng = np.random.default_rng(0)
    sigma = 10.0
    d = np.abs(rng.laplace(0, sigma / math.sqrt(2), 400_000) - rng.laplace(0, sigma / math.sqrt(2), 400_000))
    assert d.mean() / sigma == pytest.approx(LAPLACE_MEAN_ABS_DIFFERENCE, rel=0.01)
    assert np.median(d) / sigma == pytest.approx(LAPLACE_MEDIAN_ABS_DIFFERENCE, rel=0.01)


# ----------------------------------------------------------------------------------------
# the pairing rule
# ----------------------------------------------------------------------------------------


def test_pairing_rule_hand_made_case():
    """Pairs (i, i+lag): formed only with both values accepted, drivers within tolerance,
    no rain or exclusion anywhere in [i, i+lag], same site parameters (hand-made case)."""
    lag = 4
    n = 12
    x = np.arange(n, dtype=float) + 100.0
    ta = np.full(n, 20.0)
    rg = np.full(n, 300.0)
    blocked = np.zeros(n, dtype=bool)
    canopy = np.full(n, 0.3)
    # i=0 → 4: clean pair
    # i=1 → 5: ta differs by 3.5 degC (> 3) — outside tolerance
    ta[5] = 23.5
    # i=2 → 6: rg differs by exactly 35 W m-2 — inside (≤ tolerance)
    rg[6] = 335.0
    # i=3 → 7: the second member is rejected (NaN)
    x[7] = np.nan
    # rain at 9 blocks every pair whose window [i, i+4] contains 9: i = 5, 6, 7 (8 ends at 12: none)
    blocked[9] = True
    # i=4 → 8: canopy height changes (a cut) between the two
    canopy[8:] = 0.1
    ok = pair_mask(x, lag=lag, drivers={"ta": ta, "rg": rg},
                   tolerances={"ta": 3.0, "rg": 35.0}, blocked=blocked, same={"canopy": canopy})
    expected = np.zeros(n, dtype=bool)
    expected[[0, 2]] = True  # hand-worked: 1 (ta), 3 (rejected), 4 (cut), 5-7 (rain), 8+ (no partner)
    np.testing.assert_array_equal(ok, expected)


def test_pairing_missing_driver_forms_no_pair():
    """A missing driver value at either member forms no pair (hand-made case)."""
    x = np.ones(6)
    ta = np.array([10.0, np.nan, 10.0, 10.0, 10.0, 10.0])
    ok = pair_mask(x, lag=2, drivers={"ta": ta}, tolerances={"ta": 3.0})
    np.testing.assert_array_equal(ok, [True, False, True, True, False, False])


def _frame_for_pairs(days=3, interval_minutes=60):
    site = SiteInfo(id="invented-pairs", name="Invented pairs", latitude=46.0, longitude=8.0,
                    elevation_m=500.0, utc_offset_hours=1.0, canopy_height_m=0.3,
                    measurement_height_m=2.0, interval_minutes=interval_minutes)
    idx = pd.date_range("2025-06-01", periods=days * 24 * 60 // interval_minutes,
                        freq=f"{interval_minutes}min", tz=site.tz, name="timestamp_start")
    n = len(idx)
    frame = pd.DataFrame({"le": np.full(n, 100.0), "h": np.full(n, 50.0), "rg": 300.0, "ta": 20.0,
                          "wind": 2.0, "vpd": 1.0, "precip": 0.0, "canopy_height_m": 0.3,
                          "measurement_height_m": 2.0, "irga": "closed-path", "irrigated": False},
                         index=idx)
    flags = pd.DataFrame({c: np.zeros(n, np.int32) for c in ("le", "h", "rg", "ta", "wind", "vpd", "precip")},
                         index=idx)
    return site, frame, flags


def test_stage_pairs_exclude_rain_history_and_rejected_values():
    """Through the stage: rain (with its lead time), a history exclusion on any variable and a
    rejected value each remove exactly the pairs whose windows hold them (hand count)."""
    from pipeline.uncertainty import uncertainty_rules

    site, frame, flags = _frame_for_pairs(days=3)
    rules = standard_rules()
    u = uncertainty_rules(rules)
    lag = 24
    lead = int(pd.Timedelta(u["rain_lead"]) / pd.Timedelta(hours=1))
    frame.loc[frame.index[30], "precip"] = 2.0  # rain at step 30
    flags["rn"] = np.zeros(len(frame), np.int32)
    flags.loc[frame.index[10], "rn"] = flagbits.HISTORY  # exclusion of another variable at 10
    flags.loc[frame.index[50], "le"] = flagbits.SPIKE  # rejected LE at 50
    n = len(frame)
    # hand count of LE pairs (i, i+24), i in 0..47
    blocked = np.zeros(n, dtype=bool)
    blocked[30:30 + lead + 1] = True  # rain at 30 blocks windows starting up to `lead` after it
    blocked[10] = True
    expected = 0
    for i in range(n - lag):
        if blocked[i:i + lag + 1].any() or 50 in (i, i + lag):
            continue
        expected += 1
    x = frame["le"].to_numpy()
    ok = pair_mask(np.where(flags["le"].to_numpy() == 0, x, np.nan), lag=lag, blocked=blocked)
    assert ok.sum() == expected
    rules_small = {"uncertainty": {"min_pairs": 1}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TowerflowWarning)
        filling = _filling_all_measured(frame)
        res = assess_uncertainty(frame, flags, site, rules_small, filling=filling, fill_summary={},
                                 closure=None)
    assert res.summary["uncertainty"]["random_error"]["le"]["n_pairs"] == expected


def _filling_all_measured(frame):
    n = len(frame)
    return pd.DataFrame({
        "le_filled": frame["le"].to_numpy(), "h_filled": frame["h"].to_numpy(),
        "le_fill_method": "measured", "h_fill_method": "measured",
        "le_fill_quality": "measured", "h_fill_quality": "measured",
        "le_fill_sd": np.nan, "h_fill_sd": np.nan,
        "le_in_long_gap": np.zeros(n, bool), "h_in_long_gap": np.zeros(n, bool)}, index=frame.index)


# ----------------------------------------------------------------------------------------
# the fit
# ----------------------------------------------------------------------------------------


def test_fit_recovers_known_a_b_from_laplace_pairs():
    """sd = a + b|flux| recovered within 20 % from synthetic pairs with Laplace errors."""
    a, b = 6.0, 0.10  # invented, of the order of Richardson et al. 2006 for LE [from memory]
    rng = np.random.default_rng(42)
    truth = np.abs(rng.gamma(1.2, 80.0, 4000))
    sd = a + b * truth
    x1 = truth + rng.laplace(0, sd / math.sqrt(2))
    x2 = truth + rng.laplace(0, sd / math.sqrt(2))
    m = fit_random_error(x1, x2)
    assert m["n_pairs"] == 4000
    assert m["a"] == pytest.approx(a, rel=0.2)
    assert m["b"] == pytest.approx(b, rel=0.2)
    sd_hat = random_error_sd(np.array([0.0, 100.0, -100.0, np.nan]), m)
    assert sd_hat[1] == pytest.approx(a + b * 100.0, rel=0.1)
    assert sd_hat[2] == sd_hat[1]  # symmetric model without sign fits
    assert np.isnan(sd_hat[3])


def test_fit_by_sign_and_too_few_pairs():
    """Separate signs recovered when asked; fewer pairs than the minimum give no model."""
    rng = np.random.default_rng(7)
    pos = rng.uniform(0, 300, 3000)
    neg = -rng.uniform(0, 100, 3000)
    sd = np.r_[5.0 + 0.1 * pos, 12.0 + 0.0 * neg]
    truth = np.r_[pos, neg]
    x1 = truth + rng.laplace(0, sd / math.sqrt(2))
    x2 = truth + rng.laplace(0, sd / math.sqrt(2))
    m = fit_random_error(x1, x2, by_sign=True, min_pairs_by_sign=200)
    assert m["use_sign_fits"]
    assert m["negative"]["a"] == pytest.approx(12.0, rel=0.2)
    assert m["positive"]["b"] == pytest.approx(0.1, rel=0.2)
    assert random_error_sd(np.array([-50.0]), m)[0] == pytest.approx(12.0, rel=0.2)
    few = fit_random_error(x1[:20], x2[:20], min_pairs=100)
    assert few["a"] is None and np.isnan(random_error_sd(np.array([1.0]), few)).all()


# ----------------------------------------------------------------------------------------
# filling error
# ----------------------------------------------------------------------------------------


def test_fill_error_sd_takes_the_largest_estimate():
    """max(fill sd, CV RMSE of the method); reduced quality also the time-of-day spread."""
    method = np.array(["measured", "similar_conditions", "similar_conditions", "mean_diurnal_course", "not_filled"])
    quality = np.array(["measured", "good", "poor", "fair", "not_filled"])
    fill_sd = np.array([np.nan, 5.0, 30.0, 4.0, np.nan])
    spread = np.array([50.0, 50.0, 50.0, 20.0, 50.0])
    out = fill_error_sd(fill_sd, method, quality, {"similar_conditions": 12.0, "mean_diurnal_course": 8.0},
                        spread=spread)
    np.testing.assert_allclose(out, [np.nan, 12.0, 50.0, 20.0, np.nan])  # hand-worked


def test_time_of_day_spread_hand_case():
    """Spread at the same clock time ±1 interval over ±1 day (hand-made 3-day record)."""
    idx = pd.date_range("2025-06-01", periods=3 * 24, freq="60min", tz="UTC")
    x = np.zeros(72)
    x[12::24] = [10.0, 20.0, 30.0]  # noon of each day; neighbours are 0
    sd = time_of_day_spread(x, idx, pd.Timedelta(hours=1), half_window_days=1, min_values=3)
    # noon of day 2: values at 11, 12, 13 h over days 1-3 = six zeros and 10, 20, 30
    expected = np.std([0, 0, 0, 0, 0, 0, 10, 20, 30], ddof=1)  # derived
    assert sd[36] == pytest.approx(expected)


# ----------------------------------------------------------------------------------------
# propagation by hand
# ----------------------------------------------------------------------------------------


def test_gap_labels_and_ar1_restart():
    """Gaps are labelled by contiguous runs; the AR(1) restarts at every gap (hand case)."""
    filled = np.array([False, True, True, False, True, True, True])
    np.testing.assert_array_equal(gap_labels(filled), [-1, 0, 0, -1, 1, 1, 1])
    z = np.array([[1.0, 2.0, 3.0, 4.0, 5.0]])  # innovations of the 5 filled positions (one draw)
    phi = 0.5
    c = math.sqrt(1 - phi ** 2)
    y = _gap_ar1(z.T, filled, phi).T
    expected = [1.0, phi * 1.0 + c * 2.0, 3.0, phi * 3.0 + c * 4.0, phi * (phi * 3.0 + c * 4.0) + c * 5.0]
    np.testing.assert_allclose(y[0], expected)  # derived by hand
    np.testing.assert_allclose(_gap_ar1(z.T, filled, 1.0)[:, 0], [1.0, 1.0, 3.0, 3.0, 3.0])  # one draw per gap


def test_independent_measured_errors_sum_in_quadrature():
    """4 measured intervals with sd 3, 4, 0, 12 → the day's sd = √(9+16+0+144) = 13 (derived)."""
    sd = np.array([3.0, 4.0, 0.0, 12.0])
    out = simulate_errors(sd, np.ones(4, bool), np.zeros(4, bool), draws=40_000, seed=1, phi=0.0,
                          weights=np.ones(4), groups=[np.zeros(4, np.int64)])
    em, ef = out[0]
    assert em[:, 0].std() == pytest.approx(13.0, rel=0.02)
    assert np.all(ef == 0)
    # Laplace: the single-interval errors have kurtosis 6 (excess 3; derived for Laplace)
    single = simulate_errors(np.array([1.0]), np.ones(1, bool), np.zeros(1, bool), draws=100_000, seed=2,
                             phi=0.0, weights=np.ones(1), groups=[np.zeros(1, np.int64)])[0][0][:, 0]
    assert stats.kurtosis(single) == pytest.approx(3.0, abs=0.3)


def test_fully_correlated_gap_errors_add_linearly():
    """One gap with fully correlated errors: sd of the sum = Σ sd = 2+3+5 = 10 (derived);
    independent (phi 0): √(4+9+25) = 6.16 (derived)."""
    sd = np.array([2.0, 3.0, 5.0])
    filled = np.ones(3, bool)
    full = simulate_errors(sd, np.zeros(3, bool), filled, draws=40_000, seed=3, phi=1.0,
                           weights=np.ones(3), groups=[np.zeros(3, np.int64)])[0][1]
    assert full[:, 0].std() == pytest.approx(10.0, rel=0.02)
    ind = simulate_errors(sd, np.zeros(3, bool), filled, draws=40_000, seed=3, phi=0.0,
                          weights=np.ones(3), groups=[np.zeros(3, np.int64)])[0][1]
    assert ind[:, 0].std() == pytest.approx(math.sqrt(38.0), rel=0.02)


def test_groups_and_weights():
    """Two days of 2 intervals: per-day sums with weights (mm per W m-2) (derived)."""
    sd = np.array([10.0, 10.0, 20.0, 20.0])
    w = np.array([0.1, 0.1, 0.5, 0.5])
    days = np.array([0, 0, 1, 1])
    out = simulate_errors(sd, np.ones(4, bool), np.zeros(4, bool), draws=40_000, seed=4, phi=0.0,
                          weights=w, groups=[days, np.zeros(4, np.int64)])
    day_sd = out[0][0].std(axis=0)
    np.testing.assert_allclose(day_sd, [math.sqrt(2) * 1.0, math.sqrt(2) * 10.0], rtol=0.03)
    assert out[1][0][:, 0].std() == pytest.approx(math.sqrt(2 + 200), rel=0.03)


def test_stage_daily_sd_hand_case_and_closure_bracket():
    """Through the stage on a 2-day, 60-min invented record: the daily ET sd equals the
    quadrature sum of the per-interval sds converted to mm, and ET closed = factor × ET."""
    site, frame, flags = _frame_for_pairs(days=2)
    n = len(frame)
    filling = _filling_all_measured(frame)
    # a 3-interval gap on day 1, filled with sd 10 and fully correlated
    gap = np.zeros(n, bool)
    gap[12:15] = True
    filling.loc[gap, "le_fill_method"] = "similar_conditions"
    filling.loc[gap, "le_fill_quality"] = "good"
    filling.loc[gap, "le_fill_sd"] = 10.0
    fill_summary = {"fill_skill": {"by_method": {"le": {"similar_conditions": {"rmse": 4.0}}}}}
    closure = pd.DataFrame({"closure_factor": np.full(n, 1.25)}, index=frame.index)
    frame.loc[frame.index[10], "precip"] = 1.0  # rain 2 h before the gap: within rain_lead (12 h)
    rules = {"uncertainty": {"min_pairs": 10_000, "draws": 4000, "fill_error_correlation_time": "1000 days",
                             "wet_fill_caution_fraction": 0.01}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TowerflowWarning)
        res = assess_uncertainty(frame, flags, site, rules, filling=filling, fill_summary=fill_summary,
                                 closure=closure)
    # no random-error model (too few pairs): only the gap contributes, fully correlated
    mm = float(micromet.evaporation_mm(1.0, 20.0, 3600.0))
    expected_day1 = 3 * 10.0 * mm  # Σ sd (derived)
    assert res.daily["et_mm_sd"].iloc[0] == pytest.approx(expected_day1, rel=0.05)
    assert res.daily["et_mm_sd"].iloc[1] == 0.0
    rec = res.summary["totals"][-1]
    assert rec["period_type"] == "record"
    assert rec["et_mm"] == pytest.approx(n * 100.0 * mm)
    assert rec["et_closed_mm"] == pytest.approx(1.25 * rec["et_mm"])
    assert rec["filled_fraction"] == pytest.approx(3 / n)
    assert rec["le_energy_mj"] == pytest.approx(n * 100.0 * 3600 / 1e6)
    assert rec["et_closed_mm_p975"] - rec["et_closed_mm"] == pytest.approx(
        1.25 * (rec["et_mm_p975"] - rec["et_mm"]), rel=1e-9)  # same draws scaled by the factor
    assert rec["filled_after_rain_fraction"] == pytest.approx(3 / n)
    text = res.summary["uncertainty"]["dominant"]
    assert "closure bracket" in text and "intercepted water" in text
    np.testing.assert_allclose(res.columns.loc[gap, "le_total_sd"], 10.0)
    assert res.columns["le_random_sd"].isna().all()
    assert any("pairs" in w for w in res.warnings)


# ----------------------------------------------------------------------------------------
# invented site with known noise
# ----------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def invented_run():
    return _bench().run_one("grassland", seed=3, days=60, start="2025-05-01")


def test_random_error_matches_injected_noise(invented_run):
    """The estimated random sd of measured LE matches the injected noise model
    (simulate_site NOISE_MODEL, Laplace a + b|LE|) within 20 % on average over measured values."""
    r = invented_run
    assert r["estimated_sd_mean"] == pytest.approx(r["injected_sd_mean"], rel=0.2)
    model = r["unc"].summary["uncertainty"]["random_error"]["le"]
    assert model["n_pairs"] >= 100


def test_stage_outputs_shape_and_json(invented_run):
    """Columns, daily frame and totals are complete and JSON-serialisable."""
    import json

    res = invented_run["unc"]
    for c in ("le_random_sd", "h_random_sd", "le_fill_error_sd", "le_total_sd", "h_total_sd"):
        assert c in res.columns
    assert list(res.daily.columns[:3]) == ["et_mm_sd", "et_mm_p025", "et_mm_p975"]
    assert res.daily.index.name == "date"
    ok = res.daily["et_mm_sd"].notna()
    assert (res.daily.loc[ok, "et_mm_p025"] <= res.daily.loc[ok, "et_mm_p975"]).all()
    kinds = [t["period_type"] for t in res.summary["totals"]]
    assert kinds.count("record") == 1 and "month" in kinds and "year" in kinds
    json.dumps(res.summary, allow_nan=False)


@pytest.mark.slow
def test_whole_record_interval_covers_truth():
    """The 95 % band covers the noise-free measured whole-record ET in ≥ 90 % of 20 invented
    120-day records (QC → closure → filling → uncertainty); width reported."""
    res = _bench().coverage("grassland", seeds=range(20), days=120)
    print(f"coverage {res['coverage']:.0%}, median width {res['median_width_pct']:.1f} %, "
          f"closure bracket contains the closed truth {res['bracket_coverage']:.0%}")
    assert res["coverage"] >= 0.9
    assert res["median_width_pct"] < 20.0  # not absurdly wide (common practice: a few %)


@pytest.mark.slow
def test_forest_with_rain_gaps_is_covered():
    """Coverage on the invented open-path conifer forest (5 records), whose LE is rejected in
    rain: the wet-canopy fill (``penman_monteith_wet_canopy``) supplies the interception
    evaporation that dry-condition fills missed (without it about -20 % of ET, coverage 0 of
    20 records; with it 20 of 20, benchmarks/uncertainty_coverage.py, regression)."""
    res = _bench().coverage("conifer-forest", seeds=range(5), days=120)
    assert res["coverage"] >= 0.9


def test_standard_laplace_matches_the_laplace_distribution():
    """Exponential magnitude with a random sign is Laplace(0, 1): scipy.stats.laplace as the
    oracle (Kolmogorov–Smirnov), variance 2 and excess kurtosis 3 (Laplace moments, Johnson,
    Kotz and Balakrishnan 1995 [from memory])."""
    from pipeline.uncertainty import standard_laplace

    x = standard_laplace(np.random.default_rng(7), (50, 4000))
    assert x.shape == (50, 4000)
    flat = x.ravel()
    assert stats.kstest(flat, stats.laplace.cdf).pvalue > 0.001
    assert abs(flat.var() - 2.0) < 0.05
    assert abs(stats.kurtosis(flat) - 3.0) < 0.3
    assert abs((flat < 0).mean() - 0.5) < 0.01
    assert standard_laplace(np.random.default_rng(7), (0, 3)).shape == (0, 3)
    # one seed, one stream
    assert np.array_equal(standard_laplace(np.random.default_rng(7), (3, 5)),
                          standard_laplace(np.random.default_rng(7), (3, 5)))


def test_simulate_errors_repeated_grouping_gives_the_same_sums():
    """A grouping equal to an earlier one (a one-year record's year and whole record) gets the
    earlier one's sums, as separate arrays; summing it again gives the same (regression)."""
    rng = np.random.default_rng(11)
    n = 96
    sd = rng.uniform(1.0, 5.0, n)
    measured = rng.random(n) < 0.7
    filled = ~measured
    day = np.arange(n) // 48
    one = np.zeros(n, dtype=np.int64)
    kw = dict(draws=50, seed=5, phi=0.5, weights=np.ones(n))
    twice = simulate_errors(sd, measured, filled, groups=[day, one, one.copy()], **kw)
    alone = simulate_errors(sd, measured, filled, groups=[day, one], **kw)
    for part in range(2):
        assert np.array_equal(twice[1][part], alone[1][part])
        assert np.array_equal(twice[2][part], twice[1][part])
        assert twice[2][part] is not twice[1][part]
        assert np.array_equal(twice[0][part], alone[0][part])


def test_ar1_through_the_weights_equals_filtering_the_draws(monkeypatch):
    """L·z with the AR(1) matrix equals the restarted filter of the draws (y = L z, derived),
    and the error sums through A = M·L equal those of the filtered draws: the same draws
    either way, equal up to rounding (regression)."""
    from pipeline import uncertainty

    filled = np.array([True, True, False, True, True, True, False, False, True])
    z = np.random.default_rng(3).standard_normal((int(filled.sum()), 4))
    for phi in (0.0, 0.3, 0.9, 1.0):
        np.testing.assert_allclose(uncertainty._ar1_matrix(filled, phi) @ z, _gap_ar1(z, filled, phi),
                                   rtol=1e-13, atol=1e-15)
    assert uncertainty._ar1_matrix(filled, 0.5, max_entries=5) is None  # 3 + 6 + 1 entries
    rng = np.random.default_rng(12)
    n = 192
    sd = rng.uniform(1.0, 5.0, n)
    filled = rng.random(n) < 0.4
    filled[40:130] = True  # one long gap across days
    day = np.arange(n) // 48
    kw = dict(draws=60, seed=9, phi=0.95, weights=np.vstack([np.ones(n), rng.uniform(0.5, 2.0, n)]),
              groups=[day, np.zeros(n, np.int64)])
    through = simulate_errors(sd, ~filled, filled, **kw)
    monkeypatch.setattr(uncertainty, "_AR1_THROUGH_WEIGHTS_MAX_GROWTH", -1)  # force the filter
    filtered = simulate_errors(sd, ~filled, filled, **kw)
    for w in range(2):
        for g in range(2):
            np.testing.assert_array_equal(through[w][g][0], filtered[w][g][0])  # measured: untouched
            np.testing.assert_allclose(through[w][g][1], filtered[w][g][1], rtol=1e-10, atol=1e-12)


def test_nested_groupings_are_sums_of_the_finer_sums():
    """Groupings whose groups are unions of an earlier grouping's (pairs of days, alternate
    days of days; the record) are summed from those sums, one that splits them (half days)
    from the draws; the draws do not depend on the groupings, so every grouping's sums equal
    its sums alone up to rounding (regression)."""
    rng = np.random.default_rng(21)
    n = 48 * 6
    sd = rng.uniform(1.0, 5.0, n)
    measured = rng.random(n) < 0.7
    day = np.arange(n) // 48
    pair_of_days = day // 2
    alternate = day % 2
    half_day = np.arange(n) // 24
    one = np.zeros(n, np.int64)
    groups = [day, pair_of_days, alternate, half_day, one]
    kw = dict(draws=40, seed=2, phi=0.8, weights=rng.uniform(0.5, 2.0, n))
    together = simulate_errors(sd, measured, ~measured, groups=groups, **kw)
    for i, g in enumerate(groups):
        alone = simulate_errors(sd, measured, ~measured, groups=[g], **kw)[0]
        for part in range(2):
            np.testing.assert_allclose(together[i][part], alone[part], rtol=1e-12, atol=1e-12)
    # nesting found: pairs and alternate days from days, none for half days, the record from
    # the nearest earlier grouping (half days)
    from pipeline.uncertainty import _nested_source

    src = _nested_source(groups, [6, 3, 2, 12, 1])
    assert src[0] is None and src[1][0] == 0 and src[2][0] == 0 and src[3] is None and src[4][0] == 3


def test_time_of_day_spread_of_a_record_shorter_than_the_window():
    """A 3-day record with a ±7-day window: every day's spread uses all 3 days (the days
    that exist); hand case against numpy's sample sd of the 9 values (3 clock times × 3 days)."""
    index = pd.date_range("2024-01-01", periods=72, freq="60min")
    x = np.tile(np.arange(24.0), 3) + np.repeat([0.0, 3.0, 6.0], 24)
    sd = time_of_day_spread(x, index, pd.Timedelta("60min"), half_window_days=7)
    expected = np.std([x[i] for i in (23, 0, 1, 47, 24, 25, 71, 48, 49)], ddof=1)  # 00:00 ± 1 h, wrapping
    assert sd[0] == pytest.approx(expected) and sd[24] == pytest.approx(expected)


def test_standard_laplace_fills_a_buffer_and_stays_finite():
    """``out`` is filled in place; −ln(1 − U) with U < 1 on a 2^-53 grid is at most
    53·ln 2 = 36.74 (derived)."""
    from pipeline.uncertainty import standard_laplace

    buf = np.empty((7, 33))
    got = standard_laplace(np.random.default_rng(5), (7, 33), out=buf)
    assert got is buf
    np.testing.assert_array_equal(buf, standard_laplace(np.random.default_rng(5), (7, 33)))
    x = standard_laplace(np.random.default_rng(6), (1000, 100))
    assert np.isfinite(x).all() and np.abs(x).max() <= 53 * math.log(2.0)
    with pytest.raises(ValueError):
        standard_laplace(np.random.default_rng(5), (7, 33), out=np.empty((33, 7)))

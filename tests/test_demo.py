"""Tests of the invented demo network: simulated truth, measurement artefacts, files on disk.

Short simulations (10–30 days) keep these fast. Expected values name their source; the
simulation's own invented parameters are read from the module, never restated here.
"""
from __future__ import annotations

import glob
import re
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline import micromet, solar
from towerflow.demo import network as demo_network
from towerflow.demo.simulate import (
    KIND_PARAMETERS,
    NOISE_MODEL,
    SITE_KINDS,
    WET_SURFACE_CONDUCTANCE,
    simulate_site,
)

SHORT = dict(start="2025-05-01", days=14)


@pytest.fixture(scope="module")
def sims():
    """One short simulation per kind (seeded)."""
    return {k: simulate_site(k, seed=11, **SHORT) for k in SITE_KINDS}


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    """A 16-day demo network on disk (the cold spell and a site visit fall inside)."""
    out = tmp_path_factory.mktemp("demo")
    path = demo_network.write_demo_network(out, days=16, seed=5)
    return path


# ---------------------------------------------------------------------------------------
# truth
# ---------------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", SITE_KINDS)
def test_truth_energy_balance(sims, kind):
    """Measured truth closes to closure_fraction · (Rn − G); the closed pair closes exactly."""
    t = sims[kind].truth
    cf = sims[kind].meta["closure_fraction"]
    assert cf == 0.8  # the brief's default closure gap of 20 %
    a = (t["rn"] - t["g"]).to_numpy()
    np.testing.assert_allclose(t["available_energy"], a, atol=1e-9)  # definition
    np.testing.assert_allclose(t["true_le"] + t["true_h"], cf * a, atol=1e-9)  # definition
    np.testing.assert_allclose(t["true_le_closed"] + t["true_h_closed"], a, atol=1e-9)
    # Bowen ratio kept by the closure gap (assumption of Twine et al. 2000)
    day = t["daytime"].to_numpy() & (np.abs(t["true_le"].to_numpy()) > 5)
    np.testing.assert_allclose((t["true_h"] / t["true_le"])[day],
                               (t["true_h_closed"] / t["true_le_closed"])[day], rtol=1e-9)
    np.testing.assert_array_equal(t["le"], t["true_le"])
    np.testing.assert_array_equal(t["h"], t["true_h"])


def test_perfect_closure_option():
    """closure_fraction = 1 gives H + LE = Rn − G exactly (definition)."""
    t = simulate_site("grassland", seed=3, closure_fraction=1.0, **SHORT).truth
    np.testing.assert_allclose(t["le"] + t["h"], t["rn"] - t["g"], atol=1e-9)


@pytest.mark.parametrize("kind", SITE_KINDS)
def test_truth_le_is_penman_monteith(sims, kind):
    """LE recomputed from the truth's drivers with pipeline.micromet matches true_le."""
    s = sims[kind]
    t = s.truth
    ga = micromet.aerodynamic_conductance(t["wind"].to_numpy(), t["ustar"].to_numpy())
    np.testing.assert_allclose(t["true_ga"], ga, rtol=1e-12)
    le = micromet.penman_monteith(t["available_energy"].to_numpy(), t["ta"].to_numpy(),
                                  t["vpd"].to_numpy(), t["p_air"].to_numpy(), ga,
                                  t["true_gs"].to_numpy())
    np.testing.assert_allclose(t["true_le_closed"], le, rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(t["true_le"], s.meta["closure_fraction"] * le, rtol=1e-10, atol=1e-9)
    omega = micromet.decoupling_coefficient(t["ta"], t["p_air"], ga, t["true_gs"])
    np.testing.assert_allclose(t["true_omega"], omega, rtol=1e-12)


@pytest.mark.parametrize("kind", SITE_KINDS)
def test_truth_le_independent_penman_monteith(sims, kind):
    """true_le_closed against a hand-written Penman–Monteith (FAO-56 eq. 3, 8, 11, 13)."""
    t = sims[kind].truth
    ta, vpd, p = t["ta"].to_numpy(), t["vpd"].to_numpy(), t["p_air"].to_numpy()
    es = 0.6108 * np.exp(17.27 * ta / (ta + 237.3))  # FAO-56 eq. 11
    delta = 4098.0 * es / (ta + 237.3) ** 2  # FAO-56 eq. 13
    lam = 2.501e6 - 2361.0 * ta  # FAO-56 eq. 3-1
    gamma = 1013.0 * p / (0.622 * lam)  # FAO-56 eq. 8, cp = 1013 J kg-1 K-1
    rho = p * 1e3 / (287.05 * (ta + 273.15))  # ideal gas, dry air (R_d 287.05, CODATA)
    ga, gs = t["true_ga"].to_numpy(), t["true_gs"].to_numpy()
    le = (delta * t["available_energy"].to_numpy() + rho * 1013.0 * vpd * ga) / (
        delta + gamma * (1.0 + ga / gs))  # Monteith 1965
    np.testing.assert_allclose(t["true_le_closed"], le, rtol=2e-3, atol=0.05)


@pytest.mark.parametrize("kind", SITE_KINDS)
def test_rg_envelope_and_night(sims, kind):
    """Rg ≤ 1.1 × clear-sky Rso (FAO-56 eq. 37; 10 % for cloud enhancement, common
    practice) and exactly 0 when the sun is below the horizon (pvlib solar position)."""
    import pvlib  # oracle

    s = sims[kind]
    t = s.truth
    elev = s.meta["site"]["elevation_m"]
    rso = solar.clear_sky_radiation(t["potential_radiation"].to_numpy(), elev)
    assert np.all(t["rg"].to_numpy() <= 1.1 * rso + 1e-9)
    assert t["rg"].max() > 500.0  # a May fortnight has sunny middays (common practice)
    iv = pd.Timedelta(minutes=s.meta["site"]["interval_minutes"])
    lat, lon = s.meta["site"]["latitude"], s.meta["site"]["longitude"]
    e0 = pvlib.solarposition.get_solarposition(t.index, lat, lon)["elevation"].to_numpy()
    e1 = pvlib.solarposition.get_solarposition(t.index + iv, lat, lon)["elevation"].to_numpy()
    night = (e0 < -0.5) & (e1 < -0.5)
    assert night.sum() > 0.3 * len(t)
    assert np.all(t["rg"].to_numpy()[night] == 0.0)
    np.testing.assert_array_equal(t["daytime"].to_numpy(), t["potential_radiation"] > 0)


@pytest.mark.parametrize("kind", SITE_KINDS)
def test_truth_physically_plausible(sims, kind):
    """Ranges of common practice hold for every truth variable."""
    t = sims[kind].truth
    assert t["rh"].between(0, 100).all() and (t["vpd"] >= 0).all()
    np.testing.assert_allclose(t["vpd"], micromet.vpd_from_rh(t["ta"], t["rh"]), atol=1e-9)
    assert (t["ustar"] > 0).all() and (t["wind"] > 0).all()
    assert t["true_omega"].between(0, 1).all()
    assert t["wind_dir"].between(0, 360).all()
    th = KIND_PARAMETERS[kind]["theta"]
    assert t["swc"].between(0.6 * th["wp"], th["sat"]).all()
    dry = ~t["canopy_wet"]
    assert (t.loc[dry, "true_gs"] <= KIND_PARAMETERS[kind]["gs_max"] + 1e-12).all()
    assert (t.loc[t["canopy_wet"] & ~t["snow_cover"], "true_gs"] == WET_SURFACE_CONDUCTANCE).all()
    # dew: some negative LE at night with a wet surface (humid grassland / forest)
    if kind != "irrigated-crop":
        assert (t.loc[~t["daytime"] & t["canopy_wet"], "le"] < 0).any()


def test_omega_forest_below_grassland(sims):
    """Midday omega: tall forest well below short grass (Jarvis and McNaughton 1986;
    REFERENCES.md §2: needle-leaf ~0.1–0.3, grass ~0.5–0.9 [from memory])."""
    def midday(t):
        m = t["daytime"] & ~t["canopy_wet"] & (t["rg"] > 400)
        return t.loc[m, "true_omega"].median()

    om_f, om_g = midday(sims["conifer-forest"].truth), midday(sims["grassland"].truth)
    assert om_f < 0.35 and om_g > 0.4 and om_f < om_g - 0.2


def test_cold_spell_frost_and_snow():
    """The cold spell brings frost; the grassland is snow-covered with a high albedo."""
    s = simulate_site("grassland", start="2025-02-01", days=30, seed=2)
    t = s.truth
    a, b = s.meta["cold_spell"]
    cold = t.loc[a:b]
    assert cold["ta"].min() < -3.0  # frost (regression: a -9 K anomaly in early February)
    assert t["snow_cover"].any()
    sa, sb = s.meta["snow_period"]
    snow = t.loc[sa:sb]
    noon = snow[snow["rg"] > 100]
    np.testing.assert_allclose((noon["sw_out"] / noon["rg"]).to_numpy(),
                               KIND_PARAMETERS["grassland"]["albedo_snow"], rtol=1e-9)
    assert (t.loc[~t["snow_cover"] & (t["rg"] > 100), "sw_out"] / t["rg"]).max() < 0.3


def test_crop_grows_and_is_irrigated():
    """Crop canopy steps from 0.1 to ~2 m; irrigation happens and is logged in history."""
    s = simulate_site("irrigated-crop", start="2025-04-20", days=150, seed=4)
    t = s.truth
    h = t["canopy_height_m"].to_numpy()
    assert h[0] == pytest.approx(0.1) and h[-1] >= 1.9 and np.all(np.diff(h) >= 0)
    assert s.meta["site"]["interval_minutes"] == 60
    assert (t.index[1] - t.index[0]) == pd.Timedelta(minutes=60)
    hist = s.meta["history"]
    heights = [e for e in hist if "canopy_height_m" in e]
    assert len(heights) >= 5  # two-week steps over 150 days, most of them changes
    for e in heights:  # every history period states the simulated height
        sel = (t.index >= e["start"]) & (t.index < e["end"])
        assert np.all(h[sel] == e["canopy_height_m"])
    irr = [e for e in hist if e.get("irrigation")]
    assert len(irr) == len(s.meta["irrigation_events"]) >= 2
    assert t["irrigation"].sum() == pytest.approx(sum(e["amount_mm"] for e in s.meta["irrigation_events"]))
    for e in irr:  # the sprinkler wets the canopy
        assert t.loc[(t.index >= e["start"]) & (t.index < e["end"]), "canopy_wet"].all()
    # the crop transpires more than the grassland at midsummer middays (invented gs_max)
    assert t.loc["2025-07-01":"2025-07-31"].query("rg > 600")["le"].median() > 150  # regression


def test_determinism_and_shared_weather():
    """Same seed, same record; another seed, another record; a shared weather seed shares
    clouds and rain."""
    a = simulate_site("conifer-forest", seed=9, **SHORT)
    b = simulate_site("conifer-forest", seed=9, **SHORT)
    pd.testing.assert_frame_equal(a.truth, b.truth)
    pd.testing.assert_frame_equal(a.observed, b.observed)
    assert all(a.meta["spikes"][v].equals(b.meta["spikes"][v]) for v in a.meta["spikes"])
    c = simulate_site("conifer-forest", seed=10, **SHORT)
    assert not np.allclose(a.truth["rg"], c.truth["rg"])
    g = simulate_site("grassland", seed=1, weather_seed=77, **SHORT)
    f = simulate_site("conifer-forest", seed=2, weather_seed=77, **SHORT)
    np.testing.assert_array_equal(g.truth["precip"] > 0, f.truth["precip"] > 0)
    assert np.corrcoef(g.truth["rg"], f.truth["rg"])[0, 1] > 0.99
    assert not g.observed["le"].isna().equals(f.observed["le"].isna())  # own gaps


# ---------------------------------------------------------------------------------------
# measurement artefacts
# ---------------------------------------------------------------------------------------


def _clean(s, var):
    """Intervals where observed = truth + random noise only."""
    obs, t = s.observed, s.truth
    ok = obs[var].notna().to_numpy()
    ok &= ~t.index.isin(s.meta["spikes"].get(var, pd.DatetimeIndex([])))
    ok &= ~t.index.isin(s.meta["upstream_rejects"])
    for e in s.meta["history"]:
        ok &= ~((t.index >= e["start"]) & (t.index < e["end"]) & bool(e.get("exclude") or e.get("correct")))
    return ok


def test_noise_follows_documented_laplace_model():
    """LE noise: Laplace with sd = a + b|LE| (Hollinger and Richardson 2005 form): the
    scaled residuals have sd 1 and the Laplace kurtosis of 6 (excess 3) (scipy oracle)."""
    from scipy import stats

    s = simulate_site("grassland", start="2025-05-01", days=60, seed=21)
    spec = s.meta["noise"]["le"]
    assert spec == NOISE_MODEL["le"] and spec["distribution"] == "laplace"
    ok = _clean(s, "le")
    t = s.truth["le"].to_numpy()[ok]
    r = (s.observed["le"].to_numpy()[ok] - t) / (spec["a"] + spec["b"] * np.abs(t))
    assert r.size > 1500
    assert np.std(r) == pytest.approx(1.0, rel=0.08)
    assert stats.kurtosis(r) == pytest.approx(3.0, abs=1.2)  # Laplace excess kurtosis 3


def test_noise_scale_halves_the_noise():
    """noise_scale = 0.5 halves a and b of the recorded model and the residual spread."""
    full = simulate_site("grassland", start="2025-05-01", days=40, seed=31)
    half = simulate_site("grassland", start="2025-05-01", days=40, seed=31, noise_scale=0.5)
    assert half.meta["noise"]["le"]["a"] == pytest.approx(0.5 * NOISE_MODEL["le"]["a"])
    assert half.meta["noise"]["h"]["b"] == pytest.approx(0.5 * NOISE_MODEL["h"]["b"])
    for v in ("le", "ta"):
        ok_f, ok_h = _clean(full, v), _clean(half, v)
        sd_f = np.std((full.observed[v] - full.truth[v]).to_numpy()[ok_f])
        sd_h = np.std((half.observed[v] - half.truth[v]).to_numpy()[ok_h])
        assert sd_h / sd_f == pytest.approx(0.5, rel=0.15)
    with pytest.raises(ValueError, match="noise_scale"):
        simulate_site("grassland", days=2, noise_scale=-1.0)


def test_spikes_gaps_and_upstream_flags(sims):
    """Spikes are large, gaps are more frequent at night, open-path LE is missing in rain,
    the upstream flag 2 marks corrupted LE, and the gap mask matches the NaNs."""
    s = simulate_site("conifer-forest", start="2025-04-01", days=30, seed=8)
    obs, t = s.observed, s.truth
    spikes = s.meta["spikes"]["le"]
    assert len(spikes) > 4
    dev = (obs.loc[spikes, "le"] - t.loc[spikes, "le"]).dropna().abs()
    assert (dev > 60).mean() > 0.9  # spikes of 120-320 W m-2 (simulate) minus noise
    mask = s.meta["gap_mask"]
    for v in mask.columns:
        np.testing.assert_array_equal(obs[v].isna().to_numpy(), mask[v].to_numpy())
    short = np.zeros(len(t), dtype=bool)
    for g in s.meta["gaps"]:
        if g["cause"].startswith("short gap (") and "le" in g["variables"]:
            short |= (t.index >= g["start"]) & (t.index < g["end"])
    day = t["daytime"].to_numpy()
    assert short[~day].mean() > 1.5 * short[day].mean()  # simulate: 3x the start rate at night
    assert obs.loc[t["precip"] > 0, "le"].isna().all()  # open-path analyser in rain
    assert obs["h"].notna().sum() > obs["le"].notna().sum()
    bad = obs["le_upstream_flag"] == 2
    assert bad.any()
    assert (obs.loc[bad, "le"] - t.loc[bad, "le"]).abs().min() > 40  # bias 80-200 minus noise


@pytest.mark.parametrize("kind", SITE_KINDS)
def test_history_faults(sims, kind):
    """Reversed plates flip the sign of observed G in the declared period; the site visit
    period is declared as an exclusion of le, h and fc."""
    s = sims[kind]
    hist = s.meta["history"]
    rev = [e for e in hist if "correct" in e]
    assert len(rev) == 1 and rev[0]["correct"] == {"g": {"scale": -1.0}}
    sel = (s.truth.index >= rev[0]["start"]) & (s.truth.index < rev[0]["end"])
    obs, tr = s.observed["g"].to_numpy(), s.truth["g"].to_numpy()
    big = sel & (np.abs(tr) > 20) & np.isfinite(obs)
    assert big.sum() > 10 and np.all(np.sign(obs[big]) == -np.sign(tr[big]))
    out = ~sel & (np.abs(tr) > 20) & np.isfinite(obs)
    assert np.mean(np.sign(obs[out]) == np.sign(tr[out])) > 0.99
    visits = [e for e in hist if "exclude" in e]
    assert len(visits) == 1 and set(visits[0]["exclude"]) == {"le", "h", "fc"}
    assert visits[0]["end"] - visits[0]["start"] == pd.Timedelta(hours=3)


def test_switches_turn_artefacts_off():
    """noise/spikes/gaps/history_faults off: observed equals truth."""
    s = simulate_site("grassland", seed=1, noise=False, spikes=False, gaps=False,
                      history_faults=False, **SHORT)
    for v in ("le", "h", "rn", "g", "ta", "rh", "wind", "ustar", "swc"):
        np.testing.assert_allclose(s.observed[v], s.truth[v], atol=1e-12)


def test_bad_arguments():
    with pytest.raises(ValueError, match="unknown site kind"):
        simulate_site("tundra", seed=1)
    with pytest.raises(ValueError, match="days"):
        simulate_site("grassland", days=0)
    with pytest.raises(ValueError, match="interval"):
        simulate_site("grassland", days=2, interval_minutes=7)


# ---------------------------------------------------------------------------------------
# the network on disk
# ---------------------------------------------------------------------------------------


def test_network_files_and_ids(demo_dir):
    """Ids are [a-z0-9-]+ (CONTRACT §2), paths resolve, everything says it is invented."""
    path = Path(demo_dir)
    net = tomllib.loads(path.read_text())
    assert "INVENTED" in path.read_text()
    assert "invented" in net["network"]["name"].lower()
    assert "ALL DATA IN THIS FOLDER ARE INVENTED" in (path.parent / "README.txt").read_text()
    sites = net["network"]["sites"]
    assert len(sites) == 3
    for entry in sites:
        cfg_path = path.parent / entry["config"]
        assert cfg_path.is_file()
        text = cfg_path.read_text()
        assert "INVENTED" in text
        cfg = tomllib.loads(text)
        assert re.fullmatch(r"[a-z0-9-]+", cfg["site"]["id"])
        assert "invented" in cfg["site"]["name"].lower()
        files = glob.glob(str(path.parent / entry["data"]))
        assert len(files) >= 2
        assert all(Path(f).name.startswith(cfg["site"]["id"]) for f in files)


def test_network_loads_with_config_loader(demo_dir):
    """The pipeline's own loader accepts the network and every site file."""
    from pipeline.config import load_network_config, load_site_config

    net = load_network_config(demo_dir)
    assert len(net.sites) == 3
    kinds = {}
    for s in net.sites:
        cfg = load_site_config(s.config)
        kinds[cfg.site.id] = cfg
        assert any(h.correct.get("g", {}).get("scale") == -1.0 for h in cfg.history)
        assert any(set(h.exclude) == {"le", "h", "fc"} for h in cfg.history)
    forest = kinds["demo-ridge-forest"]
    assert [st.interval_minutes for st in forest.inputs] == [30, 10]
    assert forest.site.interval_minutes == 30 and forest.site.irga == "open-path"
    assert kinds["demo-valley-crop"].site.interval_minutes == 60


_PINT_UNITS = {  # [input.units] string -> pint unit (the oracle's own spelling)
    "W m-2": "W / m**2", "degC": "degC", "K": "kelvin", "%": "percent",
    "fraction": "dimensionless", "kPa": "kPa", "hPa": "hPa", "Pa": "Pa", "m s-1": "m / s",
    "mm": "mm", "m3 m-3": "m**3 / m**3", "percent": "percent", "degree": "degree",
    "umol m-2 s-1": "umol / m**2 / s",
}
_PINT_CANONICAL = {"le": "W / m**2", "h": "W / m**2", "rn": "W / m**2", "g": "W / m**2",
                   "rg": "W / m**2", "sw_out": "W / m**2", "lw_in": "W / m**2",
                   "lw_out": "W / m**2", "ta": "degC", "t_soil": "degC", "rh": "percent",
                   "vpd": "kPa", "p_air": "kPa", "wind": "m / s", "wind_dir": "degree",
                   "ustar": "m / s", "precip": "mm", "swc": "m**3 / m**3",
                   "fc": "umol / m**2 / s"}


def _parse_times(df, stream):
    """Interval starts (tz-naive local) parsed with pandas, independently of ingest."""
    cols = stream["timestamp_column"]
    cols = [cols] if isinstance(cols, str) else cols
    text = df[cols[0]].astype(str)
    for c in cols[1:]:
        text = text + " " + df[c].astype(str)
    extra = text.str.contains(" 24:00")
    text = text.str.replace(" 24:00", " 00:00", regex=False)
    stamps = pd.to_datetime(text, format=stream["timestamp_format"])
    stamps = stamps + pd.to_timedelta(extra.astype(int), unit="D")
    if stream["timestamp_marks"] == "end":
        stamps = stamps - pd.Timedelta(minutes=stream["interval_minutes"])
    return pd.DatetimeIndex(stamps)


def test_csv_parse_back_to_observed_with_pint(demo_dir):
    """Every export, read with pandas and converted with pint from its declared units,
    gives the simulated observed values (to the written rounding) in canonical units."""
    import pint

    ureg = pint.UnitRegistry()
    sims = demo_network.simulate_demo_network(days=16, seed=5)
    root = Path(demo_dir).parent
    net = tomllib.loads(Path(demo_dir).read_text())
    for entry in net["network"]["sites"]:
        cfg = tomllib.loads((root / entry["config"]).read_text())
        sid = cfg["site"]["id"]
        obs = sims[sid].observed
        site_iv = pd.Timedelta(minutes=cfg["site"]["interval_minutes"])
        streams = cfg["input"] if isinstance(cfg["input"], list) else [cfg["input"]]
        tz = obs.index.tz
        for stream in streams:
            files = sorted(glob.glob(str(root / "raw" / sid / stream["match"])))
            assert files
            parts = []
            for f in files:
                na = [str(m) for m in stream["missing"]]
                df = pd.read_csv(f, skiprows=[r + 1 for r in stream["skip_rows"]],
                                 na_values=na, keep_default_na=False, dtype=str)
                idx = _parse_times(df, stream)
                parts.append(df.set_index(idx))
            data = pd.concat(parts)
            dup = data.index.duplicated(keep="first")
            # overlapping weekly exports repeat identical rows
            later = data[data.index.duplicated(keep="last")]
            pd.testing.assert_frame_equal(data[dup].sort_index(), later.sort_index())
            data = data[~dup].sort_index()
            stream_iv = pd.Timedelta(minutes=stream["interval_minutes"])
            assert np.all(np.diff(data.index.values) >= stream_iv.to_timedelta64())
            bins = data.index.floor(site_iv).tz_localize(tz)
            for var, names in stream["columns"].items():
                names = [names] if isinstance(names, str) else names
                unit = stream.get("units", {}).get(var, micromet_unit(var))
                scale = stream.get("scale", {}).get(var, 1.0)
                raw = np.column_stack([data[n].astype(float).to_numpy() for n in names]).mean(axis=1)
                q = ureg.Quantity(raw * scale, _PINT_UNITS[unit]).to(_PINT_CANONICAL[var])
                values = pd.Series(np.asarray(q.magnitude, dtype=float), index=bins)
                agg = values.groupby(level=0).sum(min_count=1) if var == "precip" else \
                    values.groupby(level=0).mean()
                expected = obs[var]
                got = agg.reindex(expected.index)
                written = got.notna().to_numpy()
                np.testing.assert_array_equal(written, expected.notna().to_numpy(),
                                              err_msg=f"{sid} {var} missing pattern")
                # half the last written digit, in canonical units, is the rounding error
                decimals = max(_decimals(data[n]) for n in names)
                step = (ureg.Quantity(1.0, _PINT_UNITS[unit]).to(_PINT_CANONICAL[var]).magnitude
                        - ureg.Quantity(0.0, _PINT_UNITS[unit]).to(_PINT_CANONICAL[var]).magnitude)
                tol = 0.5 * 10.0 ** -decimals * abs(step) * scale * 1.000001
                if var == "precip":  # a sum of up to three rounded values
                    tol *= 3.0
                np.testing.assert_allclose(got.to_numpy()[written], expected.to_numpy()[written],
                                           atol=tol + 1e-9, rtol=0, err_msg=f"{sid} {var}")


def _decimals(column: pd.Series) -> int:
    """Most digits after the decimal point in a text column."""
    text = column.dropna().astype(str)
    frac = text.str.extract(r"\.(\d+)$")[0].dropna()
    return int(frac.str.len().max()) if len(frac) else 0


def micromet_unit(var):
    from pipeline.config import CANONICAL_UNITS

    return CANONICAL_UNITS[var]


def test_ingest_reads_demo_to_observed(demo_dir):
    """pipeline.ingest reads every export; the working frame equals the observed record,
    with the reversed-plate period corrected back by the history entry."""
    from pipeline import ingest
    from pipeline.config import load_network_config, load_site_config

    sims = demo_network.simulate_demo_network(days=16, seed=5)
    net = load_network_config(demo_dir)
    for s in net.sites:
        cfg = load_site_config(s.config)
        by = {}
        for f in sorted(glob.glob(s.data)):
            st = ingest.assign_stream(Path(f), cfg)
            got = ingest.read_logger_file(Path(f), st, cfg.site)
            assert not got.warnings, got.warnings
            by.setdefault(st.name, []).append(got.raw)
        raw = {k: pd.concat(v) for k, v in by.items()}
        raw = {k: v[~v.index.duplicated()] for k, v in raw.items()}
        frame, flags, _ = ingest.build_working_frame(raw, cfg)
        sim = sims[cfg.site.id]
        obs = sim.observed.copy()
        rev = [e for e in sim.meta["history"] if "correct" in e][0]
        sel = (obs.index >= rev["start"]) & (obs.index < rev["end"])
        obs.loc[sel, "g"] = -obs.loc[sel, "g"]
        frame = frame.reindex(obs.index)
        for var in ("le", "h", "rn", "g", "ta", "p_air", "wind", "ustar", "precip", "swc"):
            np.testing.assert_allclose(frame[var], obs[var], atol=0.06, rtol=1e-6,
                                       err_msg=f"{cfg.site.id} {var}")
        np.testing.assert_allclose(frame["canopy_height_m"], sim.truth["canopy_height_m"])


def test_demo_network_deterministic(tmp_path):
    """The same seed writes byte-identical exports (regression of determinism)."""
    a = demo_network.write_demo_network(tmp_path / "a", days=8, seed=3, write_truth=False)
    b = demo_network.write_demo_network(tmp_path / "b", days=8, seed=3, write_truth=False)
    fa = sorted(p.relative_to(a.parent) for p in a.parent.rglob("*") if p.is_file())
    fb = sorted(p.relative_to(b.parent) for p in b.parent.rglob("*") if p.is_file())
    assert fa == fb
    for rel in fa:
        assert (a.parent / rel).read_bytes() == (b.parent / rel).read_bytes()

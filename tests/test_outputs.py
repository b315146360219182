"""End-to-end: `towerflow run` on invented data writes every CONTRACT §4 output, self-described."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from pipeline import flags as flagbits
from towerflow.cli import main
from towerflow.demo.network import write_demo_network

# CONTRACT §4: intervals.parquet columns that must be present for a site with g and rg
CONTRACT_INTERVAL_COLUMNS = [
    "timestamp_start", "timestamp_end", "le_filled", "h_filled", "le_fill_method", "h_fill_method",
    "le_fill_quality", "h_fill_quality", "le_fill_sd", "h_fill_sd", "ga", "gs", "gs_closed",
    "gs_molar", "gs_valid", "gs_reject", "omega", "le_equilibrium", "le_imposed",
]
CONTRACT_DAILY_COLUMNS = ["date", "et_mm", "complete_day", "le_measured_fraction", "ebr",
                          "gs_median", "omega_mean", "n_gs_valid"]
CONTRACT_SUMMARY_KEYS = ["site", "start", "end", "n_intervals", "provisional_from", "closure", "gaps",
                         "spikes", "fill_skill", "software_version", "config_sha256"]
# CF standard names (CF standard name table) for the variables the issue names
CF_NAMES = {"le": "surface_upward_latent_heat_flux", "h": "surface_upward_sensible_heat_flux",
            "ta": "air_temperature", "wind": "wind_speed"}


def _run_demo_site(tmp_path_factory, site_id: str, seed: int):
    """``towerflow run`` over 21 days of one invented demo site: (config, files, site folder)."""
    root = tmp_path_factory.mktemp(f"e2e-{site_id}")
    network = write_demo_network(root / "raw", days=21, seed=seed)
    cfg = network.parent / "sites" / f"{site_id}.toml"
    files = sorted((network.parent / "raw" / site_id).glob("*.csv"))
    out = root / "out"
    assert main(["run", str(cfg), *map(str, files), "--out", str(out), "--no-report"]) == 0
    return cfg, files, out / site_id


@pytest.fixture(scope="module")
def grassland_run(tmp_path_factory):
    return _run_demo_site(tmp_path_factory, "demo-upland-grassland", seed=7)


def test_intervals_contract_columns_and_metadata(grassland_run):
    """Every CONTRACT column is present and every column carries a unit or long name."""
    _, _, site_dir = grassland_run
    table = pq.read_table(site_dir / "intervals.parquet")
    names = table.schema.names
    for col in CONTRACT_INTERVAL_COLUMNS:
        assert col in names, col
    for var in ("le", "h", "rn", "g", "rg", "ta", "wind", "ustar"):
        assert var in names and f"{var}_flag" in names
    for field in table.schema:
        meta = {k.decode(): v.decode() for k, v in (field.metadata or {}).items()}
        assert "long_name" in meta, field.name
    for var, std in CF_NAMES.items():
        meta = {k.decode(): v.decode() for k, v in table.schema.field(var).metadata.items()}
        assert meta["standard_name"] == std
        assert meta["unit"] in ("W m-2", "degC", "m s-1")
    flag_meta = json.loads(table.schema.field("le_flag").metadata[b"flag_meanings"])
    assert set(map(int, flag_meta)) == set(flagbits.BITS)
    file_meta = json.loads(table.schema.metadata[b"towerflow"])
    for key in ("site", "software_version", "config_sha256", "effective_rules", "processed_at"):
        assert key in file_meta


def test_intervals_grid_and_fill_invariants(grassland_run):
    """One row per interval, no duplicates or holes; measured exactly where accepted."""
    _, _, site_dir = grassland_run
    df = pd.read_parquet(site_dir / "intervals.parquet")
    steps = df["timestamp_start"].diff().iloc[1:]
    assert (steps == pd.Timedelta(minutes=30)).all()
    assert (df["timestamp_end"] - df["timestamp_start"] == pd.Timedelta(minutes=30)).all()
    assert df["timestamp_start"].iloc[0].utcoffset() == pd.Timedelta(hours=1)  # site utc_offset_hours
    for var in ("le", "h"):
        accepted = df[f"{var}_flag"] == 0
        measured = df[f"{var}_fill_method"] == "measured"
        assert (accepted == measured).all()
        np.testing.assert_array_equal(df.loc[accepted, f"{var}_filled"], df.loc[accepted, var])
        assert df[f"{var}_fill_sd"][measured].isna().all()
        assert set(df[f"{var}_fill_quality"].astype(str).unique()) <= {"measured", "good", "fair", "poor"}
        assert df[f"{var}_filled"].notna().all()  # 21 days: no gap beyond the maximum fill length


@pytest.fixture(scope="module")
def crop_run(tmp_path_factory):
    """The invented 60-minute irrigated crop (its record starts in late April: no frost)."""
    return _run_demo_site(tmp_path_factory, "demo-valley-crop", seed=11)[2]


def test_sixty_minute_site_grid(crop_run):
    df = pd.read_parquet(crop_run / "intervals.parquet")
    assert (df["timestamp_start"].diff().iloc[1:] == pd.Timedelta(hours=1)).all()
    assert (df["timestamp_end"] - df["timestamp_start"] == pd.Timedelta(hours=1)).all()
    assert df["gs_valid"].sum() > 20


def test_identity_on_output_columns(crop_run):
    """le = omega·le_equilibrium + (1 − omega)·le_imposed where gs exists (McNaughton & Jarvis 1983)."""
    df = pd.read_parquet(crop_run / "intervals.parquet")
    valid = df[["omega", "le_equilibrium", "le_imposed", "le"]].notna().all(axis=1) & (df["le_flag"] == 0)
    assert valid.sum() > 20
    le = df.loc[valid, "le"].to_numpy()
    rebuilt = (df.loc[valid, "omega"] * df.loc[valid, "le_equilibrium"]
               + (1 - df.loc[valid, "omega"]) * df.loc[valid, "le_imposed"]).to_numpy()
    np.testing.assert_allclose(rebuilt, le, rtol=1e-6)


def test_daily_and_summary(grassland_run):
    cfg, _, site_dir = grassland_run
    daily = pd.read_parquet(site_dir / "daily.parquet")
    for col in CONTRACT_DAILY_COLUMNS:
        assert col in daily.columns, col
    assert daily["date"].is_unique
    summary = json.loads((site_dir / "summary.json").read_text())
    for key in CONTRACT_SUMMARY_KEYS:
        assert key in summary, key
    import hashlib

    assert summary["config_sha256"] == hashlib.sha256(Path(cfg).read_bytes()).hexdigest()
    assert 0.6 < summary["closure"]["ebr"] < 1.0  # the demo's imposed closure gap is 20 % (regression)
    assert set(summary["fill_skill"]["le"]) >= {"rmse", "bias", "r2", "n"}
    assert (site_dir / "effective_rules.toml").exists()


def test_readable_by_pyarrow_dataset_and_duckdb(grassland_run):
    """The parquet files open as-is with pyarrow's dataset API and DuckDB."""
    _, _, site_dir = grassland_run
    dataset = ds.dataset(str(site_dir / "intervals.parquet"), format="parquet")
    assert dataset.count_rows() == len(pd.read_parquet(site_dir / "intervals.parquet"))
    duckdb = pytest.importorskip("duckdb")
    n = duckdb.sql(f"select count(*) from '{site_dir / 'daily.parquet'}'").fetchall()[0][0]
    assert n == len(pd.read_parquet(site_dir / "daily.parquet"))


def test_effective_rules_repeat_the_run(grassland_run, tmp_path):
    """The written effective rule set, used as the rule set, gives the same outputs."""
    cfg, files, site_dir = grassland_run
    before = pd.read_parquet(site_dir / "intervals.parquet")
    rules_copy = tmp_path / "rules.toml"
    rules_copy.write_text((site_dir / "effective_rules.toml").read_text())
    out = tmp_path / "again"
    assert main(["run", str(cfg), *map(str, files), "--out", str(out), "--no-report",
                 "--rules", str(rules_copy)]) == 0
    after = pd.read_parquet(out / "demo-upland-grassland" / "intervals.parquet")
    pd.testing.assert_frame_equal(before, after)


def test_totals_and_daily_uncertainty(grassland_run):
    """totals.parquet holds month and record totals with a band that contains the estimate."""
    _, _, site_dir = grassland_run
    totals = pd.read_parquet(site_dir / "totals.parquet")
    assert len(totals) >= 2
    for col in ("et_mm", "et_mm_sd", "et_mm_p025", "et_mm_p975", "et_closed_mm"):
        assert col in totals.columns, col
    ok = totals["et_mm"].notna()
    assert (totals.loc[ok, "et_mm_p025"] <= totals.loc[ok, "et_mm"]).all()
    assert (totals.loc[ok, "et_mm"] <= totals.loc[ok, "et_mm_p975"]).all()
    daily = pd.read_parquet(site_dir / "daily.parquet")
    assert "et_mm_sd" in daily.columns


def test_neighbour_site_fills_met_driver_gaps(tmp_path):
    """[gapfill] neighbours: the forest's latest outputs fill the grassland's air-temperature gap,
    and the outputs say which site filled it."""
    network = write_demo_network(tmp_path / "raw", days=14, seed=5)
    sites = network.parent / "sites"
    out = tmp_path / "out"
    forest_files = sorted((network.parent / "raw" / "demo-ridge-forest").glob("*.csv"))
    assert main(["run", str(sites / "demo-ridge-forest.toml"), *map(str, forest_files),
                 "--out", str(out), "--no-report"]) == 0
    grass_cfg = tmp_path / "grass.toml"
    grass_cfg.write_text((sites / "demo-upland-grassland.toml").read_text()
                         + '\n[gapfill]\nneighbours = ["demo-ridge-forest"]\n')
    grass_files = sorted((network.parent / "raw" / "demo-upland-grassland").glob("*.csv"))
    # blank a day of air temperature in the first week's file: a gap the neighbour can fill
    first = grass_files[0].read_text().splitlines()
    header_lines = 1
    edited = tmp_path / grass_files[0].name
    cols = first[0].split(",")
    ta_col = cols.index("air_temperature")  # the grassland logger's column (demo site TOML)
    rows = []
    for k, line in enumerate(first):
        if header_lines <= k < header_lines + 48 * 3 and k > 48:
            cells = line.split(",")
            cells[ta_col] = "-9999"
            line = ",".join(cells)
        rows.append(line)
    edited.write_text("\n".join(rows) + "\n")
    assert main(["run", str(grass_cfg), str(edited), *map(str, grass_files[1:]),
                 "--out", str(out), "--no-report"]) == 0
    df = pd.read_parquet(out / "demo-upland-grassland" / "intervals.parquet")
    assert "ta_fill_source" in df.columns
    assert (df["ta_fill_source"].astype(str) == "demo-ridge-forest").any()


@pytest.mark.parametrize("value, key", [('["../x"]', "gapfill.neighbours[0]"),
                                        ('"demo-ridge-forest"', "gapfill.neighbours"),
                                        ('["demo-upland-grassland"]', "gapfill.neighbours[0]")])
def test_bad_neighbour_list_is_a_config_error(tmp_path, value, key):
    from pipeline.config import load_site_config
    from pipeline.errors import ConfigError

    network = write_demo_network(tmp_path / "raw", days=7, seed=1)
    cfg = tmp_path / "grass.toml"
    cfg.write_text((network.parent / "sites" / "demo-upland-grassland.toml").read_text()
                   + f"\n[gapfill]\nneighbours = {value}\n")
    with pytest.raises(ConfigError) as info:
        load_site_config(cfg)
    assert info.value.key == key and "grass.toml" in str(info.value)

"""The PDF reports: pages, extractable text, notes for missing inputs, atomic writing.

The site outputs are invented (reports._synthetic) and written with pandas in the test's
temporary folder; the pipeline is not run. Expected page counts and texts come from the
report's own page list and the contract's wording (CONTRACT §4; the caution of issue 7).
"""
from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

pypdf = pytest.importorskip("pypdf")
pytest.importorskip("matplotlib")

from pipeline import flags as flagbits  # noqa: E402
from reports import _data, _site_pages  # noqa: E402
from reports._synthetic import write_synthetic_site  # noqa: E402
from reports.network import rank_sites, write_network_report  # noqa: E402
from reports.site import CAUTION, PAGE_TITLES, write_site_report  # noqa: E402


def _pages_text(pdf: Path) -> list[str]:
    reader = pypdf.PdfReader(str(pdf))
    return [" ".join((page.extract_text() or "").split()) for page in reader.pages]


def _squash(text: str) -> str:
    return " ".join(text.split())


@pytest.fixture(scope="module")
def half_hourly(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("reports") / "invented-meadow"
    write_synthetic_site(folder, site="invented-meadow", days=21, start="2025-05-01")
    write_site_report(folder)
    return folder


def test_site_report_has_every_page_with_site_and_period(half_hourly):
    """One page per entry of PAGE_TITLES; site id, period and 'page i of n' on every page."""
    texts = _pages_text(half_hourly / "qc_report.pdf")
    assert len(texts) == len(PAGE_TITLES) == 11
    assert "Evapotranspiration totals" in texts[-1]
    for i, text in enumerate(texts, start=1):
        assert "invented-meadow" in text, f"page {i} lacks the site id"
        assert "2025-05-01 00:00" in text and "2025-05-22 00:00" in text, f"page {i} lacks the period"
        assert f"page {i} of {len(texts)}" in text
        assert "could not be drawn" not in text, f"page {i} failed: {text[:300]}"


def test_overview_carries_caution_warnings_and_closure(half_hourly):
    """The overview states the caution of issue 7, the warnings and the closure statistics."""
    first = _pages_text(half_hourly / "qc_report.pdf")[0]
    assert _squash(CAUTION) in first
    assert "unit suspicion" in first  # the invented warning in summary.json
    assert "EBR" in first and "0.80" in first  # closure.ebr of the invented summary
    assert "Provisional from" in first
    assert "site visit: analyser cleaned" in first  # the history period's reason


def test_health_page_lists_alerts_first(half_hourly):
    """Findings to act on and to watch are listed with their messages; passed checks summarised."""
    text = _pages_text(half_hourly / "qc_report.pdf")[1]
    assert "ACT" in text and "WATCH" in text
    assert text.index("ACT") < text.index("WATCH")
    assert "the sensor may be stuck" in text
    assert "Passed every week: clock offset" in text


def test_report_replaces_atomically(half_hourly, monkeypatch):
    """A failing render leaves the previous report untouched and no temporary file behind."""
    before = (half_hourly / "qc_report.pdf").read_bytes()
    from matplotlib.backends import backend_pdf

    def broken(self, *args, **kwargs):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(backend_pdf.PdfPages, "savefig", broken)
    with pytest.raises(RuntimeError):
        write_site_report(half_hourly)
    assert (half_hourly / "qc_report.pdf").read_bytes() == before
    assert sorted(p.name for p in half_hourly.iterdir() if p.name.startswith(".")) == []


def test_site_without_g_and_rg_renders_notes(tmp_path):
    """No g: a note replaces the interval closure scatter; no rg: a note replaces the radiation panel."""
    folder = write_synthetic_site(tmp_path / "invented-ridge", site="invented-ridge", with_g=False, with_rg=False)
    texts = _pages_text(write_site_report(folder))
    assert len(texts) == len(PAGE_TITLES)
    closure = texts[PAGE_TITLES.index("Energy-balance closure")]
    assert "No ground heat flux (G) at this site" in closure
    drivers = texts[PAGE_TITLES.index("Drivers and evapotranspiration")]
    assert "No global radiation (Rg) at this site" in drivers
    diurnal = texts[PAGE_TITLES.index("Mean diurnal courses")]
    assert "not measured at this site: G, Rg" in diurnal
    assert all("could not be drawn" not in t for t in texts)


def test_hourly_site_uses_its_own_interval(tmp_path):
    """A 60-minute site: 24 time-of-day bins, a correct period, a note where fill pairs are absent."""
    folder = write_synthetic_site(tmp_path / "invented-hourly", site="invented-hourly", interval_minutes=60,
                                  days=14, start="2025-07-01")
    summary = json.loads((folder / "summary.json").read_text())
    del summary["fill_validation"]
    (folder / "summary.json").write_text(json.dumps(summary))
    ctx = _site_pages.build_context(_data.read_site_outputs(folder))
    assert ctx.out.interval == pd.Timedelta(minutes=60)
    assert ctx.n_slots == 24
    texts = _pages_text(write_site_report(folder))
    assert len(texts) == len(PAGE_TITLES)
    assert all("2025-07-15 00:00" in t for t in texts)  # end = last start + 60 min
    fill = texts[PAGE_TITLES.index("Gap filling")]
    assert "No hidden-versus-filled pairs" in fill
    assert "of 60 min" in texts[0]
    assert all("could not be drawn" not in t for t in texts)


def test_empty_folder_still_gives_a_report(tmp_path):
    """Nothing to read: every page is there with a note, nothing raises."""
    folder = tmp_path / "invented-empty"
    folder.mkdir()
    texts = _pages_text(write_site_report(folder))
    assert len(texts) == len(PAGE_TITLES)
    assert "intervals.parquet is missing" in texts[0]


def test_heat_map_grid_places_values_by_day_and_time(tmp_path):
    """The day x time-of-day grid puts each interval at its local day and time bin."""
    folder = write_synthetic_site(tmp_path / "invented-grid", site="invented-grid", days=3)
    out = _data.read_site_outputs(folder)
    ctx = _site_pages.build_context(out)
    values = np.arange(len(out.intervals), dtype=float)
    grid = _site_pages._grid(ctx, values)
    assert grid.shape == (3, 48)
    # interval 50 starts on day 2 (index 1) at 01:00 local standard time: bin 2 of 30 min
    assert grid[1, 2] == 50.0
    assert np.isfinite(grid).all()


def test_primary_reason_is_lowest_bit_other_than_missing():
    """Bits as in CONTRACT §4: spike (4) + wet (16) -> spike; missing alone -> none."""
    flags = np.array([0, flagbits.MISSING, flagbits.SPIKE | flagbits.WET, flagbits.MISSING | flagbits.RANGE,
                      flagbits.CLOCK])
    assert list(_data.primary_reason(flags)) == ["", "", "spike", "out_of_range", "suspect_clock"]


# ------------------------------------------------------------------------------ network


def _network(tmp_path: Path) -> Path:
    out = tmp_path / "net"
    out.mkdir()
    write_synthetic_site(out / "invented-meadow", site="invented-meadow", days=14)
    write_synthetic_site(out / "invented-forest", site="invented-forest", days=14, seed=3, with_g=False)
    rows = [
        {"site": "invented-meadow", "status": "ok", "error": "", "closure_ebr": 0.82, "closure_slope": 0.8,
         "gap_fraction_le": 0.1, "gap_fraction_h": 0.08, "spikes_le": 4, "spikes_h": 3, "fill_rmse_le": 21.0,
         "fill_rmse_h": 17.0, "health_act": 0, "health_watch": 0, "days_since_last_data": 0.0},
        {"site": "invented-valley", "status": "failed",
         "error": "invented-valley.toml: [input.units] key 'ta': unknown unit 'kelvinz'"},
        {"site": "invented-forest", "status": "ok", "error": "", "closure_ebr": 0.45, "closure_slope": 0.4,
         "gap_fraction_le": 0.2, "gap_fraction_h": 0.2, "health_act": 2, "health_watch": 1,
         "days_since_last_data": json.dumps({"le": 0.0, "h": 6.5})},
    ]
    pd.DataFrame(rows).to_csv(out / "network_summary.csv", index=False)
    return out


def test_network_report_shows_failed_site_error_first(tmp_path):
    """The failed site comes first with its error text; site ids on the pages; 1 + 1 pages."""
    out = _network(tmp_path)
    texts = _pages_text(write_network_report(out, network_name="Invented test network"))
    assert len(texts) == 2  # the ranking table + one page of small multiples (3 sites <= 5 per page)
    table = texts[0]
    assert "unknown unit 'kelvinz'" in table
    order = [table.index(s) for s in ("invented-valley", "invented-forest", "invented-meadow")]
    assert order == sorted(order)
    assert "no accepted h for 6.5 days" in table
    assert "energy-balance ratio 0.45 outside" in table
    assert all("Invented test network" in t and re.search(r"page \d of 2", t) for t in texts)
    assert "invented-meadow" in texts[1] and "invented-forest" in texts[1]


def test_rank_sites_orders_by_urgency():
    """Failed > act findings > stale data > nothing; the reasons say why."""
    table = pd.DataFrame([
        {"site": "a", "status": "ok", "error": "", "health_act": 0, "days_since_last_data": 0.0},
        {"site": "b", "status": "ok", "error": "", "health_act": 0, "days_since_last_data": 9.0},
        {"site": "c", "status": "ok", "error": "", "health_act": 1, "days_since_last_data": 0.0},
        {"site": "d", "status": "failed", "error": "boom.csv row 3: bad timestamp"},
    ])
    ranked = rank_sites(table)
    assert [r.site for r in ranked] == ["d", "c", "b", "a"]
    assert ranked[0].reasons[0] == "processing failed: boom.csv row 3: bad timestamp"
    assert ranked[-1].reasons == []


def test_network_report_without_summary_table(tmp_path):
    """No network_summary.csv: a one-page report that says so."""
    texts = _pages_text(write_network_report(tmp_path, network_name="Invented empty network"))
    assert len(texts) == 1 and "file missing" in texts[0]


def test_dictionary_and_nullable_columns_render(tmp_path):
    """Dictionary-encoded quality, nullable flags and booleans, a broken summary: notes, no failure."""
    folder = write_synthetic_site(tmp_path / "invented-types", site="invented-types", days=7)
    frame = pd.read_parquet(folder / "intervals.parquet")
    frame["le_fill_quality"] = frame["le_fill_quality"].astype("category")
    frame["h_flag"] = frame["h_flag"].astype("Int32")
    frame.loc[frame.index[:5], "h_flag"] = pd.NA
    frame["gs_valid"] = frame["gs_valid"].astype("boolean")
    frame.loc[frame.index[:5], "gs_valid"] = pd.NA
    frame.to_parquet(folder / "intervals.parquet")
    (folder / "summary.json").write_text("{not json")
    texts = _pages_text(write_site_report(folder))
    assert len(texts) == len(PAGE_TITLES)
    assert all("could not be drawn" not in t for t in texts)
    assert "summary.json could not be read" in texts[0]
    assert all("invented-types" in t for t in texts)  # the site id falls back to the folder name

"""Invented benchmark data: one grassland site with N years of weekly logger exports.

ALL SITES, PLACES AND VALUES WRITTEN HERE ARE INVENTED.

:func:`write_site_years` simulates the demo network's invented upland grassland
(:func:`towerflow.demo.simulate.simulate_site`, kind ``grassland``) for ``years × 365``
days and writes it the way the demo network writes it (weekly CSV exports with the
grassland logger's layout, two-hour overlaps, and the site TOML), using the demo writer's
own functions, so the benchmark reads exactly the files a user's ``towerflow run`` reads.
The folder is reused when it already holds the same request (a ``done.json`` marker).
"""
from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np

__all__ = ["write_site_years", "SiteData"]


@dataclasses.dataclass(frozen=True)
class SiteData:
    """One invented benchmark site on disk."""

    config: Path  # the site TOML
    files: tuple[Path, ...]  # the weekly CSV exports, in time order
    years: int
    rows: int  # half-hourly intervals simulated

    @property
    def csv_bytes(self) -> int:
        return sum(p.stat().st_size for p in self.files)


def write_site_years(folder, years: int, *, seed: int = 0, start: str = "2021-01-01") -> SiteData:
    """Write (once) an invented grassland site with ``years`` years of weekly exports.

    Parameters
    ----------
    folder : path
        Created if needed; holds ``<site-id>.toml`` and ``raw/*.csv``.
    years : int
        Record length in years of 365 days.
    seed : int, optional
        Simulation seed (weather and measurement).
    start : str, optional
        First local day of the record.

    Returns
    -------
    SiteData
    """
    from towerflow.demo.network import _GRASS, _site_toml, _stream_table, _write_weekly
    from towerflow.demo.simulate import simulate_site

    folder = Path(folder)
    site = dataclasses.replace(_GRASS, id=f"bench-grassland-{years}y-s{seed}",
                               name=f"Invented benchmark grassland, {years} years", days=365 * years)
    config = folder / f"{site.id}.toml"
    raw = folder / "raw"
    marker = folder / "done.json"
    request = {"years": years, "seed": seed, "start": start, "site": site.id}
    if marker.exists() and json.loads(marker.read_text()).get("request") == request:
        info = json.loads(marker.read_text())
        return SiteData(config=config, files=tuple(raw / f for f in info["files"]), years=years,
                        rows=info["rows"])
    raw.mkdir(parents=True, exist_ok=True)
    for old in raw.glob("*.csv"):
        old.unlink()
    sim = simulate_site(site.kind, start=start, days=site.days, seed=seed * 1000 + 1,
                        weather_seed=seed * 1000 + 101)
    rng = np.random.default_rng([seed, 4243, 0])
    paths: list[Path] = []
    for stream in site.streams:
        table = _stream_table(stream, sim.observed, rng)
        paths += _write_weekly(site, stream, table, raw)
    config.write_text(_site_toml(site, sim), encoding="utf-8")
    # the TOML's match glob names the stream's file tag; the site id prefix is in every name
    paths = sorted(paths)
    marker.write_text(json.dumps({"request": request, "files": [p.name for p in paths],
                                  "rows": int(len(sim.observed))}))
    return SiteData(config=config, files=tuple(paths), years=years, rows=int(len(sim.observed)))

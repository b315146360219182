"""The invented demo network on disk: weekly logger exports, site TOML files, a network TOML.

ALL SITES, PLACES AND DATA WRITTEN HERE ARE INVENTED.

:func:`write_demo_network` simulates three invented sites with
:func:`towerflow.demo.simulate.simulate_site` and writes, under ``out_dir``::

    README.txt                        says that everything is invented
    network.toml                      [network] + [[network.sites]] (CONTRACT §2)
    sites/<site-id>.toml              one site configuration per site (CONTRACT §2)
    raw/<site-id>/*.csv               weekly logger exports, each logger its own layout
    truth/<site-id>.parquet           the simulated truth (for checks; not read by the job)
    truth/<site-id>.json              noise model, spikes, gaps, history, irrigation

The three loggers' layouts differ on purpose, as they do in a real network:

* ``demo-upland-grassland``: one 30-min logger, ``%Y-%m-%d %H:%M:%S`` stamps marking the
  interval end, missing = -9999, soil water in percent, an upstream LE quality column and an
  analyser signal column; consecutive weekly files overlap by two hours.
* ``demo-ridge-forest``: a 30-min flux logger (date and time columns ``%d.%m.%Y`` +
  ``%H:%M``, end stamps with ``24:00`` for midnight, missing = "NAN", a units row) and a
  separate 10-min met logger (year, day of year and hhmm columns, stamps marking the interval
  start, air temperature in kelvin, pressure in hPa, RH as a fraction, two heat-flux plates,
  a units row, missing = -9999).
* ``demo-valley-crop``: one 60-min logger (``%d/%m/%Y %H:%M`` stamps marking the start),
  VPD in hPa instead of RH, pressure in Pa, rain as tipping-bucket counts of 0.2 mm
  (``[input.scale]``), missing = "NAN"; canopy heights and irrigation in ``[[history]]``.

Every site has a period of reversed heat-flux plates (corrected with
``correct = { g = { scale = -1.0 } }``) and a site visit (``exclude``).
"""
from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .simulate import SimulatedSite, simulate_site

__all__ = ["DEMO_SITES", "DemoSite", "simulate_demo_network", "write_demo_network"]

NETWORK_NAME = "Demo Alpine and Valley Network (invented)"
README_TEXT = """\
towerflow demo network
======================

ALL DATA IN THIS FOLDER ARE INVENTED.

The network, its three sites, their names, places and coordinates, and every value in the
logger exports were made up by towerflow's demo generator (towerflow/demo/simulate.py).
They describe no real site and no real measurement. Use them to try towerflow, never as
data about any place.

  network.toml         the network: its sites, their configurations and data folders
  sites/*.toml         one site configuration each
  raw/<site>/*.csv     weekly logger exports, each logger with its own column names,
                       units and timestamp layout
  truth/               the invented truth the exports were made from (for checks)
"""


@dataclass(frozen=True)
class _Col:
    """One column of a logger export."""

    source: str  # observed column (canonical name, "le_upstream_flag", "signal_strength")
    name: str  # column header in the file
    unit: str | None = None  # [input.units] string when it differs from the canonical unit
    label: str = ""  # text for the units row
    decimals: int = 2
    integer: bool = False  # written as an integer (flags, counts)
    scale: float | None = None  # [input.scale]: file value = canonical / scale
    replicate: int = 0  # 1, 2: replicate sensors of one variable (mean = observed)


@dataclass(frozen=True)
class _Stream:
    name: str | None  # None: a single [input] table
    file_tag: str  # part of the file name, also the match glob
    timestamp: tuple[str, ...]
    timestamp_format: str
    marks: str
    interval_minutes: int
    missing: object  # what a missing value is written as (-9999 or "NAN")
    units_row: bool
    columns: tuple[_Col, ...]
    flags: dict = field(default_factory=dict)  # var -> (column name, reject list)
    passthrough: dict = field(default_factory=dict)  # output name -> column name
    overlap_hours: float = 0.0
    midnight_as_24: bool = False


@dataclass(frozen=True)
class DemoSite:
    """One invented site of the demo network: identity, simulation and logger layout."""

    id: str
    name: str
    kind: str
    start: str
    days: int
    seed_offset: int
    weather: str  # sites sharing this share the weather seed
    streams: tuple[_Stream, ...]


_GRASS = DemoSite(
    id="demo-upland-grassland",
    name="Demo Upland Grassland (invented)",
    kind="grassland",
    start="2025-03-01",
    days=120,
    seed_offset=1,
    weather="alpine",
    streams=(
        _Stream(
            name=None, file_tag="export", timestamp=("datetime_end",),
            timestamp_format="%Y-%m-%d %H:%M:%S", marks="end", interval_minutes=30,
            missing=-9999, units_row=False, overlap_hours=2.0,
            columns=(
                _Col("le", "latent_heat", decimals=2), _Col("h", "sensible_heat", decimals=2),
                _Col("rn", "net_radiation", decimals=1), _Col("g", "soil_heat_flux", decimals=2),
                _Col("rg", "global_radiation", decimals=1),
                _Col("sw_out", "reflected_shortwave", decimals=1),
                _Col("lw_in", "longwave_down", decimals=1),
                _Col("lw_out", "longwave_up", decimals=1),
                _Col("ta", "air_temperature", decimals=3), _Col("rh", "relative_humidity", decimals=2),
                _Col("p_air", "air_pressure", decimals=3), _Col("wind", "wind_speed", decimals=3),
                _Col("wind_dir", "wind_direction", decimals=1),
                _Col("ustar", "friction_velocity", decimals=4),
                _Col("precip", "rainfall", decimals=2),
                _Col("swc", "soil_water", unit="percent", decimals=2),
                _Col("t_soil", "soil_temperature", decimals=3), _Col("fc", "co2_flux", decimals=3),
                _Col("le_upstream_flag", "le_quality", integer=True),
                _Col("signal_strength", "h2o_signal_pct", decimals=1),
            ),
            flags={"le": ("le_quality", [2])},
            passthrough={"analyser_signal": "h2o_signal_pct"},
        ),
    ),
)

_FOREST = DemoSite(
    id="demo-ridge-forest",
    name="Demo Ridge Conifer Forest (invented)",
    kind="conifer-forest",
    start="2025-03-01",
    days=120,
    seed_offset=2,
    weather="alpine",
    streams=(
        _Stream(
            name="flux", file_tag="flux", timestamp=("Date", "Time"),
            timestamp_format="%d.%m.%Y %H:%M", marks="end", interval_minutes=30,
            missing="NAN", units_row=True, midnight_as_24=True,
            columns=(
                _Col("le", "LatentHeatFlux", label="W/m2", decimals=2),
                _Col("h", "SensibleHeatFlux", label="W/m2", decimals=2),
                _Col("ustar", "FrictionVelocity", label="m/s", decimals=4),
                _Col("wind", "WindSpeedSonic", label="m/s", decimals=3),
                _Col("wind_dir", "WindDirSonic", label="deg", decimals=1),
                _Col("fc", "CO2Flux", label="umol/m2/s", decimals=3),
                _Col("le_upstream_flag", "QualityLE", label="0-2", integer=True),
                _Col("signal_strength", "SignalStrength", label="%", decimals=1),
            ),
            flags={"le": ("QualityLE", [2])},
            passthrough={"signal_strength": "SignalStrength"},
        ),
        _Stream(
            name="met", file_tag="met", timestamp=("Year", "DOY", "HHMM"),
            timestamp_format="%Y %j %H%M", marks="start", interval_minutes=10,
            missing=-9999, units_row=True,
            columns=(
                _Col("ta", "AirTemp", unit="K", label="K", decimals=3),
                _Col("rh", "RelHum", unit="fraction", label="frac", decimals=4),
                _Col("p_air", "Baro", unit="hPa", label="hPa", decimals=2),
                _Col("rg", "SWin", label="W/m2", decimals=1),
                _Col("sw_out", "SWout", label="W/m2", decimals=1),
                _Col("lw_in", "LWin", label="W/m2", decimals=1),
                _Col("lw_out", "LWout", label="W/m2", decimals=1),
                _Col("rn", "Rnet", label="W/m2", decimals=1),
                _Col("g", "SoilHeatPlateA", label="W/m2", decimals=2, replicate=1),
                _Col("g", "SoilHeatPlateB", label="W/m2", decimals=2, replicate=2),
                _Col("precip", "Rain", label="mm", decimals=2),
                _Col("swc", "SoilMoist", label="m3/m3", decimals=4),
                _Col("t_soil", "SoilTemp", label="C", decimals=3),
            ),
        ),
    ),
)

_CROP = DemoSite(
    id="demo-valley-crop",
    name="Demo Irrigated Valley Crop (invented)",
    kind="irrigated-crop",
    start="2025-04-20",
    days=150,
    seed_offset=3,
    weather="valley",
    streams=(
        _Stream(
            name=None, file_tag="hourly", timestamp=("time_start",),
            timestamp_format="%d/%m/%Y %H:%M", marks="start", interval_minutes=60,
            missing="NAN", units_row=False,
            columns=(
                _Col("le", "le_wm2", decimals=2), _Col("h", "h_wm2", decimals=2),
                _Col("rn", "rn_wm2", decimals=1), _Col("g", "g_plate_wm2", decimals=2),
                _Col("rg", "rg_wm2", decimals=1), _Col("ta", "t_air", decimals=3),
                _Col("vpd", "vpd_hpa", unit="hPa", decimals=3),
                _Col("p_air", "press_pa", unit="Pa", decimals=0),
                _Col("wind", "u_mean", decimals=3), _Col("wind_dir", "u_dir", decimals=1),
                _Col("ustar", "u_star", decimals=4),
                _Col("precip", "rain_tips", scale=0.2, integer=True),
                _Col("swc", "theta_pct", unit="percent", decimals=2),
                _Col("t_soil", "t_soil_5cm", decimals=3), _Col("fc", "fco2", decimals=3),
                _Col("le_upstream_flag", "le_flag", integer=True),
                _Col("signal_strength", "irga_signal", decimals=1),
            ),
            flags={"le": ("le_flag", [2])},
            passthrough={"analyser_signal": "irga_signal"},
        ),
    ),
)

#: The three invented sites of the demo network.
DEMO_SITES: tuple[DemoSite, ...] = (_GRASS, _FOREST, _CROP)

# canonical -> file unit: file = canonical / factor - offset / factor  (inverse of the
# conversion canonical = file * factor + offset; SI brochure 2019 definitions)
_TO_FILE = {
    "K": (1.0, -273.15),
    "hPa": (0.1, 0.0),
    "Pa": (1.0e-3, 0.0),
    "fraction": (100.0, 0.0),
    "percent": (0.01, 0.0),  # swc: 1 % = 0.01 m3 m-3
}

# within-interval variation of the 10-min met logger (zero mean over each interval)
_SUB_SD = {"ta": 0.15, "rh": 1.0, "p_air": 0.004, "rg": 0.06, "sw_out": 0.06, "lw_in": 1.5,
           "lw_out": 1.0, "rn": 0.05, "g": 1.0, "swc": 0.0, "t_soil": 0.02}
_MULTIPLICATIVE = {"rg", "sw_out", "rn"}


def simulate_demo_network(*, days: int | None = None, seed: int = 0) -> dict[str, SimulatedSite]:
    """Simulate the three invented demo sites (no files written).

    Parameters
    ----------
    days : int, optional
        Record length for every site [days]; default each site's own (120 days for the
        grassland and the forest from 1 March, 150 days for the crop from 20 April).
    seed : int, optional
        Network seed; the grassland and forest share their weather.

    Returns
    -------
    dict
        Site id -> :class:`~towerflow.demo.simulate.SimulatedSite`.
    """
    weather_seeds = {"alpine": seed * 1000 + 101, "valley": seed * 1000 + 202}
    out = {}
    for s in DEMO_SITES:
        out[s.id] = simulate_site(
            s.kind, start=s.start, days=days or s.days, seed=seed * 1000 + s.seed_offset,
            weather_seed=weather_seeds[s.weather],
        )
    return out


# ---------------------------------------------------------------------------------------
# CSV
# ---------------------------------------------------------------------------------------


def _file_values(col: _Col, x: np.ndarray) -> np.ndarray:
    """Canonical values -> the values written in the file (unit, scale)."""
    if col.unit in _TO_FILE:
        factor, offset = _TO_FILE[col.unit]
        x = (x - offset) / factor
    if col.scale is not None:
        x = x / col.scale
    return x


def _expand_subintervals(obs: pd.DataFrame, cols, sub: int, rng) -> pd.DataFrame:
    """Split each interval into ``sub`` shorter ones whose mean (sum for precip) is exact."""
    idx = obs.index
    step = (idx[1] - idx[0]) / sub if len(idx) > 1 else pd.Timedelta(minutes=10)
    offsets = pd.to_timedelta(np.arange(sub) * step.value, unit="ns").to_numpy()
    starts = (idx.values[:, None] + offsets[None, :]).ravel()
    new_index = pd.DatetimeIndex(starts).tz_localize("UTC").tz_convert(idx.tz)
    out = {}
    for var in dict.fromkeys(c.source for c in cols):
        x = obs[var].to_numpy()
        if var == "precip":
            w = rng.dirichlet(np.ones(sub), len(x))
            v = x[:, None] * w
        else:
            z = rng.standard_normal((len(x), sub))
            z -= z.mean(axis=1, keepdims=True)
            sd = _SUB_SD.get(var, 0.0)
            v = x[:, None] * (1.0 + sd * z) if var in _MULTIPLICATIVE else x[:, None] + sd * z
        out[var] = v.ravel()
    return pd.DataFrame(out, index=new_index.rename("timestamp_start"))


_DIRECTIVE = re.compile(r"%[YmdjHMS]")
_WIDTH = {"%Y": 4, "%m": 2, "%d": 2, "%j": 3, "%H": 2, "%M": 2, "%S": 2}


def _format_stamps(stamps: pd.DatetimeIndex, fmt: str) -> np.ndarray:
    """Vectorised strftime for the directives %Y %m %d %j %H %M %S (zero-padded)."""
    parts = {"%Y": stamps.year, "%m": stamps.month, "%d": stamps.day, "%j": stamps.dayofyear,
             "%H": stamps.hour, "%M": stamps.minute, "%S": stamps.second}
    out = np.full(len(stamps), "", dtype=object)
    pos = 0
    for m in _DIRECTIVE.finditer(fmt):
        out = out + fmt[pos:m.start()]
        values = np.asarray(parts[m.group()], dtype=int)
        width = _WIDTH[m.group()]
        table = np.array([str(i).zfill(width) for i in range(int(values.max()) + 1)], dtype=object)
        out = out + table[values]
        pos = m.end()
    if "%" in fmt[pos:]:
        raise ValueError(f"unsupported directive in {fmt!r}")
    return out + fmt[pos:]


def _stamp_columns(stream: _Stream, starts: pd.DatetimeIndex) -> dict[str, np.ndarray]:
    """Timestamp text columns of the stream's layout (local logger clock, naive)."""
    interval = pd.Timedelta(minutes=stream.interval_minutes)
    stamps = starts + interval if stream.marks == "end" else starts
    stamps = stamps.tz_localize(None)
    cols = stream.timestamp
    if len(cols) == 1:
        return {cols[0]: _format_stamps(stamps, stream.timestamp_format)}
    if cols == ("Date", "Time"):
        dates = stamps
        times = _format_stamps(stamps, "%H:%M")
        if stream.midnight_as_24:
            midnight = np.asarray((stamps.hour == 0) & (stamps.minute == 0))
            dates = stamps - pd.to_timedelta(midnight.astype(int), unit="D")
            times[midnight] = "24:00"
        return {"Date": _format_stamps(dates, "%d.%m.%Y"), "Time": times}
    if cols == ("Year", "DOY", "HHMM"):
        return {"Year": _format_stamps(stamps, "%Y"), "DOY": _format_stamps(stamps, "%j"),
                "HHMM": _format_stamps(stamps, "%H%M")}
    raise ValueError(f"no writer for timestamp columns {cols}")


def _stream_table(stream: _Stream, obs: pd.DataFrame, rng) -> pd.DataFrame:
    """The stream's whole record as a table of file values (timestamps as text)."""
    site_interval = obs.index[1] - obs.index[0]
    sub = int(site_interval / pd.Timedelta(minutes=stream.interval_minutes))
    data = _expand_subintervals(obs, stream.columns, sub, rng) if sub > 1 else obs
    table: dict[str, object] = {}
    values = {}
    for col in stream.columns:
        x = data[col.source].to_numpy(dtype=float).copy()
        if col.replicate:
            # replicate plates differ by a zero-sum term: their mean is the observed value
            key = ("replicate", col.source)
            if key not in values:
                values[key] = 0.08 * np.abs(x) * rng.standard_normal(x.size) + rng.normal(0, 1.0, x.size)
            x = x + (1 if col.replicate == 1 else -1) * values[key]
        x = _file_values(col, x)
        if col.integer or col.decimals == 0:
            table[col.name] = pd.array(np.round(x), dtype="Int64")
        else:
            table[col.name] = np.round(x, col.decimals)
    df = pd.DataFrame(table, index=data.index)
    # a logger that is down writes no rows
    sources = [c.source for c in stream.columns if c.source in obs.columns and c.source not in (
        "le_upstream_flag", "signal_strength")]
    alive = data[list(dict.fromkeys(sources))].notna().any(axis=1).to_numpy()
    df = df.loc[alive]
    stamps = _stamp_columns(stream, df.index)
    front = pd.DataFrame(stamps, index=df.index)
    return pd.concat([front, df], axis=1)


def _write_csv(path: Path, stream: _Stream, part: pd.DataFrame) -> None:
    na = str(stream.missing)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        fh.write(",".join(part.columns) + "\n")
        if stream.units_row:
            labels = {c.name: (c.label or "-") for c in stream.columns}
            fh.write(",".join(labels.get(c, "-") for c in part.columns) + "\n")
        part.reset_index(drop=True).to_csv(fh, header=False, index=False, na_rep=na,
                                           lineterminator="\n")


def _write_weekly(site: DemoSite, stream: _Stream, table: pd.DataFrame, folder: Path) -> list[Path]:
    """Split a stream's table into weekly exports (weeks from Monday 00:00 local)."""
    idx = table.index
    local = idx.tz_localize(None)
    monday = (local.normalize() - pd.to_timedelta(local.dayofweek, unit="D"))
    weeks = np.unique(monday.values)
    overlap = pd.Timedelta(hours=stream.overlap_hours)
    paths = []
    for w in weeks:
        w = pd.Timestamp(w)
        sel = (local >= w - overlap) & (local < w + pd.Timedelta(days=7))
        part = table.loc[sel]
        if part.empty:
            continue
        path = folder / f"{site.id}_{stream.file_tag}_{w:%Y%m%d}.csv"
        _write_csv(path, stream, part)
        paths.append(path)
    return paths


# ---------------------------------------------------------------------------------------
# TOML
# ---------------------------------------------------------------------------------------


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        v = float(v)
        if not math.isfinite(v):
            raise ValueError("TOML value must be finite")
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def _local(ts: pd.Timestamp) -> str:
    return ts.strftime("%Y-%m-%d %H:%M")


def _site_toml(site: DemoSite, sim: SimulatedSite) -> str:
    s = sim.meta["site"]
    lines = [
        f"# {site.name}: site configuration of the towerflow demo network.",
        "# INVENTED: this site, its place and coordinates, and all its data are made up.",
        "",
        "[site]",
        f"id = {_toml_value(site.id)}",
        f"name = {_toml_value(site.name)}",
        f"latitude = {_toml_value(s['latitude'])}          # invented place",
        f"longitude = {_toml_value(s['longitude'])}         # invented place",
        f"elevation_m = {_toml_value(s['elevation_m'])}",
        f"utc_offset_hours = {_toml_value(s['utc_offset_hours'])}",
        f"canopy_height_m = {_toml_value(s['canopy_height_m'])}",
        f"measurement_height_m = {_toml_value(s['measurement_height_m'])}",
        f"irga = {_toml_value(s['irga'])}",
        f"interval_minutes = {_toml_value(s['interval_minutes'])}",
        "",
    ]
    many = len(site.streams) > 1
    for stream in site.streams:
        head = "[[input]]" if many else "[input]"
        sec = "input"
        lines.append(head)
        if stream.name:
            lines.append(f"name = {_toml_value(stream.name)}")
        lines.append(f"match = {_toml_value(f'*_{stream.file_tag}_*.csv')}")
        ts = list(stream.timestamp)
        lines.append(f"timestamp_column = {_toml_value(ts[0] if len(ts) == 1 else ts)}")
        lines.append(f"timestamp_format = {_toml_value(stream.timestamp_format)}")
        lines.append(f"timestamp_marks = {_toml_value(stream.marks)}")
        lines.append(f"interval_minutes = {stream.interval_minutes}")
        lines.append(f"missing = {_toml_value([stream.missing])}")
        lines.append(f"skip_rows = {_toml_value([0] if stream.units_row else [])}")
        columns: dict[str, list[str]] = {}
        units: dict[str, str] = {}
        scale: dict[str, float] = {}
        for col in stream.columns:
            if col.source in ("le_upstream_flag", "signal_strength"):
                continue
            columns.setdefault(col.source, []).append(col.name)
            if col.unit:
                units[col.source] = col.unit
            if col.scale is not None:
                scale[col.source] = col.scale
        lines.append("")
        lines.append(f"[{sec}.columns]")
        for var, names in columns.items():
            lines.append(f"{var} = {_toml_value(names[0] if len(names) == 1 else names)}")
        if units:
            lines += ["", f"[{sec}.units]"] + [f"{v} = {_toml_value(u)}" for v, u in units.items()]
        if scale:
            lines += ["", f"[{sec}.scale]"] + [
                f"{v} = {_toml_value(x)}    # tipping bucket: {x:g} mm per tip"
                for v, x in scale.items()]
        if stream.flags:
            lines += ["", f"[{sec}.flags]"] + [
                f"{v} = {_toml_value({'column': c, 'reject': r})}"
                for v, (c, r) in stream.flags.items()]
        if stream.passthrough:
            lines += ["", f"[{sec}.passthrough]"] + [
                f"{o} = {_toml_value(c)}" for o, c in stream.passthrough.items()]
        lines.append("")
    for entry in sim.meta["history"]:
        lines.append("[[history]]")
        lines.append(f"start = {_toml_value(_local(entry['start']))}")
        lines.append(f"end = {_toml_value(_local(entry['end']))}")
        for key in ("canopy_height_m", "irrigation", "exclude", "correct"):
            if key in entry:
                lines.append(f"{key} = {_toml_value(entry[key])}")
        if entry.get("reason"):
            lines.append(f"reason = {_toml_value(entry['reason'])}")
        lines.append("")
    lines += ["[qc]", 'rules = "standard"', "", "[conductance]", 'aerodynamic = "ustar"', ""]
    return "\n".join(lines)


def _network_toml(sites) -> str:
    lines = [
        "# The towerflow demo network.",
        "# INVENTED: the network, its sites, places and data are all made up.",
        "",
        "[network]",
        f"name = {_toml_value(NETWORK_NAME)}",
        'rules = "standard"',
        "",
    ]
    for site in sites:
        lines += ["[[network.sites]]", f"config = {_toml_value(f'sites/{site.id}.toml')}",
                  f"data = {_toml_value(f'raw/{site.id}/*.csv')}", ""]
    return "\n".join(lines)


def _meta_json(sim: SimulatedSite) -> dict:
    m = sim.meta

    def ts(x):
        return None if x is None else pd.Timestamp(x).isoformat()

    return {
        "invented": True,
        "kind": sim.kind,
        "site": m["site"],
        "seed": m["seed"],
        "weather_seed": m["weather_seed"],
        "closure_fraction": m["closure_fraction"],
        "noise": m["noise"],
        "spikes": {v: [ts(t) for t in idx] for v, idx in m["spikes"].items()},
        "upstream_rejects": [ts(t) for t in m["upstream_rejects"]],
        "gaps": [dict(g, start=ts(g["start"]), end=ts(g["end"])) for g in m["gaps"]],
        "history": [dict(h, start=ts(h["start"]), end=ts(h["end"])) for h in m["history"]],
        "irrigation_events": [dict(e, start=ts(e["start"]), end=ts(e["end"]))
                              for e in m["irrigation_events"]],
        "cold_spell": [ts(t) for t in m["cold_spell"]],
        "snow_period": None if m["snow_period"] is None else [ts(t) for t in m["snow_period"]],
    }


def write_demo_network(out_dir, *, days: int | None = None, seed: int = 0,
                       write_truth: bool = True) -> Path:
    """Write the invented demo network: raw weekly exports, site TOMLs, the network TOML.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder to write into (created; existing demo files are overwritten).
    days : int, optional
        Record length of every site [days]; default each site's own (120, 120, 150).
    seed : int, optional
        Network seed (same seed, same files).
    write_truth : bool, optional
        Also write ``truth/<site-id>.parquet`` and ``truth/<site-id>.json``.

    Returns
    -------
    pathlib.Path
        The network TOML file.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    (out / "sites").mkdir(exist_ok=True)
    sims = simulate_demo_network(days=days, seed=seed)
    (out / "README.txt").write_text(README_TEXT, encoding="utf-8")
    for k, site in enumerate(DEMO_SITES):
        sim = sims[site.id]
        raw = out / "raw" / site.id
        raw.mkdir(parents=True, exist_ok=True)
        for old in raw.glob("*.csv"):
            old.unlink()
        rng = np.random.default_rng([seed, 4243, k])
        for stream in site.streams:
            table = _stream_table(stream, sim.observed, rng)
            _write_weekly(site, stream, table, raw)
        (out / "sites" / f"{site.id}.toml").write_text(_site_toml(site, sim), encoding="utf-8")
        if write_truth:
            (out / "truth").mkdir(exist_ok=True)
            sim.truth.to_parquet(out / "truth" / f"{site.id}.parquet")
            (out / "truth" / f"{site.id}.json").write_text(
                json.dumps(_meta_json(sim), indent=1), encoding="utf-8")
    path = out / "network.toml"
    path.write_text(_network_toml(DEMO_SITES), encoding="utf-8")
    return path

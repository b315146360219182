"""Site and network configuration (CONTRACT §2): dataclasses and the validating loader.

The dataclasses below are the shapes every stage relies on. ``load_site_config`` reads a
site TOML with :mod:`tomllib`, validates it up front and raises :class:`ConfigError`
with a one-line message naming the file and key at fault.
"""
from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from .errors import ConfigError  # noqa: F401  (re-exported for callers)

#: CONTRACT §1 canonical variables and their canonical units.
CANONICAL_UNITS: dict[str, str] = {
    "le": "W m-2",
    "h": "W m-2",
    "rn": "W m-2",
    "g": "W m-2",
    "rg": "W m-2",
    "sw_out": "W m-2",
    "lw_in": "W m-2",
    "lw_out": "W m-2",
    "ta": "degC",
    "rh": "%",
    "vpd": "kPa",
    "p_air": "kPa",
    "wind": "m s-1",
    "wind_dir": "degree",
    "ustar": "m s-1",
    "precip": "mm",
    "swc": "m3 m-3",
    "t_soil": "degC",
    "s_canopy": "W m-2",
    "fc": "umol m-2 s-1",
}
CANONICAL_VARIABLES: tuple[str, ...] = tuple(CANONICAL_UNITS)
REQUIRED_VARIABLES: tuple[str, ...] = ("le", "h", "rn", "ta", "wind", "ustar")
#: at least one of these must be mapped
HUMIDITY_VARIABLES: tuple[str, ...] = ("rh", "vpd")
#: site parameters that a [[history]] entry may change over time
TIME_VARYING_SITE_KEYS: tuple[str, ...] = ("canopy_height_m", "measurement_height_m", "irga")


@dataclass(frozen=True)
class SiteInfo:
    """The ``[site]`` table. Heights and irga here are the defaults outside history periods."""

    id: str
    name: str
    latitude: float
    longitude: float
    elevation_m: float
    utc_offset_hours: float
    canopy_height_m: float
    measurement_height_m: float
    irga: str = "closed-path"  # "open-path" | "closed-path"
    interval_minutes: int | None = None  # None: take the input's
    #: optional extension: depth of the heat-flux plates, m (soil storage above the plates)
    plate_depth_m: float | None = None

    @property
    def tz(self) -> _dt.timezone:
        """The site's fixed-offset time zone (local standard time, never DST)."""
        return _dt.timezone(_dt.timedelta(hours=self.utc_offset_hours))

    @property
    def interval(self) -> pd.Timedelta:
        if self.interval_minutes is None:
            raise ValueError("interval_minutes not resolved yet")
        return pd.Timedelta(minutes=self.interval_minutes)


@dataclass(frozen=True)
class FlagColumn:
    """An upstream quality/diagnostic column: values in ``reject`` reject the variable."""

    column: str
    reject: tuple = ()


@dataclass(frozen=True)
class StreamConfig:
    """One ``[input]`` / ``[[input]]`` table: one logger stream."""

    name: str  # "main" for a single [input]; "input-1", "input-2", ... or its `name` key
    match: str | None
    timestamp_column: tuple[str, ...]
    timestamp_format: str
    timestamp_marks: str  # "start" | "end"
    interval_minutes: int | None
    missing: tuple = ()
    skip_rows: tuple[int, ...] = ()
    columns: dict[str, tuple[str, ...]] = field(default_factory=dict)  # canonical -> source columns
    units: dict[str, str] = field(default_factory=dict)  # canonical -> unit string in the file
    scale: dict[str, float] = field(default_factory=dict)
    offset: dict[str, float] = field(default_factory=dict)
    flags: dict[str, FlagColumn] = field(default_factory=dict)
    passthrough: dict[str, str] = field(default_factory=dict)  # output name -> source column
    delimiter: str | None = None  # extension: None = detect
    decimal: str = "."  # extension
    encoding: str = "utf-8"  # extension

    def source_columns(self) -> list[str]:
        """Every source column this stream reads besides the timestamp."""
        cols: list[str] = []
        for names in self.columns.values():
            cols.extend(names)
        cols.extend(f.column for f in self.flags.values())
        cols.extend(self.passthrough.values())
        return list(dict.fromkeys(cols))


@dataclass(frozen=True)
class HistoryEntry:
    """One ``[[history]]`` entry; applies to intervals whose start lies in [start, end)."""

    index: int  # 0-based position in the file, for provenance ("history[3]")
    start: pd.Timestamp  # tz-aware, site tz
    end: pd.Timestamp
    reason: str = ""
    parameters: dict = field(default_factory=dict)  # e.g. {"canopy_height_m": 1.8, "irga": "open-path"}
    correct: dict = field(default_factory=dict)  # var -> {"scale": s, "offset": o, "shift_minutes": m}
    exclude: tuple[str, ...] = ()
    irrigation: bool = False  # extension: the canopy was wetted by irrigation in this period


@dataclass(frozen=True)
class SiteConfig:
    path: Path
    sha256: str  # sha256 of the TOML file's bytes
    site: SiteInfo
    inputs: tuple[StreamConfig, ...]
    history: tuple[HistoryEntry, ...] = ()
    qc: dict = field(default_factory=lambda: {"rules": "standard"})
    conductance: dict = field(default_factory=lambda: {"aerodynamic": "ustar"})
    raw: dict = field(default_factory=dict)  # the parsed TOML, for extensions


@dataclass(frozen=True)
class NetworkSite:
    config: Path  # resolved against the network file's folder
    data: str  # glob, resolved against the network file's folder


@dataclass(frozen=True)
class NetworkConfig:
    path: Path
    name: str
    rules: str
    sites: tuple[NetworkSite, ...]
    raw: dict = field(default_factory=dict)

"""Site and network configuration (CONTRACT §2): dataclasses and the validating loader.

The dataclasses below are the shapes every stage relies on. ``load_site_config`` reads a
site TOML with :mod:`tomllib`, validates it up front and raises :class:`ConfigError`
with a one-line message naming the file and key at fault.
"""
from __future__ import annotations

import datetime as _dt
import os
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
    #: extension ``[gapfill] neighbours = ["site-id", ...]``: nearby sites whose accepted
    #: meteorology (from their latest outputs in the same DIR) fills this site's driver gaps
    gapfill: dict = field(default_factory=dict)
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


# ---------------------------------------------------------------------------------------
# The loader
# ---------------------------------------------------------------------------------------
#
# Optional extension keys this loader accepts beyond CONTRACT §2 (all optional):
#
# [site]      plate_depth_m        depth of the heat-flux plates, m (> 0)
# [input]     name                 the stream's name ([A-Za-z0-9_-]+; it names the stream's
#                                  file in the site store); default "main" for a single
#                                  [input], "input-1", "input-2", ... for [[input]] tables
#             delimiter            one character; default: detected by ingest
#             decimal              "." (default) or ","
#             encoding             a Python codec name, default "utf-8"
# [[history]] irrigation = true    the canopy was wetted by irrigation in this period
# [qc]        override             a table of rule keys (see pipeline/rules.py)
# [conductance] kb_inverse         kB^-1 (dimensionless, >= 0) for the log-profile
#                                  aerodynamic conductance
#
# Every other key is refused as a probable typo.

import codecs as _codecs
from dataclasses import replace as _replace
import hashlib as _hashlib
import math as _math
import re as _re
import tomllib as _tomllib

SITE_ID_PATTERN = r"[a-z0-9-]+"
STREAM_NAME_PATTERN = r"[A-Za-z0-9_-]+"
#: stream intervals: whole minutes that divide an hour (shorter streams are aggregated)
STREAM_INTERVALS: tuple[int, ...] = (1, 2, 3, 4, 5, 6, 10, 12, 15, 20, 30, 60)
SITE_INTERVALS: tuple[int, ...] = (30, 60)
IRGA_TYPES: tuple[str, ...] = ("open-path", "closed-path")
TIMESTAMP_MARKS: tuple[str, ...] = ("start", "end")
AERODYNAMIC_METHODS: tuple[str, ...] = ("ustar", "log-profile")

_TOP_KEYS = ("site", "input", "history", "qc", "conductance", "gapfill")
_SITE_KEYS = {
    # key: required
    "id": True, "name": False, "latitude": True, "longitude": True, "elevation_m": True,
    "utc_offset_hours": True, "canopy_height_m": True, "measurement_height_m": True,
    "irga": False, "interval_minutes": False, "plate_depth_m": False,
}
_INPUT_KEYS = (
    "name", "match", "timestamp_column", "timestamp_format", "timestamp_marks",
    "interval_minutes", "missing", "skip_rows", "columns", "units", "scale", "offset",
    "flags", "passthrough", "delimiter", "decimal", "encoding",
)
_HISTORY_KEYS = ("start", "end", "reason", "correct", "exclude", "irrigation", *TIME_VARYING_SITE_KEYS)
_CORRECT_KEYS = ("scale", "offset", "shift_minutes")
_QC_KEYS = ("rules", "override")
_CONDUCTANCE_KEYS = ("aerodynamic", "kb_inverse")
_GAPFILL_KEYS = ("neighbours",)
_NETWORK_KEYS = ("name", "rules", "sites")
_NETWORK_SITE_KEYS = ("config", "data")


def _err(file, key, message):
    return ConfigError(message, file=file, key=key)


def _read_toml_file(path: Path) -> tuple[dict, str]:
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError("configuration file not found", file=path) from None
    except IsADirectoryError:
        raise ConfigError("is a folder, not a configuration file", file=path) from None
    except OSError as exc:
        raise ConfigError(f"cannot read the file ({exc.strerror})", file=path) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"not UTF-8 text (byte {exc.start})", file=path) from None
    try:
        parsed = _tomllib.loads(text)
    except _tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", file=path) from None
    return parsed, _hashlib.sha256(data).hexdigest()


def _unknown_keys(table: dict, allowed, *, file, prefix: str) -> None:
    for key in table:
        if key not in allowed:
            raise _err(file, f"{prefix}{key}",
                       f"unknown key (expected one of: {', '.join(allowed)})")


def _table(value, *, file, key) -> dict:
    if not isinstance(value, dict):
        raise _err(file, key, f"must be a table, got {type(value).__name__} {value!r}")
    return value


def _string(value, *, file, key, allow_empty=False) -> str:
    if not isinstance(value, str):
        raise _err(file, key, f"must be a string, got {type(value).__name__} {value!r}")
    if not allow_empty and not value.strip():
        raise _err(file, key, "must not be empty")
    return value


def _number(value, *, file, key, lo=None, hi=None, lo_open=False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _err(file, key, f"must be a number, got {type(value).__name__} {value!r}")
    value = float(value)
    if not _math.isfinite(value):
        raise _err(file, key, f"must be a finite number, got {value!r}")
    if lo is not None and (value < lo or (lo_open and value == lo)):
        bound = f"above {lo:g}" if lo_open else f"at least {lo:g}"
        raise _err(file, key, f"must be {bound}" + (f" and at most {hi:g}" if hi is not None else "")
                   + f", got {value:g}")
    if hi is not None and value > hi:
        raise _err(file, key, f"must be at most {hi:g}" + (f" and at least {lo:g}" if lo is not None else "")
                   + f", got {value:g}")
    return value


def _integer(value, *, file, key) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        if isinstance(value, float) and value.is_integer():
            return int(value)
        raise _err(file, key, f"must be a whole number, got {value!r}")
    return value


def _choice(value, choices, *, file, key) -> str:
    if value not in choices:
        raise _err(file, key, f"must be one of {', '.join(repr(c) for c in choices)}, got {value!r}")
    return value


def _names(value, *, file, key) -> tuple[str, ...]:
    """A column name or a list of column names → tuple."""
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value:
        raise _err(file, key, f"must be a column name or a non-empty list of column names, got {value!r}")
    out = []
    for i, name in enumerate(value):
        if not isinstance(name, str) or not name:
            raise _err(file, f"{key}[{i}]", f"must be a non-empty column name, got {name!r}")
        out.append(name)
    if len(set(out)) != len(out):
        raise _err(file, key, f"lists a column twice: {out!r}")
    return tuple(out)


def _canonical(var, *, file, key) -> str:
    if var not in CANONICAL_UNITS:
        raise _err(file, key,
                   f"unknown canonical variable {var!r} (known: {', '.join(CANONICAL_VARIABLES)})")
    return var


def _check_timestamp_format(fmt: str, *, file, key) -> None:
    if "%" not in fmt:
        raise _err(file, key, f"must be a strptime format such as \"%Y-%m-%d %H:%M\", got {fmt!r}")
    sample = _dt.datetime(2025, 11, 23, 13, 45, 7)
    try:
        text = sample.strftime(fmt)
        _dt.datetime.strptime(text, fmt)
    except (ValueError, TypeError) as exc:
        raise _err(file, key, f"is not a usable strptime format ({exc})") from None


def _parse_site(raw, *, file) -> SiteInfo:
    site = _table(raw, file=file, key="site")
    _unknown_keys(site, tuple(_SITE_KEYS), file=file, prefix="site.")
    for key, required in _SITE_KEYS.items():
        if required and key not in site:
            raise _err(file, f"site.{key}", "required key is missing")
    sid = _string(site["id"], file=file, key="site.id")
    if not _re.fullmatch(SITE_ID_PATTERN, sid):
        raise _err(file, "site.id",
                   f"must consist of lower-case letters, digits and '-' only (it names the output folder), got {sid!r}")
    name = _string(site.get("name", sid), file=file, key="site.name")
    lat = _number(site["latitude"], file=file, key="site.latitude", lo=-90, hi=90)
    lon = _number(site["longitude"], file=file, key="site.longitude", lo=-180, hi=180)
    elev = _number(site["elevation_m"], file=file, key="site.elevation_m", lo=-500, hi=9000)
    offset = _number(site["utc_offset_hours"], file=file, key="site.utc_offset_hours", lo=-12, hi=14)
    if abs(offset * 60 - round(offset * 60)) > 1e-9:
        raise _err(file, "site.utc_offset_hours", f"must be a whole number of minutes, got {offset!r}")
    canopy = _number(site["canopy_height_m"], file=file, key="site.canopy_height_m", lo=0, hi=150)
    zm = _number(site["measurement_height_m"], file=file, key="site.measurement_height_m",
                 lo=0, hi=500, lo_open=True)
    if zm <= canopy:
        raise _err(file, "site.measurement_height_m",
                   f"must be above the canopy height ({canopy:g} m), got {zm:g} m")
    irga = _choice(site.get("irga", "closed-path"), IRGA_TYPES, file=file, key="site.irga")
    interval = None
    if "interval_minutes" in site:
        interval = _integer(site["interval_minutes"], file=file, key="site.interval_minutes")
        _choice(interval, SITE_INTERVALS, file=file, key="site.interval_minutes")
    plate = None
    if "plate_depth_m" in site:
        plate = _number(site["plate_depth_m"], file=file, key="site.plate_depth_m", lo=0, hi=2, lo_open=True)
    return SiteInfo(id=sid, name=name, latitude=lat, longitude=lon, elevation_m=elev,
                    utc_offset_hours=offset, canopy_height_m=canopy, measurement_height_m=zm,
                    irga=irga, interval_minutes=interval, plate_depth_m=plate)


def _parse_stream(raw, *, file, prefix: str, default_name: str) -> StreamConfig:
    tbl = _table(raw, file=file, key=prefix)
    _unknown_keys(tbl, _INPUT_KEYS, file=file, prefix=f"{prefix}.")
    name = _string(tbl.get("name", default_name), file=file, key=f"{prefix}.name")
    if not _re.fullmatch(STREAM_NAME_PATTERN, name):
        raise _err(file, f"{prefix}.name", f"must consist of letters, digits, '_' and '-' only, got {name!r}")
    match = None
    if "match" in tbl:
        match = _string(tbl["match"], file=file, key=f"{prefix}.match")
    for key in ("timestamp_column", "timestamp_format", "timestamp_marks", "columns"):
        if key not in tbl:
            raise _err(file, f"{prefix}.{key}", "required key is missing")
    ts_cols = _names(tbl["timestamp_column"], file=file, key=f"{prefix}.timestamp_column")
    fmt = _string(tbl["timestamp_format"], file=file, key=f"{prefix}.timestamp_format")
    _check_timestamp_format(fmt, file=file, key=f"{prefix}.timestamp_format")
    marks = _choice(tbl["timestamp_marks"], TIMESTAMP_MARKS, file=file, key=f"{prefix}.timestamp_marks")
    interval = None
    if "interval_minutes" in tbl:
        interval = _integer(tbl["interval_minutes"], file=file, key=f"{prefix}.interval_minutes")
        _choice(interval, STREAM_INTERVALS, file=file, key=f"{prefix}.interval_minutes")

    missing = tbl.get("missing", [])
    if not isinstance(missing, list):
        missing = [missing]
    for i, m in enumerate(missing):
        if isinstance(m, bool) or not isinstance(m, (int, float, str)):
            raise _err(file, f"{prefix}.missing[{i}]", f"must be a number or a string, got {m!r}")
    skip = tbl.get("skip_rows", [])
    if not isinstance(skip, list):
        raise _err(file, f"{prefix}.skip_rows", f"must be a list of row numbers, got {skip!r}")
    skip_rows = []
    for i, r in enumerate(skip):
        if isinstance(r, bool) or not isinstance(r, int) or r < 0:
            raise _err(file, f"{prefix}.skip_rows[{i}]", f"must be a row number >= 0, got {r!r}")
        skip_rows.append(r)

    columns_tbl = _table(tbl["columns"], file=file, key=f"{prefix}.columns")
    if not columns_tbl:
        raise _err(file, f"{prefix}.columns", "maps no variable")
    columns: dict[str, tuple[str, ...]] = {}
    for var, value in columns_tbl.items():
        _canonical(var, file=file, key=f"{prefix}.columns.{var}")
        columns[var] = _names(value, file=file, key=f"{prefix}.columns.{var}")
    for var, names in columns.items():
        clash = set(names) & set(ts_cols)
        if clash:
            raise _err(file, f"{prefix}.columns.{var}", f"uses the timestamp column {sorted(clash)[0]!r}")

    def mapped(section: str, var: str) -> None:
        _canonical(var, file=file, key=f"{prefix}.{section}.{var}")
        if var not in columns:
            raise _err(file, f"{prefix}.{section}.{var}",
                       f"{var!r} is not mapped in {prefix}.columns of this stream")

    from . import units as _units  # units.py imports this module: import late

    units: dict[str, str] = {}
    for var, unit in _table(tbl.get("units", {}), file=file, key=f"{prefix}.units").items():
        mapped("units", var)
        key = f"{prefix}.units.{var}"
        _string(unit, file=file, key=key)
        _units.conversion(var, unit, key=key, file=file)  # ConfigError for an unknown unit string
        units[var] = _units.normalize_unit(unit)
    for var in columns:
        units.setdefault(var, CANONICAL_UNITS[var])

    scale: dict[str, float] = {}
    offset: dict[str, float] = {}
    for section, target in (("scale", scale), ("offset", offset)):
        for var, value in _table(tbl.get(section, {}), file=file, key=f"{prefix}.{section}").items():
            mapped(section, var)
            target[var] = _number(value, file=file, key=f"{prefix}.{section}.{var}")
            if section == "scale" and target[var] == 0:
                raise _err(file, f"{prefix}.scale.{var}", "must not be 0")

    flags: dict[str, FlagColumn] = {}
    for var, value in _table(tbl.get("flags", {}), file=file, key=f"{prefix}.flags").items():
        mapped("flags", var)
        key = f"{prefix}.flags.{var}"
        spec = _table(value, file=file, key=key)
        _unknown_keys(spec, ("column", "reject"), file=file, prefix=f"{key}.")
        if "column" not in spec:
            raise _err(file, f"{key}.column", "required key is missing")
        col = _string(spec["column"], file=file, key=f"{key}.column")
        reject = spec.get("reject", [])
        if not isinstance(reject, list) or not reject:
            raise _err(file, f"{key}.reject", f"must be a non-empty list of flag values, got {reject!r}")
        for i, r in enumerate(reject):
            if isinstance(r, bool) or not isinstance(r, (int, float)):
                raise _err(file, f"{key}.reject[{i}]", f"must be a number, got {r!r}")
        flags[var] = FlagColumn(column=col, reject=tuple(reject))

    passthrough: dict[str, str] = {}
    for out, col in _table(tbl.get("passthrough", {}), file=file, key=f"{prefix}.passthrough").items():
        key = f"{prefix}.passthrough.{out}"
        if not _re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", out):
            raise _err(file, key, "output name must start with a letter and hold letters, digits and '_' only")
        if out in CANONICAL_UNITS or out.endswith(("_flag", "_filled", "_sensor_count")):
            raise _err(file, key, "output name clashes with a canonical variable or a towerflow column")
        passthrough[out] = _string(col, file=file, key=key)

    delimiter = None
    if "delimiter" in tbl:
        delimiter = _string(tbl["delimiter"], file=file, key=f"{prefix}.delimiter", allow_empty=True)
        if len(delimiter) != 1 or delimiter in ('"', "\n", "\r"):
            raise _err(file, f"{prefix}.delimiter", f"must be one character, got {delimiter!r}")
    decimal = _choice(tbl.get("decimal", "."), (".", ","), file=file, key=f"{prefix}.decimal")
    if delimiter is not None and delimiter == decimal:
        raise _err(file, f"{prefix}.decimal", "must differ from the delimiter")
    encoding = _string(tbl.get("encoding", "utf-8"), file=file, key=f"{prefix}.encoding")
    try:
        _codecs.lookup(encoding)
    except LookupError:
        raise _err(file, f"{prefix}.encoding", f"unknown text encoding {encoding!r}") from None

    return StreamConfig(
        name=name, match=match, timestamp_column=ts_cols, timestamp_format=fmt,
        timestamp_marks=marks, interval_minutes=interval, missing=tuple(missing),
        skip_rows=tuple(skip_rows), columns=columns, units=units, scale=scale, offset=offset,
        flags=flags, passthrough=passthrough, delimiter=delimiter, decimal=decimal,
        encoding=encoding,
    )


def _parse_streams(raw, *, file, site: SiteInfo) -> tuple[StreamConfig, ...]:
    if isinstance(raw, dict):
        streams = [_parse_stream(raw, file=file, prefix="input", default_name="main")]
        prefixes = ["input"]
    elif isinstance(raw, list) and raw:
        prefixes = [f"input[{i}]" for i in range(len(raw))]
        streams = [_parse_stream(t, file=file, prefix=p, default_name=f"input-{i + 1}")
                   for i, (t, p) in enumerate(zip(raw, prefixes))]
    else:
        raise _err(file, "input", "must be an [input] table or a list of [[input]] tables")

    seen_names: dict[str, str] = {}
    owner: dict[str, str] = {}
    for s, p in zip(streams, prefixes):
        if s.name in seen_names:
            raise _err(file, f"{p}.name", f"stream name {s.name!r} is already used by {seen_names[s.name]}")
        seen_names[s.name] = p
        for var in s.columns:
            if var in owner:
                raise _err(file, f"{p}.columns.{var}",
                           f"{var!r} is already mapped in {owner[var]}; map each variable in one stream only")
            owner[var] = p
        if site.interval_minutes is not None and s.interval_minutes is not None:
            if s.interval_minutes > site.interval_minutes or site.interval_minutes % s.interval_minutes:
                raise _err(file, f"{p}.interval_minutes",
                           f"{s.interval_minutes} min does not divide the site interval of "
                           f"{site.interval_minutes} min")

    base = "input" if isinstance(raw, dict) else "input[*]"
    for var in REQUIRED_VARIABLES:
        if var not in owner:
            raise _err(file, f"{base}.columns.{var}",
                       f"required variable {var!r} is not mapped by any input stream")
    if not any(v in owner for v in HUMIDITY_VARIABLES):
        raise _err(file, f"{base}.columns.rh",
                   "neither 'rh' nor 'vpd' is mapped: map at least one of them")
    return tuple(streams)


def _parse_time(value, *, file, key, tz) -> pd.Timestamp:
    if isinstance(value, _dt.datetime):
        ts = pd.Timestamp(value)
    elif isinstance(value, _dt.date):
        ts = pd.Timestamp(value.year, value.month, value.day)
    elif isinstance(value, str):
        try:
            ts = pd.Timestamp(value.strip())
        except (ValueError, TypeError):
            ts = pd.NaT
        if ts is pd.NaT or pd.isna(ts):
            raise _err(file, key, f"is not a date or date-time such as \"2025-06-03 10:00\": {value!r}")
    else:
        raise _err(file, key, f"must be a date or date-time, got {type(value).__name__} {value!r}")
    if ts.tzinfo is None:
        return ts.tz_localize(tz)
    return ts.tz_convert(tz)


def _parse_history(raw, *, file, site: SiteInfo, mapped: set[str]) -> tuple[HistoryEntry, ...]:
    if not isinstance(raw, list):
        raise _err(file, "history", "must be a list of [[history]] tables")
    entries: list[HistoryEntry] = []
    for i, tbl in enumerate(raw):
        p = f"history[{i}]"
        _table(tbl, file=file, key=p)
        _unknown_keys(tbl, _HISTORY_KEYS, file=file, prefix=f"{p}.")
        for key in ("start", "end"):
            if key not in tbl:
                raise _err(file, f"{p}.{key}", "required key is missing")
        start = _parse_time(tbl["start"], file=file, key=f"{p}.start", tz=site.tz)
        end = _parse_time(tbl["end"], file=file, key=f"{p}.end", tz=site.tz)
        if not start < end:
            raise _err(file, f"{p}.end", f"must be after start ({start:%Y-%m-%d %H:%M}), got {end:%Y-%m-%d %H:%M}")
        reason = _string(tbl.get("reason", ""), file=file, key=f"{p}.reason", allow_empty=True).strip()

        params: dict = {}
        if "canopy_height_m" in tbl:
            params["canopy_height_m"] = _number(tbl["canopy_height_m"], file=file,
                                                key=f"{p}.canopy_height_m", lo=0, hi=150)
        if "measurement_height_m" in tbl:
            params["measurement_height_m"] = _number(tbl["measurement_height_m"], file=file,
                                                     key=f"{p}.measurement_height_m", lo=0, hi=500,
                                                     lo_open=True)
        if "irga" in tbl:
            params["irga"] = _choice(tbl["irga"], IRGA_TYPES, file=file, key=f"{p}.irga")
        hc = params.get("canopy_height_m", site.canopy_height_m)
        zm = params.get("measurement_height_m", site.measurement_height_m)
        if ("canopy_height_m" in params or "measurement_height_m" in params) and zm <= hc:
            key = "measurement_height_m" if "measurement_height_m" in params else "canopy_height_m"
            raise _err(file, f"{p}.{key}",
                       f"the measurement height ({zm:g} m) must be above the canopy height ({hc:g} m)")

        correct: dict = {}
        for var, spec in _table(tbl.get("correct", {}), file=file, key=f"{p}.correct").items():
            key = f"{p}.correct.{var}"
            _canonical(var, file=file, key=key)
            if var not in mapped:
                raise _err(file, key, f"{var!r} is not mapped by any input stream")
            spec = _table(spec, file=file, key=key)
            _unknown_keys(spec, _CORRECT_KEYS, file=file, prefix=f"{key}.")
            if not spec:
                raise _err(file, key, "corrects nothing (give scale, offset or shift_minutes)")
            corr = {k: _number(v, file=file, key=f"{key}.{k}") for k, v in spec.items()}
            if corr.get("scale") == 0:
                raise _err(file, f"{key}.scale", "must not be 0 (use exclude to drop values)")
            correct[var] = corr

        exclude_raw = tbl.get("exclude", [])
        if isinstance(exclude_raw, str):
            exclude_raw = [exclude_raw]
        if not isinstance(exclude_raw, list):
            raise _err(file, f"{p}.exclude", f"must be a list of canonical variables, got {exclude_raw!r}")
        exclude = []
        for j, var in enumerate(exclude_raw):
            key = f"{p}.exclude[{j}]"
            if not isinstance(var, str):
                raise _err(file, key, f"must be a canonical variable name, got {var!r}")
            _canonical(var, file=file, key=key)
            if var not in mapped:
                raise _err(file, key, f"{var!r} is not mapped by any input stream")
            if var not in exclude:
                exclude.append(var)

        irrigation = tbl.get("irrigation", False)
        if not isinstance(irrigation, bool):
            raise _err(file, f"{p}.irrigation", f"must be true or false, got {irrigation!r}")
        if not (params or correct or exclude or irrigation):
            raise _err(file, p, "does nothing: set a site parameter, correct, exclude or irrigation")
        if (correct or exclude) and not reason:
            raise _err(file, f"{p}.reason", "required for a correction or an exclusion")
        entries.append(HistoryEntry(index=i, start=start, end=end, reason=reason, parameters=params,
                                    correct=correct, exclude=tuple(exclude), irrigation=irrigation))

    # overlapping periods of the same kind: two values for one parameter, two corrections of one variable
    for j, b in enumerate(entries):
        for a in entries[:j]:
            if not (a.start < b.end and b.start < a.end):
                continue
            both = set(a.parameters) & set(b.parameters)
            if both:
                k = sorted(both)[0]
                raise _err(file, f"history[{b.index}].start",
                           f"overlaps history[{a.index}], which also sets {k}")
            both = set(a.correct) & set(b.correct)
            if both:
                k = sorted(both)[0]
                raise _err(file, f"history[{b.index}].start",
                           f"overlaps history[{a.index}], which also corrects {k}")
    return tuple(entries)


def _parse_qc(raw, *, file: Path) -> dict:
    from .rules import load_rules, rule_set_path  # rules imports config: import late

    qc = _table(raw, file=file, key="qc")
    _unknown_keys(qc, _QC_KEYS, file=file, prefix="qc.")
    rules = _string(qc.get("rules", "standard"), file=file, key="qc.rules")
    override = _table(qc.get("override", {}), file=file, key="qc.override")
    _check_rule_spec(rules, file=file, key="qc.rules", folder=file.parent, rule_set_path=rule_set_path)
    load_rules(rules, site_overrides=override or None, site_file=file, relative_to=file.parent)
    out = {"rules": rules}
    if override:
        out["override"] = override
    return out


def _check_rule_spec(spec: str, *, file, key, folder: Path, rule_set_path) -> None:
    """A packaged rule-set name or an existing TOML file (relative to ``folder``)."""
    if "/" not in spec and "\\" not in spec and not spec.endswith(".toml"):
        if rule_set_path(spec) is None:
            raise _err(file, key, f"no packaged rule set called {spec!r} (give a name in qc_rules/ or a path to a .toml file)")
        return
    path = Path(spec)
    if not path.is_absolute():
        path = folder / path
    if not path.is_file():
        raise _err(file, key, f"rule file not found: {path}")


def _parse_conductance(raw, *, file) -> dict:
    tbl = _table(raw, file=file, key="conductance")
    _unknown_keys(tbl, _CONDUCTANCE_KEYS, file=file, prefix="conductance.")
    out = {"aerodynamic": _choice(tbl.get("aerodynamic", "ustar"), AERODYNAMIC_METHODS,
                                  file=file, key="conductance.aerodynamic")}
    if "kb_inverse" in tbl:
        out["kb_inverse"] = _number(tbl["kb_inverse"], file=file, key="conductance.kb_inverse", lo=0, hi=20)
    return out


def _parse_gapfill(raw, *, file, site_id: str) -> dict:
    tbl = _table(raw, file=file, key="gapfill")
    _unknown_keys(tbl, _GAPFILL_KEYS, file=file, prefix="gapfill.")
    neighbours = tbl.get("neighbours", [])
    if not isinstance(neighbours, list):
        raise _err(file, "gapfill.neighbours", "must be a list of site ids")
    for i, nid in enumerate(neighbours):
        if not isinstance(nid, str) or not _re.fullmatch(SITE_ID_PATTERN, nid):
            raise _err(file, f"gapfill.neighbours[{i}]", f"must be a site id matching {SITE_ID_PATTERN}, got {nid!r}")
        if nid == site_id:
            raise _err(file, f"gapfill.neighbours[{i}]", "a site cannot be its own neighbour")
    return {"neighbours": list(dict.fromkeys(neighbours))}


def load_site_config(path) -> SiteConfig:
    """Read and validate a site TOML file (CONTRACT §2).

    Parameters
    ----------
    path : str or os.PathLike
        The site configuration file.

    Returns
    -------
    SiteConfig
        With ``site.interval_minutes`` resolved when the file fixes it (the ``[site]`` value,
        else the longest declared stream interval if that is 30 or 60 min); otherwise None
        and ingest resolves it from the data.

    Raises
    ------
    ConfigError
        One line naming the file and the dotted key at fault (``site.id``,
        ``input.units.ta``, ``input[1].columns.rh``, ``history[2].end``, ``qc.override...``).

    Notes
    -----
    Checks made up front: unknown tables and keys (typos), unknown canonical names in
    ``[input.columns]``, ``units``, ``scale``, ``offset``, ``flags``; required variables
    (le, h, rn, ta, wind, ustar and one of rh / vpd) mapped across all streams, each
    variable in one stream only; unit strings that :mod:`pipeline.units` converts for the variable;
    site id ``[a-z0-9-]+``; latitude, longitude, UTC offset (-12..14 h, whole minutes),
    heights (measurement height above the canopy), irga, intervals (site 30 or 60 min,
    stream intervals dividing it), ``timestamp_marks``, a usable ``timestamp_format``;
    history periods (start < end; two entries setting the same site parameter or correcting
    the same variable must not overlap; exclusions and irrigation may overlap anything;
    corrections and exclusions need a ``reason``); the ``[qc]`` rule set and override are
    loaded with :func:`pipeline.rules.load_rules`. Optional extension keys are listed in the
    comment block above this function in the source.
    """
    path = Path(path)
    raw, sha = _read_toml_file(path)
    _unknown_keys(raw, _TOP_KEYS, file=path, prefix="")
    for key in ("site", "input"):
        if key not in raw:
            raise _err(path, key, f"required table [{key}] is missing")
    site = _parse_site(raw["site"], file=path)
    streams = _parse_streams(raw["input"], file=path, site=site)
    mapped = {v for s in streams for v in s.columns}
    history = _parse_history(raw.get("history", []), file=path, site=site, mapped=mapped)
    qc = _parse_qc(raw.get("qc", {}), file=path)
    conductance = _parse_conductance(raw.get("conductance", {}), file=path)
    gapfill = _parse_gapfill(raw.get("gapfill", {}), file=path, site_id=site.id)

    if site.interval_minutes is None:
        declared = [s.interval_minutes for s in streams]
        if all(d is not None for d in declared):
            longest = max(declared)
            if longest not in SITE_INTERVALS:
                raise _err(path, "site.interval_minutes",
                           f"the inputs are at most {longest}-minute data: set the site interval (30 or 60)")
            for s, d in zip(streams, declared):
                if longest % d:
                    raise _err(path, "site.interval_minutes",
                               f"stream {s.name!r} at {d} min does not divide {longest} min: set the site interval")
            site = _replace(site, interval_minutes=longest)
    return SiteConfig(path=path, sha256=sha, site=site, inputs=streams, history=history,
                      qc=qc, conductance=conductance, gapfill=gapfill, raw=raw)


def load_network_config(path) -> NetworkConfig:
    """Read and validate a network TOML file (CONTRACT §2).

    Site configuration paths and data globs are resolved relative to the network file's
    folder. The site files are checked to exist but not loaded here: a broken site fails
    only its own run.

    Raises
    ------
    ConfigError
        One line naming the network file and the dotted key (``network.sites[1].config``).
    """
    from .rules import rule_set_path

    path = Path(path)
    raw, _sha = _read_toml_file(path)
    _unknown_keys(raw, ("network",), file=path, prefix="")
    if "network" not in raw:
        raise _err(path, "network", "required table [network] is missing")
    net = _table(raw["network"], file=path, key="network")
    _unknown_keys(net, _NETWORK_KEYS, file=path, prefix="network.")
    name = _string(net.get("name", path.stem), file=path, key="network.name")
    rules = _string(net.get("rules", "standard"), file=path, key="network.rules")
    _check_rule_spec(rules, file=path, key="network.rules", folder=path.parent, rule_set_path=rule_set_path)
    from .rules import load_rules
    load_rules(rules, relative_to=path.parent)
    if "sites" not in net:
        raise _err(path, "network.sites", "required: a [[network.sites]] table per site")
    sites_raw = net["sites"]
    if not isinstance(sites_raw, list) or not sites_raw:
        raise _err(path, "network.sites", "must be a non-empty list of [[network.sites]] tables")
    sites = []
    seen: dict[Path, int] = {}
    for i, tbl in enumerate(sites_raw):
        p = f"network.sites[{i}]"
        _table(tbl, file=path, key=p)
        _unknown_keys(tbl, _NETWORK_SITE_KEYS, file=path, prefix=f"{p}.")
        for key in _NETWORK_SITE_KEYS:
            if key not in tbl:
                raise _err(path, f"{p}.{key}", "required key is missing")
        cfg = Path(_string(tbl["config"], file=path, key=f"{p}.config"))
        if not cfg.is_absolute():
            cfg = path.parent / cfg
        if not cfg.is_file():
            raise _err(path, f"{p}.config", f"site configuration file not found: {cfg}")
        resolved = cfg.resolve()
        if resolved in seen:
            raise _err(path, f"{p}.config", f"the same site file as network.sites[{seen[resolved]}]")
        seen[resolved] = i
        data = _string(tbl["data"], file=path, key=f"{p}.data")
        data_path = Path(data)
        if not data_path.is_absolute():
            # a relative glob stays inside the network file's folder: no '..' that leaves it
            inside = os.path.normpath(path.parent.resolve() / data_path)
            root = str(path.parent.resolve())
            if os.path.commonpath([inside, root]) != root:
                raise _err(path, f"{p}.data",
                           f"the data glob {data!r} leaves the network file's folder; "
                           "give an absolute path to use data kept elsewhere")
        data = str(data_path if data_path.is_absolute() else path.parent / data_path)
        sites.append(NetworkSite(config=cfg, data=data))
    return NetworkConfig(path=path, name=name, rules=rules, sites=tuple(sites), raw=raw)

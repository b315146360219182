"""The output tables of a site (CONTRACT §4) and the metadata that describes every column.

Pure functions: they assemble frames and dictionaries; writing them (atomically, with the
metadata in the parquet schema) is the application's job (:mod:`towerflow.runner`).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd

from . import flags as flagbits
from .config import CANONICAL_UNITS

__all__ = [
    "VARIABLE_METADATA",
    "FILL_METHODS",
    "FILL_QUALITIES",
    "column_metadata",
    "intervals_table",
    "daily_table",
    "json_ready",
]

#: canonical variable -> (long name, CF standard name or None)
#: CF standard names from the CF standard name table (cfconventions.org), where one exists.
VARIABLE_METADATA: dict[str, tuple[str, str | None]] = {
    "le": ("latent heat flux, upward positive", "surface_upward_latent_heat_flux"),
    "h": ("sensible heat flux, upward positive", "surface_upward_sensible_heat_flux"),
    "rn": ("net radiation, downward positive", "surface_net_downward_radiative_flux"),
    "g": ("ground heat flux, into the soil positive", "downward_heat_flux_in_soil"),
    "rg": ("global radiation (incoming shortwave)", "surface_downwelling_shortwave_flux_in_air"),
    "sw_out": ("reflected shortwave radiation", "surface_upwelling_shortwave_flux_in_air"),
    "lw_in": ("incoming longwave radiation", "surface_downwelling_longwave_flux_in_air"),
    "lw_out": ("outgoing longwave radiation", "surface_upwelling_longwave_flux_in_air"),
    "ta": ("air temperature", "air_temperature"),
    "rh": ("relative humidity", "relative_humidity"),
    "vpd": ("vapour pressure deficit", "water_vapor_saturation_deficit_in_air"),
    "p_air": ("air pressure", "air_pressure"),
    "wind": ("horizontal wind speed", "wind_speed"),
    "wind_dir": ("wind direction, degrees clockwise from north (direction the wind comes from)",
                 "wind_from_direction"),
    "ustar": ("friction velocity", None),
    "precip": ("precipitation during the interval", "precipitation_amount"),
    "swc": ("volumetric soil water content", "volume_fraction_of_condensed_water_in_soil"),
    "t_soil": ("soil temperature", "soil_temperature"),
    "s_canopy": ("heat storage change in canopy air and biomass", None),
    "fc": ("CO2 flux, upward positive", "surface_upward_mole_flux_of_carbon_dioxide"),
}

#: fill method names written to ``le_fill_method`` / ``h_fill_method`` (documented in the README)
FILL_METHODS: dict[str, str] = {
    "measured": "an accepted measurement",
}
FILL_QUALITIES = ("measured", "good", "fair", "poor")

_EXTRA_COLUMNS: dict[str, dict] = {
    "timestamp_start": {"long_name": "start of the averaging interval (site's fixed UTC offset)"},
    "timestamp_end": {"long_name": "end of the averaging interval (site's fixed UTC offset)"},
    "le_filled": {"unit": "W m-2", "long_name": "latent heat flux, accepted measurements with gaps filled",
                  "standard_name": "surface_upward_latent_heat_flux"},
    "h_filled": {"unit": "W m-2", "long_name": "sensible heat flux, accepted measurements with gaps filled",
                 "standard_name": "surface_upward_sensible_heat_flux"},
    "le_fill_method": {"long_name": "'measured' or the method that filled le_filled"},
    "h_fill_method": {"long_name": "'measured' or the method that filled h_filled"},
    "le_fill_quality": {"long_name": "measured, or quality class of the filled value: good, fair, poor"},
    "h_fill_quality": {"long_name": "measured, or quality class of the filled value: good, fair, poor"},
    "le_fill_sd": {"unit": "W m-2", "long_name": "standard deviation of the filled latent heat flux (NaN where measured)"},
    "h_fill_sd": {"unit": "W m-2", "long_name": "standard deviation of the filled sensible heat flux (NaN where measured)"},
    "ga": {"unit": "m s-1", "long_name": "aerodynamic conductance for heat"},
    "gs": {"unit": "m s-1", "long_name": "surface (canopy) conductance from Penman-Monteith inversion of measured LE"},
    "gs_closed": {"unit": "m s-1",
                  "long_name": "surface conductance from LE closed by the Bowen-ratio-preserving correction"},
    "gs_molar": {"unit": "mol m-2 s-1", "long_name": "surface conductance in molar units"},
    "gs_valid": {"long_name": "true where the interval passes every conductance filter"},
    "gs_reject": {"long_name": "bitmask of the conductance filters that failed (0 = valid)"},
    "omega": {"unit": "1", "long_name": "decoupling coefficient (Jarvis and McNaughton 1986)"},
    "le_equilibrium": {"unit": "W m-2", "long_name": "equilibrium latent heat flux (McNaughton and Jarvis 1983)"},
    "le_imposed": {"unit": "W m-2", "long_name": "imposed latent heat flux (McNaughton and Jarvis 1983)"},
    "priestley_taylor_alpha": {"unit": "1", "long_name": "Priestley-Taylor coefficient LE / LE_equilibrium"},
    "bowen_ratio": {"unit": "1", "long_name": "Bowen ratio H / LE"},
    "available_energy": {"unit": "W m-2", "long_name": "available energy Rn - G (+ storage terms when present)"},
    "le_closed": {"unit": "W m-2", "long_name": "LE after the Bowen-ratio-preserving closure correction (daily sums)"},
    "h_closed": {"unit": "W m-2", "long_name": "H after the Bowen-ratio-preserving closure correction (daily sums)"},
    "closure_factor": {"unit": "1", "long_name": "the day's closure factor sum(Rn - G) / sum(H + LE)"},
    "closure_corrected": {"long_name": "true where the closure correction was applied"},
    "canopy_height_m": {"unit": "m", "long_name": "canopy height (site and site history)"},
    "measurement_height_m": {"unit": "m", "long_name": "measurement height (site and site history)"},
    "irga": {"long_name": "gas analyser type (open-path or closed-path)"},
    "irrigated": {"long_name": "irrigation in this interval (site history)"},
    "is_day": {"long_name": "daytime interval"},
    "snow_or_frozen": {"long_name": "snow cover or frozen conditions detected"},
}


def _flag_meaning() -> dict[str, str]:
    return {str(bit): f"{name}: {meaning}" for bit, (name, meaning) in flagbits.BITS.items()}


def column_metadata(name: str, extra: dict[str, dict] | None = None) -> dict[str, str]:
    """Metadata of one output column: unit, long_name, standard_name, and flag meanings.

    ``extra`` adds descriptions for stage-specific columns (e.g. from the stage modules).
    """
    extra = extra or {}
    if name in extra:
        return {k: str(v) for k, v in extra[name].items()}
    if name in _EXTRA_COLUMNS:
        return {k: str(v) for k, v in _EXTRA_COLUMNS[name].items()}
    if name in VARIABLE_METADATA:
        long_name, std = VARIABLE_METADATA[name]
        meta = {"unit": CANONICAL_UNITS[name], "long_name": f"{long_name}, as ingested (before QC)"}
        if std:
            meta["standard_name"] = std
        return meta
    if name.endswith("_flag") and name[:-5] in VARIABLE_METADATA:
        var = name[:-5]
        return {"long_name": f"bitmask of reasons to reject {var} (0 = accepted)",
                "flag_meanings": json.dumps(_flag_meaning())}
    if name.endswith("_sensor_count"):
        return {"long_name": f"number of replicate sensors that contributed to {name[:-13]}"}
    if name.endswith("_history_entry"):
        return {"long_name": f"index of the [[history]] entry that corrected {name[:-14]} (-1: none)"}
    if name.endswith("_fill_method"):
        return {"long_name": f"method that filled {name[:-12]}"}
    if name.endswith("_filled"):
        base = name[:-7]
        if base in VARIABLE_METADATA:
            return {"unit": CANONICAL_UNITS[base], "long_name": f"{VARIABLE_METADATA[base][0]}, gaps filled"}
    return {"long_name": name.replace("_", " ")}


def intervals_table(frame_before_qc: pd.DataFrame, flags: pd.DataFrame, *parts: pd.DataFrame,
                    interval: pd.Timedelta) -> pd.DataFrame:
    """``intervals.parquet``: bounds, ingested values, flags, then the stages' columns.

    Parameters
    ----------
    frame_before_qc : DataFrame
        The working frame as ingested (after history corrections, before QC).
    flags : DataFrame
        Final flags, one column per variable (written as ``<var>_flag``).
    *parts : DataFrame
        Stage columns on the same index; later parts do not overwrite earlier columns.
    interval : Timedelta
        The site interval (for ``timestamp_end``).
    """
    index = frame_before_qc.index
    cols: dict[str, np.ndarray] = {"timestamp_start": index, "timestamp_end": index + interval}
    for name in frame_before_qc.columns:
        cols[name] = frame_before_qc[name].to_numpy()
    for var in flags.columns:
        cols[f"{var}_flag"] = flags[var].to_numpy().astype(np.int32)
    for part in parts:
        if part is None:
            continue
        if not part.index.equals(index):
            raise ValueError("stage columns are not on the working frame's index")
        for name in part.columns:
            if name not in cols:
                cols[name] = part[name].to_numpy()
    # one column per array, not consolidated into 2-D blocks: the table is only written, and
    # consolidating (then concatenating) copied every value twice (0.8 s for 16 site-years)
    return pd.DataFrame(cols, copy=False)


def daily_table(parts: list[pd.DataFrame]) -> pd.DataFrame:
    """``daily.parquet``: per-day frames (index = local date) joined column-wise."""
    cleaned = []
    for p in parts:
        if p is None or not len(p.columns):
            continue
        if "date" in p.columns:
            p = p.set_index("date")
        p = p.copy()
        p.index = pd.to_datetime(pd.Index(p.index))
        cleaned.append(p)
    parts = cleaned
    if not parts:
        return pd.DataFrame({"date": pd.Series([], dtype="datetime64[ns]")})
    joined = parts[0]
    for part in parts[1:]:
        joined = joined.join(part[[c for c in part.columns if c not in joined.columns]], how="outer")
    joined = joined.sort_index()
    joined.index.name = "date"
    out = joined.reset_index()
    out["date"] = pd.to_datetime(out["date"]).dt.date
    return out


def json_ready(obj):
    """A deep copy of ``obj`` that :func:`json.dumps` accepts: numpy scalars → Python, NaN → None."""
    kind = type(obj)
    if kind is str or kind is int or obj is None:  # the common leaves first (as below: unchanged)
        return obj
    if kind is float:
        return None if math.isnan(obj) or math.isinf(obj) else obj
    if isinstance(obj, dict):
        return {str(k): json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_ready(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [json_ready(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        value = float(obj)
        return None if math.isnan(value) or math.isinf(value) else value
    if isinstance(obj, (pd.Timestamp,)):
        return None if pd.isna(obj) else obj.isoformat()
    if isinstance(obj, pd.Timedelta):
        return str(obj)
    if obj is pd.NaT:
        return None
    if hasattr(obj, "isoformat"):
        return obj.isoformat()
    return obj

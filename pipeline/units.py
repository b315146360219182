"""Unit strings of ``[input.units]`` → the canonical units of CONTRACT §1.

Every accepted unit of a variable converts to the variable's canonical unit by a linear
map ``canonical = value * factor + offset``; the table :data:`CONVERSIONS` holds the
factors, each exact by definition of the units (SI brochure, 9th ed. 2019; NIST SP 811,
2008 edition, appendix B). Unit strings are matched exactly (runs of white space count as
one space): an unknown string is a configuration error, never a guess (CONTRACT §1).

:func:`sanity_warnings` compares a robust statistic of the values with a plausible range
for the variable and, when another accepted unit would make the data plausible, says
which unit the data look like (a Kelvin column declared ``degC``, hPa declared ``kPa``,
an RH fraction declared ``%``).
"""
from __future__ import annotations

import numpy as np

from .config import CANONICAL_UNITS
from .errors import ConfigError

__all__ = [
    "CONVERSIONS",
    "canonical_unit",
    "accepted_units",
    "normalize_unit",
    "conversion",
    "to_canonical",
    "sanity_warnings",
]

# ---------------------------------------------------------------------------------------
# unit families: unit string -> (factor, offset) to the family's canonical unit
# ---------------------------------------------------------------------------------------
_FLUX_DENSITY = {  # canonical W m-2
    "W m-2": (1.0, 0.0),
    "kW m-2": (1.0e3, 0.0),  # SI prefix kilo
}
_TEMPERATURE = {  # canonical degC
    "degC": (1.0, 0.0),
    "K": (1.0, -273.15),  # SI brochure 2019, 2.3.1: t/degC = T/K - 273.15
    "degF": (5.0 / 9.0, -32.0 * 5.0 / 9.0),  # NIST SP 811 B.9: t/degC = (t/degF - 32)/1.8
}
_RELATIVE_HUMIDITY = {  # canonical %
    "%": (1.0, 0.0),
    "percent": (1.0, 0.0),
    "fraction": (100.0, 0.0),
}
_PRESSURE = {  # canonical kPa
    "kPa": (1.0, 0.0),
    "hPa": (0.1, 0.0),
    "mbar": (0.1, 0.0),  # 1 mbar = 1 hPa (SI brochure 2019, table 8)
    "Pa": (1.0e-3, 0.0),
}
_SPEED = {  # canonical m s-1
    "m s-1": (1.0, 0.0),
    "km h-1": (1000.0 / 3600.0, 0.0),
    "cm s-1": (0.01, 0.0),
}
_DIRECTION = {  # canonical degree
    "degree": (1.0, 0.0),
}
_DEPTH = {  # canonical mm (precipitation depth during the interval)
    "mm": (1.0, 0.0),
    "cm": (10.0, 0.0),
    "m": (1000.0, 0.0),
}
_WATER_CONTENT = {  # canonical m3 m-3
    "m3 m-3": (1.0, 0.0),
    "percent": (0.01, 0.0),
    "%": (0.01, 0.0),
}
_MOLAR_FLUX = {  # canonical umol m-2 s-1
    "umol m-2 s-1": (1.0, 0.0),
    "mmol m-2 s-1": (1.0e3, 0.0),
}

_FAMILY_OF = {
    "W m-2": _FLUX_DENSITY,
    "degC": _TEMPERATURE,
    "%": _RELATIVE_HUMIDITY,
    "kPa": _PRESSURE,
    "m s-1": _SPEED,
    "degree": _DIRECTION,
    "mm": _DEPTH,
    "m3 m-3": _WATER_CONTENT,
    "umol m-2 s-1": _MOLAR_FLUX,
}

#: variable -> {accepted unit string: (factor, offset)} with canonical = x * factor + offset
CONVERSIONS: dict[str, dict[str, tuple[float, float]]] = {
    var: dict(_FAMILY_OF[unit]) for var, unit in CANONICAL_UNITS.items()
}

# ---------------------------------------------------------------------------------------
# plausibility: variable -> (statistic, low, high) in the canonical unit.  A file whose
# statistic lies outside [low, high] for the declared unit but inside for another accepted
# unit "looks like" that unit.  Bounds are common practice (generous climatological limits).
# ---------------------------------------------------------------------------------------
_PLAUSIBLE: dict[str, tuple[str, float, float]] = {
    "ta": ("median", -60.0, 60.0),  # degC, common practice (surface air anywhere on Earth)
    "t_soil": ("median", -50.0, 70.0),  # degC, common practice
    "rh": ("max", 1.5, 150.0),  # %, common practice: a file never above 1.5 % is a fraction
    "vpd": ("max", 0.02, 10.0),  # kPa, common practice: VPD above 10 kPa does not occur
    "p_air": ("median", 30.0, 110.0),  # kPa, common practice (sea level ~101, 9 km ~30)
    "swc": ("max", 0.005, 1.0),  # m3 m-3, by definition <= 1; common practice for the floor
    "wind": ("max", 0.0, 60.0),  # m s-1, common practice (30-min means above 60 do not occur)
    "ustar": ("max", 0.0, 10.0),  # m s-1, common practice
    "precip": ("max", 0.0, 300.0),  # mm per interval, common practice
}


def normalize_unit(unit: str) -> str:
    """The unit string with runs of white space collapsed to one space."""
    return " ".join(str(unit).split())


def canonical_unit(variable: str) -> str:
    """The canonical unit of a CONTRACT §1 variable (``KeyError`` for unknown names)."""
    return CANONICAL_UNITS[variable]


def accepted_units(variable: str) -> tuple[str, ...]:
    """Every unit string ``[input.units]`` accepts for ``variable``."""
    return tuple(CONVERSIONS[variable])


def conversion(variable: str, unit: str | None, *, key: str | None = None, file=None) -> tuple[float, float]:
    """``(factor, offset)`` such that ``canonical = value * factor + offset``.

    Parameters
    ----------
    variable : str
        Canonical variable name (CONTRACT §1).
    unit : str or None
        The unit string declared in ``[input.units]``; None means the canonical unit.
    key : str, optional
        The TOML key named in errors; default ``input.units.<variable>``.
    file : path, optional
        The site configuration file named in errors.

    Raises
    ------
    ConfigError
        The variable is unknown, or the unit string is unknown or not a unit of the
        variable's quantity.
    """
    key = key or f"input.units.{variable}"
    if variable not in CONVERSIONS:
        raise ConfigError(f"unknown variable {variable!r}", file=file, key=key)
    if unit is None:
        return (1.0, 0.0)
    norm = normalize_unit(unit)
    table = CONVERSIONS[variable]
    if norm in table:
        return table[norm]
    known_anywhere = any(norm in t for t in CONVERSIONS.values())
    what = "is not a unit of" if known_anywhere else "is an unknown unit string for"
    raise ConfigError(
        f"{unit!r} {what} {variable} (accepted: {', '.join(repr(u) for u in table)})",
        file=file, key=key)


def to_canonical(values, variable: str, unit: str | None, *, key: str | None = None, file=None) -> np.ndarray:
    """``values`` (declared in ``unit``) converted to the canonical unit of ``variable``.

    Returns a new float64 array; NaN stays NaN. See :func:`conversion` for the errors.
    """
    factor, offset = conversion(variable, unit, key=key, file=file)
    arr = np.asarray(values, dtype=np.float64)
    if factor == 1.0 and offset == 0.0:
        return arr.copy()
    return arr * factor + offset


def _statistic(values: np.ndarray, kind: str) -> float:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return float("nan")
    return float(np.median(finite) if kind == "median" else np.max(finite))


def sanity_warnings(values, variable: str, unit: str | None, *, where: str = "") -> list[str]:
    """One-line warnings when ``values`` are implausible in the declared ``unit``.

    The check takes a robust statistic (median or maximum, see ``_PLAUSIBLE``) of the finite
    values converted from ``unit`` to the canonical unit. Outside the variable's plausible
    range, every other accepted unit is tried; the message names the units under which the
    data would be plausible, or says that none fits.

    Parameters
    ----------
    values : array_like
        The values as declared (after ``[input.scale]``/``[input.offset]``, before conversion).
    variable : str
        Canonical variable name.
    unit : str or None
        Declared unit string (None: canonical unit). Must be valid (see :func:`conversion`).
    where : str
        Text prefixed to the message (file or stream name).

    Returns
    -------
    list of str
        Empty when the values look plausible or the variable has no plausibility rule.
    """
    rule = _PLAUSIBLE.get(variable)
    if rule is None:
        return []
    kind, low, high = rule
    declared = normalize_unit(unit) if unit is not None else canonical_unit(variable)
    arr = np.asarray(values, dtype=np.float64)
    stat_raw = _statistic(arr, kind)
    if not np.isfinite(stat_raw):
        return []
    factor, offset = conversion(variable, declared)
    stat = stat_raw * factor + offset
    if low <= stat <= high:
        return []
    fits = []
    for other, (f, o) in CONVERSIONS[variable].items():
        if other == declared or (f, o) == (factor, offset):
            continue
        if low <= stat_raw * f + o <= high:
            fits.append((abs(np.log(f / factor)), other))
    fits = [u for _, u in sorted(fits)]  # nearest scale first (hPa before Pa for a kPa column)
    prefix = f"{where}: " if where else ""
    canon = canonical_unit(variable)
    base = (f"{prefix}{variable} declared in {declared!r} has {kind} {stat_raw:.6g}, implausible "
            f"(expected {kind} between {low:g} and {high:g} {canon})")
    if fits:
        return [f"{base}; the data look like {' or '.join(repr(u) for u in fits)}: check input.units.{variable}"]
    return [f"{base}; no accepted unit fits: check input.units, input.scale and input.offset of {variable}"]

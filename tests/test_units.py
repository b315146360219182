"""Unit strings and conversions (pipeline.units) checked against pint as the oracle."""
from __future__ import annotations

import numpy as np
import pint
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from pipeline import units
from pipeline.config import CANONICAL_UNITS
from pipeline.errors import ConfigError

UREG = pint.UnitRegistry()

#: our unit strings spelled for pint (the oracle)
PINT_NAME = {
    "W m-2": "W / m**2",
    "kW m-2": "kW / m**2",
    "degC": "degC",
    "K": "kelvin",
    "degF": "degF",
    "%": "percent",
    "percent": "percent",
    "fraction": "dimensionless",
    "kPa": "kPa",
    "hPa": "hPa",
    "mbar": "mbar",
    "Pa": "Pa",
    "m s-1": "m / s",
    "km h-1": "km / hour",
    "cm s-1": "cm / s",
    "degree": "degree",
    "mm": "mm",
    "cm": "cm",
    "m": "m",
    "m3 m-3": "m**3 / m**3",
    "umol m-2 s-1": "umol / m**2 / s",
    "mmol m-2 s-1": "mmol / m**2 / s",
}

PAIRS = [(var, unit) for var, table in units.CONVERSIONS.items() for unit in table]
SAMPLE = np.array([-40.0, -1.5, 0.0, 0.35, 1.0, 12.25, 101.3, 293.15, 1013.0])


def _pint(values, unit, variable):
    canonical = CANONICAL_UNITS[variable]
    return UREG.Quantity(np.asarray(values, dtype=float), PINT_NAME[unit]).to(PINT_NAME[canonical]).magnitude


def test_contract_unit_strings_accepted():
    """Every unit string CONTRACT §1 lists is accepted by at least one variable."""
    contract = ["W m-2", "degC", "K", "%", "fraction", "kPa", "hPa", "Pa", "m s-1", "mm",
                "m3 m-3", "percent", "degree", "umol m-2 s-1"]
    accepted = {u for table in units.CONVERSIONS.values() for u in table}
    assert set(contract) <= accepted
    assert units.accepted_units("rh") == ("%", "percent", "fraction")
    assert "percent" in units.accepted_units("swc")


def test_every_variable_has_its_canonical_unit_as_identity():
    """The canonical unit converts with factor 1, offset 0 for every variable."""
    for var, unit in CANONICAL_UNITS.items():
        assert units.conversion(var, unit) == (1.0, 0.0)
        assert units.conversion(var, None) == (1.0, 0.0)


@pytest.mark.parametrize("variable,unit", PAIRS)
def test_conversion_matches_pint(variable, unit):
    """Each accepted unit converts like pint (oracle) to the canonical unit."""
    got = units.to_canonical(SAMPLE, variable, unit)
    assert_allclose(got, _pint(SAMPLE, unit, variable), rtol=1e-12, atol=1e-9)  # pint 0.25 oracle


@settings(max_examples=60, deadline=None)
@given(pair=st.sampled_from(PAIRS),
       values=st.lists(st.floats(-1e5, 1e5, allow_nan=False), min_size=1, max_size=20))
def test_conversion_matches_pint_property(pair, values):
    """Random values: conversion equals pint's (oracle)."""
    variable, unit = pair
    got = units.to_canonical(values, variable, unit)
    assert_allclose(got, _pint(values, unit, variable), rtol=1e-12, atol=1e-8)


def test_known_values():
    """Spot values: 293.15 K = 20 degC (SI brochure 2019 definition), 1013.25 hPa = 101.325 kPa."""
    assert_allclose(units.to_canonical([293.15], "ta", "K"), [20.0], atol=1e-12)  # SI brochure 2019
    assert_allclose(units.to_canonical([1013.25], "p_air", "hPa"), [101.325])  # SI prefixes
    assert_allclose(units.to_canonical([0.42], "rh", "fraction"), [42.0])  # definition of percent
    assert_allclose(units.to_canonical([35.0], "swc", "percent"), [0.35])  # definition of percent
    assert_allclose(units.to_canonical([36.0], "wind", "km h-1"), [10.0])  # 1 km/h = 1/3.6 m/s


def test_nan_propagates_and_input_not_mutated():
    """NaN stays NaN; the input array is not changed."""
    x = np.array([1.0, np.nan, 3.0])
    out = units.to_canonical(x, "ta", "K")
    assert np.isnan(out[1]) and x[0] == 1.0
    same = units.to_canonical(x, "ta", "degC")
    same[0] = 99.0
    assert x[0] == 1.0


def test_white_space_in_unit_string_is_normalised():
    """'W  m-2' and ' m s-1 ' are the same strings (white space only)."""
    assert units.conversion("le", "W  m-2") == (1.0, 0.0)
    assert units.conversion("wind", " m s-1 ") == (1.0, 0.0)


@pytest.mark.parametrize("variable,unit,needle", [
    ("ta", "kelvin", "unknown unit string"),
    ("ta", "hPa", "is not a unit of"),
    ("rh", "m3 m-3", "is not a unit of"),
    ("le", "W/m2", "unknown unit string"),
    ("vpd", "kpa", "unknown unit string"),
])
def test_unknown_or_incompatible_unit_is_config_error(variable, unit, needle):
    """Unknown or wrong-quantity unit strings raise ConfigError naming the key, one line."""
    with pytest.raises(ConfigError) as info:
        units.conversion(variable, unit, file="site.toml")
    msg = str(info.value)
    assert f"input.units.{variable}" in msg and "site.toml" in msg and needle in msg
    assert "\n" not in msg


def test_unknown_variable_is_config_error():
    with pytest.raises(ConfigError, match="unknown variable"):
        units.conversion("temperature", "degC")


# ---------------------------------------------------------------------------------------
# unit sanity
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("variable,declared,values,looks_like", [
    ("ta", "degC", [288.0, 291.5, 295.2], "'K'"),  # Kelvin column declared degC
    ("ta", "K", [12.0, 15.0, 18.0], "'degC'"),  # Celsius column declared K
    ("t_soil", "degC", [280.0, 281.0], "'K'"),
    ("vpd", "kPa", [0.0, 8.5, 21.0], "'hPa'"),  # hPa declared kPa
    ("vpd", "Pa", [0.2, 1.1, 2.3], "'kPa'"),  # kPa declared Pa
    ("rh", "%", [0.45, 0.8, 0.97], "'fraction'"),  # fraction declared %
    ("rh", "fraction", [45.0, 80.0, 97.0], "'%'"),
    ("p_air", "kPa", [1002.0, 1010.0, 1015.0], "'hPa'"),  # hPa declared kPa
    ("p_air", "hPa", [100.2, 101.0], "'kPa'"),
    ("p_air", "kPa", [99800.0, 101000.0], "'Pa'"),
    ("swc", "m3 m-3", [22.0, 31.0, 35.0], "'percent'"),  # percent declared m3 m-3
    ("wind", "m s-1", [20.0, 90.0], "'km h-1'"),
])
def test_sanity_warning_names_the_likely_unit(variable, declared, values, looks_like):
    """Implausible values give one warning naming the unit they look like (common practice bounds)."""
    out = units.sanity_warnings(values, variable, declared, where="f.csv")
    assert len(out) == 1
    assert "look like" in out[0] and looks_like in out[0].split("look like")[1].split(":")[0]
    assert out[0].startswith("f.csv: ") and f"input.units.{variable}" in out[0] and "\n" not in out[0]


@pytest.mark.parametrize("variable,declared,values", [
    ("ta", "degC", [-12.0, 3.0, 31.0]),
    ("ta", "K", [260.0, 300.0]),
    ("vpd", "kPa", [0.0, 0.4, 3.9]),
    ("vpd", "hPa", [0.0, 4.0, 39.0]),
    ("rh", "%", [30.0, 99.0]),
    ("rh", "fraction", [0.3, 0.99]),
    ("p_air", "kPa", [85.0, 86.0]),
    ("swc", "m3 m-3", [0.12, 0.4]),
    ("swc", "percent", [12.0, 40.0]),
    ("le", "W m-2", [-50.0, 600.0]),  # no rule for fluxes
    ("ta", "degC", [np.nan, np.nan]),  # nothing to judge
])
def test_plausible_values_give_no_warning(variable, declared, values):
    assert units.sanity_warnings(values, variable, declared) == []


def test_implausible_without_a_fitting_unit_says_so():
    """Values no accepted unit makes plausible: the warning says none fits."""
    out = units.sanity_warnings([5000.0, 7000.0], "ta", "degC")
    assert len(out) == 1 and "no accepted unit fits" in out[0]

"""Loading, validating and merging QC rule sets (``qc_rules/*.toml``).

The network standard, ``qc_rules/standard.toml``, is also the schema: every key a rule
set or a site override may set must exist in the standard with a value of the same type.
A site's ``[qc]`` table names the base rule set (``rules = "standard"`` or a path to a TOML
file) and may override single keys in a ``[qc.override]`` table of the same shape::

    [qc]
    rules = "standard"
    [qc.override.variables.ta]
    range = [-45.0, 45.0]
    [qc.override.despike]
    z = 5.5

A rule file other than the standard may start with ``extends = "standard"`` (or another
rule set) and then holds only the keys it changes. Broken files raise
:class:`~pipeline.errors.RuleError` naming the file and the dotted key.

Durations are written as strings that :class:`pandas.Timedelta` parses (``"30 days"``,
``"2 h"``, ``"30min"``), never as counts of intervals; use :func:`duration`.
"""
from __future__ import annotations

import copy
import functools
import importlib.resources
import tomllib
from pathlib import Path

import pandas as pd

from .config import CANONICAL_VARIABLES
from .errors import RuleError

__all__ = ["load_rules", "standard_rules", "duration", "rule_set_path", "merge_rules", "validate_rules"]

_STANDARD = "standard"


def duration(value) -> pd.Timedelta:
    """A rule-file duration (``"30 days"``, ``"2 h"``) as a :class:`pandas.Timedelta`."""
    if isinstance(value, pd.Timedelta):
        return value
    return pd.Timedelta(value)


def _is_duration_text(value) -> bool:
    """A string pandas reads as a time span, with a number and a unit ("30" alone is not)."""
    if not isinstance(value, str):
        return False
    try:
        pd.Timedelta(value)
    except (ValueError, TypeError):
        return False
    return any(ch.isdigit() for ch in value) and any(ch.isalpha() for ch in value)


def rule_set_path(name: str) -> Path | None:
    """The packaged rule set called ``name`` (``qc_rules/NAME.toml``), or None."""
    res = importlib.resources.files("qc_rules").joinpath(f"{name}.toml")
    if res.is_file():
        return Path(str(res))
    return None


def _read_toml(path: Path) -> dict:
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise RuleError("rule file not found", file=path) from None
    except tomllib.TOMLDecodeError as exc:
        raise RuleError(f"not valid TOML ({exc})", file=path) from None
    except UnicodeDecodeError:
        raise RuleError("not UTF-8 text", file=path) from None


def standard_rules() -> dict:
    """The network standard rule set, parsed (a fresh copy the caller may change)."""
    path = rule_set_path(_STANDARD)
    if path is None:  # pragma: no cover - packaging error
        raise RuleError("the standard rule set is missing from the installation", file="qc_rules/standard.toml")
    return copy.deepcopy(_parsed_toml(path, path.stat().st_mtime_ns))


@functools.lru_cache(maxsize=4)
def _parsed_toml(path: Path, mtime_ns: int) -> dict:
    """The file parsed once per version (a stage asks for the standard several times a run)."""
    return _read_toml(path)


def _type_name(value) -> str:
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, (int, float)):
        return "number"
    if isinstance(value, str):
        return "duration" if _is_duration_text(value) else "string"
    if isinstance(value, list):
        return "list"
    if isinstance(value, dict):
        return "table"
    return type(value).__name__


def _variable_template(schema: dict) -> dict:
    """Every key any variable of the standard sets, with an example value."""
    template: dict = {}
    for table in schema.get("variables", {}).values():
        for key, value in table.items():
            template.setdefault(key, value)
    return template


def _check(schema: dict, override: dict, *, file, prefix: str, var_template: dict) -> None:
    for key, value in override.items():
        dotted = f"{prefix}{key}"
        if prefix == "" and key in ("extends", "description"):
            if not isinstance(value, str):
                raise RuleError("must be a string", file=file, key=dotted)
            continue
        if prefix == "variables.":
            if key not in CANONICAL_VARIABLES:
                raise RuleError(
                    f"unknown variable {key!r} (canonical variables: {', '.join(CANONICAL_VARIABLES)})",
                    file=file, key=dotted)
            if not isinstance(value, dict):
                raise RuleError("must be a table of rules", file=file, key=dotted)
            expected_table = {**var_template, **schema.get(key, {})}
            _check(expected_table, value, file=file, prefix=dotted + ".", var_template=var_template)
            continue
        if key not in schema:
            raise RuleError("unknown key (not in the standard rule set)", file=file, key=dotted)
        expected = schema[key]
        got_t, want_t = _type_name(value), _type_name(expected)
        if want_t == "duration":
            if not _is_duration_text(value):
                raise RuleError(f"must be a duration such as \"30 min\" or \"2 days\", got {value!r}",
                                file=file, key=dotted)
        elif want_t == "table":
            if not isinstance(value, dict):
                raise RuleError(f"must be a table, got {got_t}", file=file, key=dotted)
            if expected and all(isinstance(v, dict) for v in expected.values()) and key not in ("variables",):
                # a table of named sub-tables (free names), each of the standard's first shape
                first = next(iter(expected.values()))
                for sub, subval in value.items():
                    if sub in expected:
                        _check(expected[sub], subval, file=file, prefix=f"{dotted}.{sub}.", var_template=var_template)
                    elif isinstance(subval, dict):
                        _check(first, subval, file=file, prefix=f"{dotted}.{sub}.", var_template=var_template)
                    else:
                        raise RuleError("must be a table", file=file, key=f"{dotted}.{sub}")
            else:
                _check(expected, value, file=file,
                       prefix=dotted + ".", var_template=var_template)
        elif want_t != got_t:
            raise RuleError(f"must be a {want_t}, got {got_t} {value!r}", file=file, key=dotted)
        elif want_t == "list" and expected and value:
            want_el, got_el = _type_name(expected[0]), _type_name(value[0])
            if any(_type_name(v) != want_el for v in value) and not (want_el == "list" and got_el == "list"):
                raise RuleError(f"must be a list of {want_el} values", file=file, key=dotted)
        if (key == "range" or key.endswith("_range")) and isinstance(value, list):
            if len(value) != 2 or not all(_type_name(v) == "number" for v in value):
                raise RuleError("must be [min, max]", file=file, key=dotted)
            if value[0] > value[1]:
                raise RuleError(f"min {value[0]} is above max {value[1]}", file=file, key=dotted)
        if want_t == "duration" and pd.Timedelta(value) < pd.Timedelta(0):
            raise RuleError(f"must not be negative, got {value!r}", file=file, key=dotted)
        if key in _POSITIVE_DURATIONS and want_t == "duration" and pd.Timedelta(value) <= pd.Timedelta(0):
            raise RuleError(f"must be a positive time span, got {value!r}", file=file, key=dotted)
        special = _SPECIAL.get(dotted.split("qc.override.")[-1])
        if special is not None:
            special(value, file=file, key=dotted)
        elif (isinstance(value, list) and dotted.split(".")[0] in _QC_SECTIONS
              and (key in ("apply_to", "variables") or key.endswith("_variables"))):
            _check_variable_list(value, file=file, key=dotted)


def _check_variable_list(value, *, file, key) -> None:
    for name in value:
        if not isinstance(name, str) or name not in CANONICAL_VARIABLES:
            raise RuleError(f"unknown variable {name!r} (canonical variables: {', '.join(CANONICAL_VARIABLES)})",
                            file=file, key=key)


def _check_monthly(value, *, file, key) -> None:
    if value and (len(value) != 12 or not all(_type_name(v) == "number" for v in value)):
        raise RuleError(f"must be 12 monthly numbers (January first), got {len(value)} values",
                        file=file, key=key)


def _check_sectors(value, *, file, key) -> None:
    for i, pair in enumerate(value):
        if (not isinstance(pair, list) or len(pair) != 2
                or not all(_type_name(v) == "number" for v in pair)
                or not all(0.0 <= v <= 360.0 for v in pair)):
            raise RuleError(f"entry {i + 1} must be [from, to] in degrees 0..360, got {pair!r}",
                            file=file, key=key)


#: sections of the QC stage whose variable lists must name canonical variables
_QC_SECTIONS = frozenset({"despike", "met", "wet", "ustar", "sectors", "snow", "instrument"})

#: duration keys that must be longer than zero (a block, a reference span, a flat-line span)
_POSITIVE_DURATIONS = frozenset({"block", "step_per", "flat_line"})

#: dotted keys with a check of their own beyond the standard's type
_SPECIAL = {
    "ustar.monthly": _check_monthly,
    "sectors.exclude": _check_sectors,
}


def merge_rules(base: dict, override: dict) -> dict:
    """A new rule dict: ``base`` with every key ``override`` sets replaced (tables merged)."""
    return _merge(base, override)


def _merge(base: dict, override: dict) -> dict:
    out = copy.deepcopy(base)
    for key, value in override.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def validate_rules(rules: dict, *, file, schema: dict | None = None) -> None:
    """Raise :class:`RuleError` if ``rules`` sets a key the standard does not know, or a wrong type."""
    schema = standard_rules() if schema is None else schema
    _check(schema, rules, file=file, prefix="", var_template=_variable_template(schema))


def load_rule_file(spec: str | Path, *, relative_to: Path | None = None, _seen=()) -> dict:
    """Load a rule set by packaged name or path, following ``extends``; validated."""
    schema = standard_rules()
    name = str(spec)
    packaged = rule_set_path(name) if "/" not in name and not name.endswith(".toml") else None
    if name == _STANDARD:
        return schema
    if packaged is not None:
        path = packaged
    else:
        path = Path(name)
        if not path.is_absolute() and relative_to is not None:
            path = relative_to / path
    if path in _seen:
        raise RuleError("rule sets extend each other in a circle", file=path, key="extends")
    data = _read_toml(path)
    validate_rules(data, file=path, schema=schema)
    base_name = data.pop("extends", _STANDARD)
    data.pop("description", None)
    base = load_rule_file(base_name, relative_to=path.parent, _seen=(*_seen, path))
    return _merge(base, data)


def load_rules(spec: str | Path = _STANDARD, *, site_overrides: dict | None = None,
               site_file: str | Path | None = None, relative_to: Path | None = None) -> dict:
    """The effective rule set of a run: the named base plus a site's ``[qc.override]``.

    Parameters
    ----------
    spec : str or path
        ``"standard"``, another packaged rule set's name, or a path to a TOML file.
    site_overrides : dict, optional
        The site's ``[qc.override]`` table, same shape as a rule file.
    site_file : path, optional
        The site TOML, named in error messages about ``site_overrides``.
    relative_to : path, optional
        Folder that relative rule-file paths are resolved against (the site TOML's).
    """
    rules = load_rule_file(spec, relative_to=relative_to)
    if site_overrides:
        schema = standard_rules()
        try:
            _check(schema, site_overrides, file=site_file, prefix="", var_template=_variable_template(schema))
        except RuleError as exc:
            raise RuleError(exc.message, file=exc.file, key=f"qc.override.{exc.key}") from None
        rules = _merge(rules, site_overrides)
    return rules

"""Rejection bits of the ``<var>_flag`` columns (CONTRACT §4). A value may carry several.

0 means accepted. Every stage that rejects a value ORs its bit into the variable's flag;
nothing ever clears a bit set by an earlier stage.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

MISSING = 1  #: missing in the source
RANGE = 2  #: outside the physical range of the rule set
SPIKE = 4  #: spike (despiking)
INSTRUMENT = 8  #: rejected by an upstream or instrument flag
WET = 16  #: rain or a wet sensor
LOW_TURBULENCE = 32  #: friction velocity below threshold
HISTORY = 64  #: excluded by the site history
CONSISTENCY = 128  #: failed a consistency check
FLAT_LINE = 256  #: flat line (a stuck sensor repeating its value)
SECTOR = 512  #: wind from an excluded sector
SNOW = 1024  #: snow or frozen conditions
CLOCK = 2048  #: suspect clock

#: bit -> (short name, meaning); the short names label report legends and parquet metadata
BITS: dict[int, tuple[str, str]] = {
    MISSING: ("missing", "missing in the source"),
    RANGE: ("out_of_range", "outside the physical range of the rule set"),
    SPIKE: ("spike", "spike (despiking)"),
    INSTRUMENT: ("instrument_flag", "rejected by an upstream or instrument flag"),
    WET: ("wet", "rain or a wet sensor"),
    LOW_TURBULENCE: ("low_turbulence", "low turbulence (friction velocity below threshold)"),
    HISTORY: ("history_exclusion", "excluded by the site history"),
    CONSISTENCY: ("inconsistent", "failed a consistency check"),
    FLAT_LINE: ("flat_line", "flat line (a stuck sensor repeating its value)"),
    SECTOR: ("excluded_sector", "wind from an excluded sector"),
    SNOW: ("snow_or_frozen", "snow or frozen conditions"),
    CLOCK: ("suspect_clock", "suspect clock"),
}

FLAG_DTYPE = np.int32


def describe(bits: int) -> list[str]:
    """The short names of the reasons set in ``bits``."""
    return [name for bit, (name, _) in BITS.items() if bits & bit]


def set_bit(flags: pd.DataFrame, variable: str, mask, bit: int) -> None:
    """OR ``bit`` into ``flags[variable]`` where ``mask`` is true (in place on ``flags``)."""
    mask = np.asarray(mask, dtype=bool)
    if not mask.any() and flags[variable].dtype == FLAG_DTYPE:
        return  # nothing to set: the column stays as it is (no frame write)
    col = flags[variable].to_numpy(copy=True)
    col[mask] |= bit
    flags[variable] = col.astype(FLAG_DTYPE)


def accepted(flags: pd.DataFrame, variable: str) -> np.ndarray:
    """Boolean array: the value of ``variable`` is accepted (flag == 0)."""
    return flags[variable].to_numpy() == 0


def count_by_reason(flags: pd.Series) -> dict[str, int]:
    """How many values carry each reason (a value with two reasons counts twice)."""
    arr = flags.to_numpy()
    return {name: int(np.count_nonzero(arr & bit)) for bit, (name, _) in BITS.items()}


def accepted_values(frame: pd.DataFrame, flags: pd.DataFrame | None, variable: str, *,
                    ignore: int = 0) -> np.ndarray | None:
    """``frame[variable]`` as float, NaN where a flag bit other than those in ``ignore`` is set.

    Returns None when the frame has no such column.
    """
    if variable not in frame.columns:
        return None
    values = frame[variable].to_numpy(dtype=float, copy=True)
    if flags is not None and variable in flags.columns:
        values[(flags[variable].to_numpy() & ~ignore) != 0] = np.nan
    return values

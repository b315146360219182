"""Despiking of half-hourly fluxes after Papale et al. (2006).

The statistic is the double difference of consecutive values,

    d_i = (x_i - x_{i-1}) - (x_{i+1} - x_i),

undefined next to a gap. Within a block of consecutive intervals (13 days in the paper)
and separately for day and night, a value is a candidate spike where

    d_i < Md - z * MAD / 0.6745   or   d_i > Md + z * MAD / 0.6745,

with Md the median of d and MAD = median(|d - Md|) of that block and period
(Papale et al. 2006, eqs. 1-3; z = 4 default, 5.5 and 7 flag fewer).

A single outlier of height A makes d about 2A at the outlier and about -A at each of its
two neighbours, so with a large A the neighbours are candidates too. The paper flags the
candidates; we flag only the outlier itself. A candidate is a spike when, in addition,

1. it is a local extremum in the direction of its deviation: for d above the median the
   value lies above both neighbours, for d below the median below both;
2. both single steps to its neighbours are at least a quarter of the threshold
   T = z * MAD / 0.6745 (the neighbour of a spike has one ordinary step, also when the
   spike sits next to a gap);
3. its deviation |d - Md| is not smaller than that of either neighbour;
4. except for two spikes of the same sign two intervals apart: the ordinary value between
   them then has the largest |d|, passes 1-3 and has both neighbours passing 1-2 with the
   opposite sign, and each neighbour's two steps are of similar size (the smaller at least
   half the larger; the neighbour of a single spike has one ordinary step, which noise can
   lift over the bound of 2 but rarely to half the spike); that pattern flags the two outer
   values, not the middle one.

For an isolated spike these select exactly the spike (tests/test_despike.py). The
additional conditions are ours; they only remove candidates, never add any. Two spikes in
consecutive intervals (a two-value plateau) hide each other from the double difference,
as in the paper.

References
----------
Papale, D., Reichstein, M., Aubinet, M., et al., 2006. Towards a standardized processing
of Net Ecosystem Exchange measured with eddy covariance technique: algorithms and
uncertainty estimation. Biogeosciences 3, 571-583.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = [
    "MAD_TO_SIGMA",
    "double_differences",
    "block_numbers",
    "group_median_mad",
    "despike",
]

#: MAD of a normal sample divided by this estimates its standard deviation
#: (0.6745 = Phi^-1(0.75); Papale et al. 2006, eq. 3).
MAD_TO_SIGMA = 0.6745

#: fraction of the spike threshold each single step next to a spike must reach (ours)
_STEP_FRACTION = 0.25

#: smaller step / larger step of a value that counts as a spike of its own in note 4 (ours)
_BALANCED_STEPS = 0.5


def double_differences(values) -> np.ndarray:
    """Double differences d_i = (x_i - x_{i-1}) - (x_{i+1} - x_i) (Papale et al. 2006, eq. 1).

    Parameters
    ----------
    values : array_like
        A regular series (missing values as NaN), any unit.

    Returns
    -------
    numpy.ndarray
        d, same unit and length; NaN at both ends and wherever x_{i-1}, x_i or x_{i+1}
        is missing.
    """
    x = np.asarray(values, dtype=float)
    d = np.full(x.shape, np.nan)
    if x.size >= 3:
        d[1:-1] = 2.0 * x[1:-1] - x[:-2] - x[2:]
    return d


def block_numbers(times: pd.DatetimeIndex, block: pd.Timedelta) -> np.ndarray:
    """Consecutive block number of every interval start, blocks anchored at the first start.

    The blocks do not move when data are appended: only the last block changes when the
    next week arrives, so values older than one block length are final. A short last
    block simply has few values (see ``min_values`` in :func:`despike`).

    Parameters
    ----------
    times : pandas.DatetimeIndex
        Interval starts, sorted.
    block : pandas.Timedelta
        Block length (Papale et al. 2006: 13 days).

    Returns
    -------
    numpy.ndarray of int64
    """
    if len(times) == 0:
        return np.zeros(0, dtype=np.int64)
    if block <= pd.Timedelta(0):
        raise ValueError("block length must be positive")
    elapsed = (times - times[0]).to_numpy().astype("timedelta64[ns]").astype(np.int64)
    blocks = elapsed // block.value
    return blocks.astype(np.int64)


def group_median_mad(d, groups) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-group median Md, MAD = median(|d - Md|) and count of defined d, broadcast back.

    Parameters
    ----------
    d : array_like
        Double differences (NaN ignored).
    groups : array_like of int
        Group label of every element (e.g. block * 2 + is_day).

    Returns
    -------
    median, mad, count : numpy.ndarray
        For every element, its group's statistics (NaN / 0 for a group without values).
    """
    s = pd.Series(np.asarray(d, dtype=float))
    g = pd.Series(np.asarray(groups))
    grouped = s.groupby(g.to_numpy())
    med = grouped.transform("median").to_numpy()
    mad = (s - med).abs().groupby(g.to_numpy()).transform("median").to_numpy()
    count = grouped.transform("count").to_numpy()
    return med, mad, count


def despike(values, times: pd.DatetimeIndex, is_day, *, z: float = 4.0,
            block: pd.Timedelta = pd.Timedelta(days=13), min_values: int = 50) -> np.ndarray:
    """Spikes in a flux series (Papale et al. 2006), one flagged value per isolated spike.

    Parameters
    ----------
    values : array_like
        The flux with every value not accepted so far set to NaN, any unit.
    times : pandas.DatetimeIndex
        Interval starts (regular, complete), same length.
    is_day : array_like of bool
        Day (True) or night (False) of every interval; the two are tested separately.
    z : float
        Threshold multiplier (Papale et al. 2006: 4, 5.5 or 7).
    block : pandas.Timedelta
        Block length (Papale et al. 2006: 13 days).
    min_values : int
        A block's day or night group with fewer defined double differences is not tested
        (the median and MAD of a handful of values mean little; polar day and night,
        short records). Ours.

    Returns
    -------
    numpy.ndarray of bool
        True where the value is a spike.
    """
    x = np.asarray(values, dtype=float)
    n = x.size
    if n < 3:
        return np.zeros(n, dtype=bool)
    day = np.asarray(is_day, dtype=bool)
    d = double_differences(x)
    groups = block_numbers(times, block) * 2 + day.astype(np.int64)
    med, mad, count = group_median_mad(d, groups)
    threshold = z * mad / MAD_TO_SIGMA
    testable = (count >= min_values) & (mad > 0) & np.isfinite(d)
    dev = np.where(testable, d - med, np.nan)
    candidate = testable & (np.abs(dev) > threshold)

    # the spike is the candidate itself, not its neighbours (module notes 1-4)
    step_in = np.full(n, np.nan)
    step_out = np.full(n, np.nan)
    step_in[1:] = x[1:] - x[:-1]
    step_out[:-1] = x[1:] - x[:-1]
    with np.errstate(invalid="ignore"):
        up = (dev > 0) & (step_in > 0) & (step_out < 0)
        down = (dev < 0) & (step_in < 0) & (step_out > 0)
        tall = np.minimum(np.abs(step_in), np.abs(step_out)) >= _STEP_FRACTION * threshold
    strong = candidate & (up | down) & tall
    absdev = np.nan_to_num(np.abs(dev), nan=0.0)
    left = np.concatenate(([0.0], absdev[:-1]))
    right = np.concatenate((absdev[1:], [0.0]))
    dominant = (absdev >= left) & (absdev >= right)
    # an ordinary value between two spikes two intervals apart (module note 4)
    sign = np.sign(np.nan_to_num(dev, nan=0.0))
    strong_left = np.concatenate(([False], strong[:-1]))
    strong_right = np.concatenate((strong[1:], [False]))
    sign_left = np.concatenate(([0.0], sign[:-1]))
    sign_right = np.concatenate((sign[1:], [0.0]))
    # ... and the two outer values are spikes of their own: both their steps of about the
    # same size (a single spike's neighbour has one ordinary step, which noise can make
    # 'tall' but rarely half the spike's step)
    big = np.fmax(np.abs(step_in), np.abs(step_out))
    with np.errstate(invalid="ignore"):
        balanced = np.minimum(np.abs(step_in), np.abs(step_out)) >= _BALANCED_STEPS * big
    balanced_left = np.concatenate(([False], balanced[:-1]))
    balanced_right = np.concatenate((balanced[1:], [False]))
    between = (strong & strong_left & strong_right & (sign_left == -sign) & (sign_right == -sign)
               & balanced_left & balanced_right)
    outer = np.concatenate((between[1:], [False])) | np.concatenate(([False], between[:-1]))
    return strong & ~between & (dominant | outer)

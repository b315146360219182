"""Timestamps as loggers write them (pipeline.ingest.read_logger_file). All data invented.

Expected values follow by hand arithmetic from the invented inputs and the documented rules
(CONTRACT §2: value = raw * scale + offset, interval starts, fixed UTC offsets; the
aggregation and snapping rules in the pipeline.ingest module notes, "common practice");
oracle libraries are named where they are used (pint, scipy, hashlib).
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.config import SiteInfo, StreamConfig
from pipeline.errors import InputError, TowerflowWarning
from pipeline.ingest import dst_switch_dates, read_logger_file


def make_site(offset=1.0, interval=30) -> SiteInfo:
    return SiteInfo(id="invented-meadow", name="Invented meadow", latitude=46.5, longitude=7.9,
                    elevation_m=820.0, utc_offset_hours=offset, canopy_height_m=0.3,
                    measurement_height_m=2.0, interval_minutes=interval)


def make_stream(ts=("TIMESTAMP",), fmt="%Y-%m-%d %H:%M", marks="start", interval=30, **kw) -> StreamConfig:
    base = dict(name="main", match=None, timestamp_column=tuple(ts), timestamp_format=fmt,
                timestamp_marks=marks, interval_minutes=interval, missing=(-9999,),
                columns={"le": ("LE",)})
    base.update(kw)
    return StreamConfig(**base)


def write(tmp_path, text, name="invented_flux.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def read(path, stream, site=None):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = read_logger_file(path, stream, site or make_site())
    return out, [str(w.message) for w in caught if issubclass(w.category, TowerflowWarning)]


def utc(*stamps):
    return pd.DatetimeIndex(list(stamps), name="timestamp_start").tz_localize("UTC")


# ---------------------------------------------------------------------------------------
# forms
# ---------------------------------------------------------------------------------------
def test_single_column_start_and_end_marks(tmp_path):
    """Start-marked stamps are the interval start; end-marked ones are one interval later."""
    text = "TIMESTAMP,LE\n2025-06-01 00:00,1\n2025-06-01 00:30,2\n"
    path = write(tmp_path, text)
    start, _ = read(path, make_stream(marks="start"))
    assert start.raw.index.equals(utc("2025-05-31 23:00", "2025-05-31 23:30"))
    end, _ = read(path, make_stream(marks="end"))
    assert end.raw.index.equals(utc("2025-05-31 22:30", "2025-05-31 23:00"))
    assert list(end.raw["LE"]) == [1.0, 2.0]
    assert end.interval == pd.Timedelta(minutes=30)


def test_date_and_time_columns_joined(tmp_path):
    path = write(tmp_path, "DATE,TIME,LE\n2025-06-01,12:00,1\n2025-06-01,12:30,2\n")
    out, _ = read(path, make_stream(ts=("DATE", "TIME"), fmt="%Y-%m-%d %H:%M"))
    assert out.raw.index.equals(utc("2025-06-01 11:00", "2025-06-01 11:30"))
    assert "DATE" not in out.raw.columns and list(out.raw.columns) == ["LE"]


def test_year_day_of_year_hhmm_without_colon(tmp_path):
    """year + day of year + hhmm: '130' is 01:30 (not 13:00), '0' is 00:00, day 32 is 1 Feb."""
    text = "YEAR,DOY,HHMM,LE\n2025,32,0,1\n2025,32,30,2\n2025,32,100,3\n2025,32,130,4\n2025,32,1330,5\n"
    path = write(tmp_path, text)
    out, _ = read(path, make_stream(ts=("YEAR", "DOY", "HHMM"), fmt="%Y %j %H%M"), make_site(offset=0))
    assert out.raw.index.equals(utc("2025-02-01 00:00", "2025-02-01 00:30", "2025-02-01 01:00",
                                    "2025-02-01 01:30", "2025-02-01 13:30"))


def test_single_column_year_doy_hhmm(tmp_path):
    """The same form in one column separated by spaces."""
    path = write(tmp_path, "STAMP,LE\n2025 1 130,1\n2025 1 200,2\n")
    out, _ = read(path, make_stream(ts=("STAMP",), fmt="%Y %j %H%M"), make_site(offset=0))
    assert out.raw.index.equals(utc("2025-01-01 01:30", "2025-01-01 02:00"))


@pytest.mark.parametrize("fmt,stamps", [
    ("%Y-%m-%d %H:%M", ["2025-06-01 23:30", "2025-06-01 24:00", "2025-06-02 00:30"]),
    ("%Y-%m-%d %H:%M:%S", ["2025-06-01 23:30:00", "2025-06-01 24:00:00", "2025-06-02 00:30:00"]),
    ("%d.%m.%Y %H:%M", ["01.06.2025 23:30", "01.06.2025 24:00", "02.06.2025 00:30"]),
])
def test_24_00_is_midnight_of_the_next_day(tmp_path, fmt, stamps):
    """'24:00' of a day is 00:00 of the next day (end-marked logger convention, common practice)."""
    body = "".join(f"{s},{i}\n" for i, s in enumerate(stamps))
    out, _ = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(fmt=fmt, marks="end"), make_site(offset=0))
    assert out.raw.index.equals(utc("2025-06-01 23:00", "2025-06-01 23:30", "2025-06-02 00:00"))


def test_2400_in_hhmm_column(tmp_path):
    path = write(tmp_path, "YEAR,DOY,HHMM,LE\n2025,10,2330,1\n2025,10,2400,2\n")
    out, _ = read(path, make_stream(ts=("YEAR", "DOY", "HHMM"), fmt="%Y %j %H%M", marks="end"), make_site(offset=0))
    assert out.raw.index.equals(utc("2025-01-10 23:00", "2025-01-10 23:30"))


def test_jitter_snaps_to_grid_with_one_warning(tmp_path):
    """12:30:01 and 12:59:58 snap to 12:30 and 13:00 (within 10 % of 30 min); one warning."""
    text = "TIMESTAMP,LE\n2025-06-01 12:00,1\n2025-06-01 12:30:01,2\n2025-06-01 12:59:58,3\n"
    out, warned = read(write(tmp_path, text), make_stream(), make_site(offset=0))
    assert out.raw.index.equals(utc("2025-06-01 12:00", "2025-06-01 12:30", "2025-06-01 13:00"))
    snap = [w for w in warned if "snapped" in w]
    assert len(snap) == 1 and "2 stamps" in snap[0] and "row 3" in snap[0]


def test_jitter_beyond_tolerance_is_error_naming_row(tmp_path):
    text = "TIMESTAMP,LE\n2025-06-01 12:00,1\n2025-06-01 12:34,2\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, text), make_stream())
    msg = str(info.value)
    assert "invented_flux.csv" in msg and "row 3" in msg and "off the" in msg and "\n" not in msg


@pytest.mark.parametrize("offset,local,expected_utc", [
    (5.5, "2025-01-01 06:00", "2025-01-01 00:30"),  # fractional offset (e.g. UTC+5:30)
    (-3.5, "2025-01-01 06:00", "2025-01-01 09:30"),
    (0.0, "2025-01-01 06:00", "2025-01-01 06:00"),
    (-8.0, "2025-01-01 20:00", "2025-01-02 04:00"),
])
def test_fixed_utc_offsets(tmp_path, offset, local, expected_utc):
    out, _ = read(write(tmp_path, f"TIMESTAMP,LE\n{local},1\n"), make_stream(), make_site(offset=offset))
    assert out.raw.index.equals(utc(expected_utc))


def test_sixty_minute_stream_with_fractional_offset(tmp_path):
    """A 60-min stream at UTC+5.5: local whole hours are UTC half hours."""
    text = "TIMESTAMP,LE\n2025-01-01 06:00,1\n2025-01-01 07:00,2\n"
    out, _ = read(write(tmp_path, text), make_stream(interval=60), make_site(offset=5.5, interval=60))
    assert out.raw.index.equals(utc("2025-01-01 00:30", "2025-01-01 01:30"))
    assert out.interval == pd.Timedelta(hours=1)


def test_interval_inferred_when_not_declared(tmp_path):
    text = "TIMESTAMP,LE\n2025-01-01 00:10,1\n2025-01-01 00:20,2\n2025-01-01 00:30,2\n"
    out, _ = read(write(tmp_path, text), make_stream(interval=None, marks="end"), make_site(offset=0))
    assert out.interval == pd.Timedelta(minutes=10)
    assert out.raw.index[0] == pd.Timestamp("2025-01-01 00:00", tz="UTC")


def test_seconds_in_stamps_with_minute_format(tmp_path):
    """Stamps with ':00' seconds parse under a format without %S."""
    out, _ = read(write(tmp_path, "TIMESTAMP,LE\n2025-06-01 12:00:00,1\n"), make_stream(), make_site(offset=0))
    assert out.raw.index.equals(utc("2025-06-01 12:00"))


# ---------------------------------------------------------------------------------------
# order, duplicates
# ---------------------------------------------------------------------------------------
def test_out_of_order_rows_sorted_with_warning(tmp_path):
    text = "TIMESTAMP,LE\n2025-06-01 12:00,1\n2025-06-01 13:00,3\n2025-06-01 12:30,2\n"
    out, warned = read(write(tmp_path, text), make_stream(), make_site(offset=0))
    assert list(out.raw["LE"]) == [1.0, 2.0, 3.0]
    assert list(out.rows) == [2, 4, 3]
    assert any("out of order" in w and "row 4" in w for w in warned)


def test_identical_duplicates_merge(tmp_path):
    text = "TIMESTAMP,LE\n2025-06-01 12:00,1\n2025-06-01 12:30,2\n2025-06-01 12:30,2\n2025-06-01 13:00,3\n"
    out, warned = read(write(tmp_path, text), make_stream(), make_site(offset=0))
    assert list(out.raw["LE"]) == [1.0, 2.0, 3.0] and list(out.rows) == [2, 3, 5]
    assert any("identical values" in w and "row 4" in w for w in warned)


def test_conflicting_duplicates_are_error_naming_rows(tmp_path):
    text = "TIMESTAMP,LE\n2025-06-11 12:00,1\n2025-06-11 12:30,2\n2025-06-11 12:30,7\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, text), make_stream(), make_site(offset=0))
    msg = str(info.value)
    assert "rows 3 and 4" in msg and "'LE'" in msg and "different values" in msg and "\n" not in msg
    assert "daylight" not in msg


def test_nan_versus_value_duplicate_is_a_conflict(tmp_path):
    """'Identical' is strict: a missing cell against a value conflicts."""
    text = "TIMESTAMP,LE\n2025-06-01 12:00,1\n2025-06-01 12:00,-9999\n"
    with pytest.raises(InputError, match="different values"):
        read(write(tmp_path, text), make_stream(), make_site(offset=0))


# ---------------------------------------------------------------------------------------
# daylight-saving time
# ---------------------------------------------------------------------------------------
def test_dst_switch_dates_2025():
    """2025 switch dates (calendar: last/second/first Sundays, from memory of national rules)."""
    d = dst_switch_dates([2025])
    for day in ("2025-03-30", "2025-10-26", "2025-03-09", "2025-11-02", "2025-04-06", "2025-10-05", "2025-09-28"):
        assert pd.Timestamp(day).date() in d
    assert pd.Timestamp("2025-06-15").date() not in d


def _series(start, n, skip_at=None, repeat_at=None, step="30min"):
    stamps = list(pd.date_range(start, periods=n, freq=step))
    if skip_at is not None:
        stamps = [s if s < pd.Timestamp(skip_at) else s + pd.Timedelta(hours=1) for s in stamps]
    if repeat_at is not None:
        k = stamps.index(pd.Timestamp(repeat_at))
        stamps = stamps[:k] + [s - pd.Timedelta(hours=1) for s in stamps[k:]]
    return stamps


def test_missing_spring_hour_warns_dst(tmp_path):
    """Stamps jump 01:30 -> 03:00 on 2025-03-30 (Europe's spring switch): DST warning."""
    stamps = _series("2025-03-30 00:00", 8, skip_at="2025-03-30 02:00")
    body = "".join(f"{s:%Y-%m-%d %H:%M},{i}\n" for i, s in enumerate(stamps))
    out, warned = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream())
    dst = [w for w in warned if "daylight-saving" in w]
    assert len(dst) == 1 and "skip one hour" in dst[0] and "row 6" in dst[0]
    assert len(out.raw) == 8


def test_missing_hour_southern_hemisphere_warns(tmp_path):
    """A 1-hour hole on 2025-10-05 (south-east Australia's spring switch) also warns."""
    stamps = _series("2025-10-05 01:00", 6, skip_at="2025-10-05 02:00")
    body = "".join(f"{s:%Y-%m-%d %H:%M},{i}\n" for i, s in enumerate(stamps))
    _, warned = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(), make_site(offset=10))
    assert any("daylight-saving" in w for w in warned)


def test_hole_on_an_ordinary_day_is_not_dst(tmp_path):
    stamps = _series("2025-06-15 00:00", 8, skip_at="2025-06-15 02:00")
    body = "".join(f"{s:%Y-%m-%d %H:%M},{i}\n" for i, s in enumerate(stamps))
    _, warned = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream())
    assert not any("daylight" in w for w in warned)


def test_repeated_autumn_hour_identical_values_warns_dst(tmp_path):
    """The local hour 02:00-03:00 of 2025-10-26 written twice with the same values: merged, DST warning."""
    body = ("2025-10-26 01:30,1\n2025-10-26 02:00,2\n2025-10-26 02:30,3\n"
            "2025-10-26 02:00,2\n2025-10-26 02:30,3\n2025-10-26 03:00,4\n")
    out, warned = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream())
    assert any("daylight-saving" in w and "repeat one hour" in w for w in warned)
    assert len(out.raw) == 4


def test_repeated_autumn_hour_conflicting_values_error_mentions_dst(tmp_path):
    """Conflicting values in a repeated hour on a switch date: the error explains DST."""
    body = ("2025-10-26 01:30,1\n2025-10-26 02:00,2\n2025-10-26 02:30,3\n"
            "2025-10-26 02:00,5\n2025-10-26 02:30,6\n2025-10-26 03:00,4\n")
    with pytest.raises(InputError) as info:
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream())
    msg = str(info.value)
    assert "daylight-saving" in msg and "rows 3 and 5" in msg and "\n" not in msg


def test_repeated_hour_sixty_minute_stream(tmp_path):
    """60-min stream: the repeated hour is one duplicated stamp."""
    body = "2025-10-26 01:00,1\n2025-10-26 02:00,2\n2025-10-26 02:00,2\n2025-10-26 03:00,3\n"
    _, warned = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(interval=60), make_site(interval=60))
    assert any("repeat one hour" in w for w in warned)


# ---------------------------------------------------------------------------------------
# swapped day and month, unparseable stamps
# ---------------------------------------------------------------------------------------
def test_day_month_swapped_rows_fail_declared_format(tmp_path):
    """Rows edited in a spreadsheet to month/day fail the declared day/month format -> error says swapped."""
    body = "12/03/2025 23:30,1\n03/13/2025 00:00,2\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(fmt="%d/%m/%Y %H:%M"))
    msg = str(info.value)
    assert "swapped" in msg and "row 3" in msg and "TIMESTAMP" in msg and "\n" not in msg


def test_day_month_swapped_dates_jump(tmp_path):
    """All rows parse, but days <= 12 swapped make the dates jump by months -> error says swapped."""
    body = "11/03/2025 23:00,1\n11/03/2025 23:30,2\n03/12/2025 00:00,3\n03/12/2025 00:30,4\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(fmt="%m/%d/%Y %H:%M"))
    msg = str(info.value)
    assert "swapped" in msg and "row 4" in msg and "\n" not in msg


def test_genuine_long_gap_is_not_called_swapped(tmp_path):
    """A jump the swapped reading does not remove is a gap, not an error."""
    body = "2025-03-01 00:00,1\n2025-05-20 00:00,2\n"
    out, _ = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream())
    assert len(out.raw) == 2


@pytest.mark.parametrize("bad", ["2025-06-01 noon", "01/06/2025 12:00", "garbage"])
def test_unparseable_timestamp_is_error_naming_row_and_column(tmp_path, bad):
    body = f"2025-06-01 11:30,1\n{bad},2\n"
    with pytest.raises(InputError) as info:
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream())
    msg = str(info.value)
    assert "invented_flux.csv" in msg and "row 3" in msg and "'TIMESTAMP'" in msg
    assert "does not match timestamp_format" in msg and "\n" not in msg


def test_empty_timestamp_cell_is_error(tmp_path):
    with pytest.raises(InputError, match="row 3.*empty timestamp"):
        read(write(tmp_path, "TIMESTAMP,LE\n2025-06-01 11:30,1\n,2\n"), make_stream())


# ---------------------------------------------------------------------------------------
# property: random offsets, marks, intervals, formats
# ---------------------------------------------------------------------------------------
FORMS = [
    (("TIMESTAMP",), "%Y-%m-%d %H:%M", lambda t: [f"{t:%Y-%m-%d %H:%M}"]),
    (("D", "T"), "%d.%m.%Y %H:%M", lambda t: [f"{t:%d.%m.%Y}", f"{t:%H:%M}"]),
    (("Y", "J", "HM"), "%Y %j %H%M", lambda t: [f"{t.year}", f"{t.dayofyear}", f"{t.hour * 100 + t.minute}"]),
]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(offset=st.sampled_from([-9.5, -5.0, 0.0, 1.0, 5.5, 5.75, 12.0]),
       marks=st.sampled_from(["start", "end"]),
       interval=st.sampled_from([10, 30, 60]),
       form=st.sampled_from(FORMS),
       n=st.integers(1, 60),
       start_slot=st.integers(0, 5000),
       jitter=st.lists(st.integers(-2, 2), min_size=60, max_size=60))
def test_stamps_roundtrip_to_utc_starts(tmp_path, offset, marks, interval, form, n, start_slot, jitter):
    """Any form/offset/marks: read stamps equal local stamp - (interval if end) - offset, jitter snapped."""
    cols, fmt, render = form
    step = pd.Timedelta(minutes=interval)
    starts_local = pd.date_range(pd.Timestamp("2024-12-20") + step * start_slot, periods=n, freq=step)
    marks_local = starts_local + (step if marks == "end" else pd.Timedelta(0))
    rows = []
    for i, t in enumerate(marks_local):
        t = t + pd.Timedelta(seconds=jitter[i]) if "Y" not in cols else t  # hhmm has no seconds
        if t.second:
            parts = render(t.floor("min")) if "Y" in cols else None
            text = [f"{t:%Y-%m-%d %H:%M:%S}"] if cols == ("TIMESTAMP",) else [f"{t:%d.%m.%Y}", f"{t:%H:%M:%S}"]
            rows.append(text if parts is None else parts)
        else:
            rows.append(render(t))
    header = ",".join([*cols, "LE"])
    body = "".join(",".join([*r, str(i)]) + "\n" for i, r in enumerate(rows))
    path = tmp_path / "prop.csv"
    path.write_text(header + "\n" + body)
    stream = make_stream(ts=cols, fmt=fmt, marks=marks, interval=interval)
    out, _ = read(path, stream, make_site(offset=offset))
    expected = (starts_local - pd.Timedelta(hours=offset)).tz_localize("UTC")
    assert np.array_equal(out.raw.index.asi8, pd.DatetimeIndex(expected).asi8)
    assert np.array_equal(out.raw["LE"].to_numpy(), np.arange(n, dtype=float))
    assert out.raw.index.is_unique and out.raw.index.is_monotonic_increasing


def test_whole_file_day_month_swapped(tmp_path):
    """Every day <= 12 written month-first: each midnight jumps a month; read swapped it is continuous."""
    stamps = pd.date_range("2025-03-09 00:00", "2025-03-12 23:30", freq="30min")
    body = "".join(f"{t:%Y-%d-%m %H:%M},{i}\n" for i, t in enumerate(stamps))
    with pytest.raises(InputError) as info:
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream())
    msg = str(info.value)
    assert "swapped" in msg and "row 50" in msg and "\n" not in msg


def test_sixty_minute_file_in_thirty_minute_stream_is_error(tmp_path):
    """Hourly stamps throughout in a stream declared 30 min: refused, not read as half-missing."""
    stamps = pd.date_range("2025-06-01 00:00", periods=24, freq="60min")
    body = "".join(f"{t:%Y-%m-%d %H:%M},{i}\n" for i, t in enumerate(stamps))
    with pytest.raises(InputError) as info:
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(interval=30))
    msg = str(info.value)
    assert "invented_flux.csv" in msg and "another averaging interval" in msg and "\n" not in msg


def test_jittered_stamps_all_steps_above_interval_are_not_another_interval(tmp_path):
    """Stamps 1 s later each row (every step 10:01 in a 10-min stream) are jitter within the snap
    tolerance, not a file of a longer interval (a case hypothesis found; regression)."""
    stamps = pd.date_range("2025-06-01 00:00", periods=4, freq="10min") + pd.to_timedelta([-1, 0, 1, 2], unit="s")
    body = "".join(f"{t:%Y-%m-%d %H:%M:%S},{i}\n" for i, t in enumerate(stamps))
    ing, _ = read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(fmt="%Y-%m-%d %H:%M:%S", interval=10))
    assert list(ing.raw.index.tz_convert(None)) == list(pd.date_range("2025-05-31 23:00", periods=4, freq="10min"))


def test_ten_minute_file_in_thirty_minute_stream_is_off_grid(tmp_path):
    stamps = pd.date_range("2025-06-01 00:00", periods=6, freq="10min")
    body = "".join(f"{t:%Y-%m-%d %H:%M},{i}\n" for i, t in enumerate(stamps))
    with pytest.raises(InputError, match="row 3.*off the"):
        read(write(tmp_path, "TIMESTAMP,LE\n" + body), make_stream(interval=30))

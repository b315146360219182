"""Logger exports → raw frames per stream; raw store frames → the working frame.

Two steps, with the site store in between (DEVELOPERS.md, "Stage interfaces"):

1. :func:`assign_stream` and :func:`read_logger_file` turn one CSV export into an
   :class:`IngestedFile`: the source columns as written (before any scaling or unit
   conversion) on the UTC starts of the stream's averaging intervals, with provenance.
2. :func:`build_working_frame` turns the stored raw frames of every stream into the
   working frame: canonical names and units, replicates averaged, shorter streams
   aggregated to the site interval on a complete regular grid in the site's time zone,
   history corrections, exclusions, site parameters and the ingest flag bits.

Reading conventions (documented choices)
----------------------------------------
* Delimiter: ``StreamConfig.delimiter`` or the most frequent of comma, semicolon and tab
  in the header line. ``StreamConfig.decimal`` declares a decimal comma.
* Line numbers in messages are 1-based file lines, the header being line 1.
* Non-numeric cells in numeric columns become missing; one warning per column gives the
  count, the first row and the first offending text.
* A last line with fewer fields than the header is a truncated write: warned and dropped.
* Timestamps may be off the stream grid by up to :data:`SNAP_TOLERANCE` of the interval
  (logger jitter, common practice); they snap to the nearest interval. Beyond: an error.
* ``24:00`` means midnight at the end of the day. ``hhmm`` without colon (``130`` = 01:30)
  is zero-padded before parsing when the format token is ``%H%M``.
* Duplicate stamps with identical values merge (warning); conflicting values are an error.
* Refused as declared wrongly rather than guessed: a decimal comma without
  ``input.decimal = ","``; a file whose stamps are all further apart than the stream's
  interval plus twice the snap tolerance (a 60-min export in a 30-min stream); day and month swapped (rows that parse
  only swapped, or file-order jumps of days that vanish when read swapped).
* Memory: the bytes are scanned once in blocks (sha256, fields per line: a row with more
  fields than the header is an error); pandas' C parser then reads only the stream's
  columns into preallocated arrays: in one call for a file of up to :data:`CHUNK_ROWS`
  rows, in chunks of :data:`CHUNK_ROWS` rows beyond, so a file of hundreds of MB needs
  little more than its parsed values.

Aggregation to the site interval (documented choices)
-----------------------------------------------------
* Means need at least :data:`MIN_SHARE` (2/3) of the sub-intervals present (common
  practice); precipitation is a sum and needs every sub-interval, since a partial sum is
  biased low; wind direction is the unweighted unit-vector mean (direction of the mean of
  the unit vectors, not weighted by wind speed), so 350° and 10° average to 0°.
* Sub-intervals rejected by an upstream flag (``[input.flags]``) are left out of the mean;
  when too few accepted ones remain, the value is the mean of all present ones and carries
  bit 8 (INSTRUMENT). For a stream at the site interval this is the plain rejection flag.
* Passthrough columns of an aggregated stream: numeric ones are averaged over the present
  sub-intervals, others carry the last sub-interval's value.
"""
from __future__ import annotations

import csv
import dataclasses
import fnmatch
import hashlib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from . import flags as flagbits
from . import history, units
from .config import CANONICAL_VARIABLES, SiteConfig, SiteInfo, StreamConfig
from .errors import ConfigError, InputError, warn

__all__ = [
    "IngestedFile",
    "SNAP_TOLERANCE",
    "MIN_SHARE",
    "assign_stream",
    "read_logger_file",
    "build_working_frame",
    "file_sha256",
    "dst_switch_dates",
]

#: fraction of the stream interval a stamp may lie off the grid and still snap (common practice)
SNAP_TOLERANCE = 0.10
#: minimum share of sub-intervals present for an aggregated mean (common practice)
MIN_SHARE = 2.0 / 3.0
#: rows parsed per chunk: memory stays near the output plus one chunk for files of any size
CHUNK_ROWS = 50_000
#: delimiters detected in the header line, in order of preference on a tie
DELIMITERS = (",", ";", "\t")
#: a file-order jump larger than this, which the day/month-swapped reading removes, is a swap
_SWAP_JUMP = pd.Timedelta(days=2)
#: format tokens that loggers write without leading zeros; zero-padded to this width
_PAD_WIDTH = {"%H%M": 4, "%H%M%S": 6, "%j": 3}
#: a number written with a decimal comma (12,5 or -0,25)
_DECIMAL_COMMA = r"\s*[-+]?\d*,\d+\s*"
#: an hour of "24" at the start of a time field (not a minute or second "24")
_HOUR_24 = re.compile(r"(?<![\d:])24(:?)00(?!\d)")


@dataclass
class IngestedFile:
    """One logger export, parsed, before any scaling or unit conversion.

    Attributes
    ----------
    path : Path
        The file read.
    sha256 : str
        sha256 of the file's bytes (provenance).
    stream : str
        ``StreamConfig.name`` of the stream the file belongs to.
    raw : pandas.DataFrame
        Index: ``DatetimeIndex`` named ``timestamp_start``, tz UTC, the start of each
        averaging interval on the stream's own grid (``timestamp_marks`` and the UTC offset
        applied, small jitter snapped), unique and sorted. Columns: the source column names
        exactly as in the file header — float64 for mapped variables and flag columns (raw
        values, sentinels turned into NaN), passthrough columns as read (strings allowed).
    rows : numpy.ndarray
        For each row of ``raw``, its 1-based line number in the file (for messages).
    interval : pandas.Timedelta
        The stream's averaging interval.
    warnings : list of str
        One-line warnings (file, row, column named) raised while reading.
    n_bad_cells : int
        Non-numeric cells turned into missing values.
    """

    path: Path
    sha256: str
    stream: str
    raw: pd.DataFrame
    rows: np.ndarray
    interval: pd.Timedelta
    warnings: list[str] = field(default_factory=list)
    n_bad_cells: int = 0


# =======================================================================================
# small helpers
# =======================================================================================
def file_sha256(path) -> str:
    """sha256 hex digest of a file's bytes, read in 1 MiB blocks (memory bounded)."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _short(value, width: int = 24) -> str:
    text = repr(str(value))
    return text if len(text) <= width else text[: width - 4] + "...'"


def _is_number(text: str) -> bool:
    try:
        float(text.replace(",", "."))
    except ValueError:
        return False
    return True


def _locate_decode_error(path: Path, encoding: str) -> tuple[int, int]:
    """(1-based line, byte value) of the first line that does not decode (error path only)."""
    with open(path, "rb") as fh:
        for lineno, line in enumerate(fh, start=1):
            try:
                line.decode(encoding)
            except UnicodeDecodeError as exc:
                return lineno, line[exc.start]
    return 0, 0  # pragma: no cover - the caller saw an error


def _decode_error(path: Path, encoding: str) -> InputError:
    lineno, byte = _locate_decode_error(path, encoding)
    return InputError(
        f"byte 0x{byte:02x} is not valid {encoding} text; declare the file's encoding "
        f"(input.encoding, e.g. \"latin-1\")", file=path, row=lineno or None)


@dataclass(frozen=True)
class _Header:
    names: list[str]
    delimiter: str
    encoding: str


def _read_header(path: Path, stream: StreamConfig) -> _Header:
    """The header line's column names, the delimiter and the effective encoding."""
    path = Path(path)
    with open(path, "rb") as fh:
        first = fh.readline()
        if first.strip() == b"":
            rest = fh.read(1 << 16)
            if first == b"" or rest.strip() == b"":
                raise InputError("the file is empty", file=path)
            raise InputError("line 1 is blank: the header line must come first", file=path, row=1)
    encoding = stream.encoding or "utf-8"
    if encoding.lower().replace("-", "") in ("utf8", "utf8sig"):
        encoding = "utf-8-sig" if first.startswith(b"\xef\xbb\xbf") else "utf-8"
    try:
        text = first.decode(encoding).rstrip("\r\n")
    except UnicodeDecodeError:
        raise _decode_error(path, encoding) from None
    if stream.delimiter:
        delimiter = stream.delimiter
    else:
        counts = [text.count(d) for d in DELIMITERS]
        if max(counts) == 0:
            raise InputError("no comma, semicolon or tab in the header line: not a delimited "
                             "table (set input.delimiter if it uses another one)", file=path, row=1)
        delimiter = DELIMITERS[int(np.argmax(counts))]
    names = [n.strip() for n in next(csv.reader([text], delimiter=delimiter))]
    return _Header(names, delimiter, encoding)


def _ts_columns(stream: StreamConfig) -> list[str]:
    """The timestamp column(s) as a list (a single name is accepted too)."""
    cols = stream.timestamp_column
    return [cols] if isinstance(cols, str) else list(cols)


def _stream_needs(stream: StreamConfig) -> list[str]:
    return list(dict.fromkeys([*_ts_columns(stream), *stream.source_columns()]))


def _check_header(path: Path, header: _Header, stream: StreamConfig) -> list[str]:
    """Raise for a missing header or absent/duplicated used columns; return warnings."""
    names = header.names
    needed = _stream_needs(stream)
    absent = [c for c in needed if c not in names]
    if absent:
        numeric = sum(_is_number(n) for n in names if n)
        if numeric >= max(1, len(names) // 2):
            raise InputError("the first line holds data, not column names: the file has no header line",
                             file=path, row=1)
        shown = ", ".join(names[:12]) + (", ..." if len(names) > 12 else "")
        raise InputError(f"mapped column not found in the header (header: {shown})",
                         file=path, row=1, column=absent[0])
    seen: dict[str, int] = {}
    for n in names:
        seen[n] = seen.get(n, 0) + 1
    dup_used = [c for c in needed if seen.get(c, 0) > 1]
    if dup_used:
        raise InputError(f"the header holds this column name {seen[dup_used[0]]} times: "
                         "which one is meant is ambiguous", file=path, row=1, column=dup_used[0])
    dup_other = [n for n, k in seen.items() if k > 1]
    if dup_other:
        return [f"{path}: row 1: duplicate column names not used by the stream: "
                f"{', '.join(repr(n) for n in dup_other[:5])}"]
    return []


# =======================================================================================
# assign_stream
# =======================================================================================
def assign_stream(path, cfg: SiteConfig) -> StreamConfig:
    """The stream (``[input]`` / ``[[input]]``) a logger export belongs to.

    A stream whose ``match`` glob matches the file name takes the file. Otherwise the file
    goes to the one stream without a glob whose timestamp and mapped columns the header
    holds.

    Raises
    ------
    InputError
        No stream or several streams fit the file (the message names the file).
    """
    path = Path(path)
    name = path.name
    globbed = [s for s in cfg.inputs if s.match and fnmatch.fnmatch(name, s.match)]
    if len(globbed) == 1:
        return globbed[0]
    if len(globbed) > 1:
        raise InputError("the file name matches the patterns of several streams: "
                         + ", ".join(f"{s.name!r} ({s.match})" for s in globbed), file=path)
    fitting, first_error = [], None
    for stream in cfg.inputs:
        if stream.match:
            continue
        try:
            header = _read_header(path, stream)
        except InputError as exc:
            first_error = first_error or exc
            continue
        if all(c in header.names for c in _stream_needs(stream)):
            fitting.append(stream)
    if len(fitting) == 1:
        return fitting[0]
    if len(fitting) > 1:
        raise InputError("the header fits several streams ("
                         + ", ".join(repr(s.name) for s in fitting)
                         + "): give them input.match file-name patterns", file=path)
    if first_error is not None:
        raise first_error
    raise InputError("no stream fits the file: its name matches no input.match pattern and its "
                     "header lacks the timestamp or mapped columns of every stream", file=path)


# =======================================================================================
# read_logger_file
# =======================================================================================
def _csv_chunks(path: Path, header: _Header, stream: StreamConfig, n_rows: int):
    """The used columns as read by pandas' C parser (strings for timestamps): in one piece for a
    file of up to :data:`CHUNK_ROWS` data lines, else in chunks of :data:`CHUNK_ROWS` rows.

    In one piece the timestamp columns are read with the types the parser infers (no
    per-column conversion): as text when they hold text, the usual case; a file whose stamps
    read otherwise (numbers such as ``202506011230``) is read again with them as text.
    """
    needed = _stream_needs(stream)
    ts = _ts_columns(stream)
    str_missing = [str(m) for m in stream.missing]
    skip = sorted({int(r) + 1 for r in stream.skip_rows})  # file lines, header = 0
    options = dict(sep=header.delimiter, decimal=stream.decimal, header=0, usecols=needed,
                   na_values=str_missing, keep_default_na=True, skiprows=skip or None,
                   skip_blank_lines=False, encoding=header.encoding, engine="c", skipinitialspace=True)
    as_text = {c: str for c in ts}
    try:
        if n_rows <= CHUNK_ROWS:
            frame = pd.read_csv(path, **options)
            stamps = [frame[c].to_numpy() for c in ts]
            if not all(a.dtype == object and pd.api.types.infer_dtype(a, skipna=True) in ("string", "empty")
                       for a in stamps):
                frame = pd.read_csv(path, dtype=as_text, **options)
            yield frame
            return
        for chunk in pd.read_csv(path, dtype=as_text, chunksize=CHUNK_ROWS, **options):
            yield chunk.reset_index(drop=True)
    except UnicodeDecodeError:
        raise _decode_error(path, header.encoding) from None
    except pd.errors.EmptyDataError:
        raise InputError("the file is empty", file=path) from None
    except pd.errors.ParserError as exc:
        m = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", str(exc))
        if m:
            raise InputError(f"{m.group(3)} fields where the header has {m.group(1)}",
                             file=path, row=int(m.group(2))) from None
        raise InputError(f"not a readable delimited table ({' '.join(str(exc).split())})", file=path) from None


def _with_last(iterable):
    """Yield ``(item, is_last)`` with one item of look-ahead."""
    it = iter(iterable)
    try:
        current = next(it)
    except StopIteration:
        return
    for nxt in it:
        yield current, False
        current = nxt
    yield current, True


def _line_numbers(n_rows: int, skip_rows) -> np.ndarray:
    """1-based file line of each data row (header = line 1), given the skipped rows."""
    skipped = np.asarray(sorted({int(r) for r in skip_rows}), dtype=np.int64)
    candidates = np.arange(n_rows + skipped.size, dtype=np.int64)  # 0-based data rows
    kept = candidates[~np.isin(candidates, skipped)][:n_rows]
    return kept + 2


@dataclass(frozen=True)
class _Scan:
    sha256: str
    overfull_line: int | None  # first line with more fields than the header
    overfull_fields: int
    last_fields: int | None  # fields on the last non-blank line
    n_lines: int  # lines in the file, header included


def _scan_file(path: Path, delimiter: str, n_fields: int, block: int = 1 << 22) -> _Scan:
    """One pass over the bytes in blocks: sha256, field counts per line (numpy, no row loop).

    Lines holding a double quote are not counted (a quoted field may hold the delimiter).
    """
    digest = hashlib.sha256()
    d, nl, quote = ord(delimiter), ord("\n"), ord('"')
    carry = b""
    lines_before = 0
    overfull, overfull_k, last = None, 0, None

    def count(chunk: bytes, final: bool):
        nonlocal lines_before, overfull, overfull_k, last
        arr = np.frombuffer(chunk, dtype=np.uint8)
        ends = np.flatnonzero(arr == nl)
        if final and (ends.size == 0 or ends[-1] != arr.size - 1):
            ends = np.append(ends, arr.size)  # last line without a newline
        if ends.size == 0:
            return
        starts = np.concatenate([[0], ends[:-1] + 1])
        at_d = np.flatnonzero(arr == d)
        fields = np.searchsorted(at_d, ends) - np.searchsorted(at_d, starts) + 1
        at_q = np.flatnonzero(arr == quote)
        quoted = (np.searchsorted(at_q, ends) - np.searchsorted(at_q, starts)) > 0
        length = ends - starts
        cr = np.zeros(length.size, dtype=bool)
        has = length > 0
        cr[has] = arr[np.minimum(ends[has] - 1, arr.size - 1)] == ord("\r")
        nonblank = (length - cr) > 0
        bad = np.flatnonzero((fields > n_fields) & ~quoted & nonblank)
        if overfull is None and bad.size:
            overfull, overfull_k = int(lines_before + bad[0] + 1), int(fields[bad[0]])
        nb = np.flatnonzero(nonblank)
        if nb.size:
            last = int(fields[nb[-1]])
        lines_before += ends.size

    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(block), b""):
            digest.update(chunk)
            buf = carry + chunk
            cut = buf.rfind(b"\n") + 1
            if cut:
                count(buf[:cut], final=False)
            carry = buf[cut:]
    if carry:
        count(carry, final=True)
    return _Scan(digest.hexdigest(), overfull, overfull_k, last, lines_before)


def _to_float(column: pd.Series, decimal: str) -> tuple[np.ndarray, np.ndarray]:
    """(float64 values, mask of non-numeric cells) of a column as read."""
    if pd.api.types.is_numeric_dtype(column.dtype) or pd.api.types.is_bool_dtype(column.dtype):
        return column.to_numpy(dtype=np.float64, na_value=np.nan), np.zeros(len(column), bool)
    text = column
    if decimal != ".":
        text = column.str.replace(decimal, ".", regex=False)
    values = pd.to_numeric(text, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    nan = np.isnan(values)
    bad = np.zeros(len(column), dtype=bool)
    if nan.any():  # cells that held text (not empty, not a declared sentinel) but no number
        held = column[nan]
        bad[nan] = held.notna().to_numpy() & (held.astype(str).str.strip() != "").to_numpy()
    return values, bad


def _numeric_sentinels(missing) -> np.ndarray:
    out = []
    for m in missing:
        if isinstance(m, bool):
            continue
        if isinstance(m, (int, float)):
            out.append(float(m))
        elif isinstance(m, str) and _is_number(m.strip()):
            out.append(float(m.strip().replace(",", ".")))
    return np.asarray(out, dtype=np.float64)


def _swap_day_month(fmt: str) -> str:
    return fmt.replace("%d", "\0").replace("%m", "%d").replace("\0", "%m")


def _format_variants(fmt: str) -> list[str]:
    """The declared format and its seconds variants (jittered stamps carry seconds)."""
    out = [fmt]
    if "%S" not in fmt:
        if "%H:%M" in fmt:
            out.append(fmt.replace("%H:%M", "%H:%M:%S", 1))
        elif "%H%M" in fmt:
            out.append(fmt.replace("%H%M", "%H%M%S", 1))
    else:
        out.append(fmt.replace(":%S", "", 1).replace("%H%M%S", "%H%M", 1))
    return list(dict.fromkeys(out))


def _timestamp_text(df: pd.DataFrame, stream: StreamConfig) -> pd.Series:
    """The timestamp columns joined by one space, hhmm-type tokens zero-padded."""
    cols = _ts_columns(stream)
    tokens = stream.timestamp_format.split()
    parts = [df[c] for c in cols]  # object columns of str (NaN where empty)
    if len(parts) == 1 and len(tokens) > 1 and any(t in _PAD_WIDTH for t in tokens):
        split = parts[0].str.split(n=len(tokens) - 1, expand=True)
        if split.shape[1] == len(tokens):
            parts = [split[i] for i in range(len(tokens))]
    if len(parts) == len(tokens):
        parts = [p.str.strip().str.zfill(_PAD_WIDTH[t]) if t in _PAD_WIDTH else p for p, t in zip(parts, tokens)]
    text = parts[0]
    for p in parts[1:]:
        text = text + " " + p
    return text


def _parse_stamps(text: pd.Series, fmt: str) -> tuple[pd.Series, np.ndarray]:
    """Parse with the declared format, its seconds variants and ``24:00``; (stamps, failed)."""
    stamps = pd.to_datetime(text, format=fmt, errors="coerce")
    parsed = stamps.to_numpy()
    if parsed.dtype.kind == "M":  # naive stamps (the usual case): the same test on the arrays
        failed = np.isnat(parsed) & ~pd.isna(text.to_numpy())
    else:
        failed = (stamps.isna() & text.notna()).to_numpy()
    if not failed.any():
        return stamps, failed
    stamps = stamps.copy()
    text = text.copy()
    text[failed] = text[failed].str.strip()  # stray white space
    sub = text[failed]
    midnight = sub.str.replace(_HOUR_24, r"00\g<1>00", regex=True)
    is24 = (midnight != sub).fillna(False)
    for variant in _format_variants(fmt):
        todo = stamps.isna() & text.notna()
        if not todo.any():
            break
        if variant != fmt:
            plain = pd.to_datetime(text[todo], format=variant, errors="coerce")
            stamps.loc[plain.dropna().index] = plain.dropna()
        cand = midnight[is24 & todo[is24.index]]
        if len(cand):
            parsed = pd.to_datetime(cand, format=variant, errors="coerce").dropna() + pd.Timedelta(days=1)
            stamps.loc[parsed.index] = parsed
    failed = (stamps.isna() & text.notna()).to_numpy()
    return stamps, failed


def dst_switch_dates(years) -> set:
    """Local dates on which daylight-saving time starts or ends in common rule sets.

    Northern hemisphere: last Sunday of March and October (Europe), second Sunday of March
    and first Sunday of November (North America). Southern hemisphere: first Sunday of
    April and October (south-east Australia, parts of South America), last Sunday of
    September (New Zealand). From memory of the published national rules.
    """
    out = set()
    for y in years:
        for month in range(1, 13):
            days = pd.date_range(f"{y}-{month:02d}-01", periods=pd.Timestamp(f"{y}-{month:02d}-01").days_in_month)
            sundays = days[days.dayofweek == 6]
            if month in (3, 10):
                out.add(sundays[-1].date())
            if month == 9:
                out.add(sundays[-1].date())
            if month == 3:
                out.add(sundays[1].date())
            if month in (4, 10, 11):
                out.add(sundays[0].date())
    return out


def _near_switch(stamps: pd.Series, switch: set) -> np.ndarray:
    """True where a local stamp lies between 00:00 and 04:59 on a switch date."""
    if stamps.empty:
        return np.zeros(0, bool)
    days = stamps.dt.normalize().to_numpy()
    switch_days = np.asarray([np.datetime64(d, "ns") for d in switch], dtype="datetime64[ns]")
    return np.isin(days, switch_days) & (stamps.dt.hour.to_numpy() <= 4)


def _dst_warnings(path: Path, stamps: pd.Series, lines: np.ndarray, interval: pd.Timedelta) -> list[str]:
    """Warn about a missing or repeated local hour on a daylight-saving switch date."""
    if len(stamps) < 2:
        return []
    # steps on the int64 nanoseconds (the stamps hold no NaT here): the same tests as on the
    # Series of differences, without building it
    t = stamps.to_numpy().astype("datetime64[ns]").view(np.int64)
    step = np.diff(t)
    hour = pd.Timedelta(hours=1)
    forward = step == (interval + hour).value
    backward = step == (interval - hour).value
    if not (forward.any() or backward.any()):
        return []
    switch = dst_switch_dates(sorted(set(stamps.dt.year.dropna().astype(int))))
    prev = stamps.iloc[:-1].reset_index(drop=True)
    near = _near_switch(prev, switch)
    out = []
    for mask, what in ((forward, "skip one hour"), (backward, "repeat one hour")):
        hit = np.flatnonzero(mask & near)
        if hit.size:
            i = hit[0]
            out.append(f"{path}: row {lines[i + 1]}: the stamps {what} after {prev.iloc[i]:%Y-%m-%d %H:%M} "
                       "on a daylight-saving switch date: the logger clock seems to follow daylight-saving "
                       "time; stamps must be in fixed standard time (site.utc_offset_hours), correct the "
                       "clock or add a [[history]] shift_minutes")
    return out


def _check_swapped_jumps(path: Path, text: pd.Series, stamps: pd.Series, lines: np.ndarray, fmt: str) -> None:
    """Error if file-order jumps of days vanish when day and month are read swapped."""
    swapped_fmt = _swap_day_month(fmt)
    if swapped_fmt == fmt or len(stamps) < 2:
        return
    t8 = stamps.to_numpy().astype("datetime64[ns]").view(np.int64)
    jumps = np.flatnonzero(np.abs(np.diff(t8)) > _SWAP_JUMP.value) + 1  # row i jumped from row i − 1
    if jumps.size == 0:
        return
    rows = np.unique(np.concatenate([jumps, jumps - 1]))
    alt = pd.Series(pd.NaT, index=stamps.index, dtype=stamps.dtype)
    alt.iloc[rows] = pd.to_datetime(text.iloc[rows], format=swapped_fmt, errors="coerce").to_numpy()
    t, u = stamps.to_numpy(), alt.to_numpy()
    for i in jumps:
        fixes = (not pd.isna(u[i]) and abs(u[i] - t[i - 1]) <= _SWAP_JUMP) or \
                (not pd.isna(u[i - 1]) and abs(t[i] - u[i - 1]) <= _SWAP_JUMP) or \
                (not pd.isna(u[i]) and not pd.isna(u[i - 1]) and abs(u[i] - u[i - 1]) <= _SWAP_JUMP)
        if fixes:
            raise InputError(
                f"dates jump from {pd.Timestamp(t[i - 1]):%Y-%m-%d %H:%M} (row {lines[i - 1]}) to "
                f"{pd.Timestamp(t[i]):%Y-%m-%d %H:%M}; read with day and month swapped they are continuous: "
                f"day and month look swapped (a file edited in a spreadsheet?) against timestamp_format {fmt!r}",
                file=path, row=int(lines[i]))


def _snap_to_grid(path, stamps, starts, lines, interval, ts_cols, site, warnings_):
    """UTC interval starts from local ``starts`` snapped to the ``interval`` grid (stamps off the
    grid within the tolerance are moved, with a warning appended to ``warnings_``; beyond it:
    InputError)."""
    snapped = starts.dt.round(interval)
    off = (starts - snapped).abs()
    tolerance = interval * SNAP_TOLERANCE
    beyond = (off > tolerance).to_numpy()
    if beyond.any():
        i = int(np.argmax(beyond))
        raise InputError(f"stamp {stamps.iloc[i]:%Y-%m-%d %H:%M:%S} is {off.iloc[i]} off the {interval} grid "
                         f"(more than the {tolerance} tolerance)", file=path, row=int(lines[i]),
                         column=" ".join(ts_cols))
    moved = (off > pd.Timedelta(0)).to_numpy()
    if moved.any():
        i = int(np.argmax(moved))
        warnings_.append(f"{path}: {int(moved.sum())} stamps up to {off.max()} off the grid snapped to the "
                         f"nearest interval (first at row {lines[i]}: {stamps.iloc[i]:%Y-%m-%d %H:%M:%S})")
    return (snapped - pd.Timedelta(hours=site.utc_offset_hours)).dt.tz_localize("UTC")


def read_logger_file(path, stream: StreamConfig, site: SiteInfo) -> IngestedFile:
    """Read one logger export (CSV) of ``stream`` into an :class:`IngestedFile`.

    Parameters
    ----------
    path : path
        The CSV file.
    stream : StreamConfig
        The stream it belongs to (:func:`assign_stream`).
    site : SiteInfo
        The site; ``utc_offset_hours`` is the logger clock's fixed offset.

    Returns
    -------
    IngestedFile
        Raw values (before scaling and unit conversion) on the UTC starts of the stream's
        intervals, unique and sorted, with the file's sha256 and one-line warnings.

    Raises
    ------
    InputError
        Empty or header-only file, no header, a mapped column absent or duplicated, bytes
        that are not the declared encoding, a row with too many fields, timestamps that do
        not parse (or parse only with day and month swapped), stamps off the grid beyond the
        tolerance, duplicated stamps with conflicting values. The one-line message names the
        file and the row and/or column.
    """
    path = Path(path)
    warnings_: list[str] = []
    header = _read_header(path, stream)
    warnings_ += _check_header(path, header, stream)
    scan = _scan_file(path, header.delimiter, len(header.names))
    if scan.overfull_line is not None:
        raise InputError(f"{scan.overfull_fields} fields where the header has {len(header.names)} "
                         "(a stray delimiter, or a decimal comma in a comma-separated file?)",
                         file=path, row=scan.overfull_line)
    ts_cols = _ts_columns(stream)
    numeric_cols = list(dict.fromkeys([c for cols in stream.columns.values() for c in cols]
                                      + [f.column for f in stream.flags.values()]))
    pass_cols = [c for c in stream.source_columns() if c not in numeric_cols]
    sentinels = _numeric_sentinels(stream.missing)
    fmt = stream.timestamp_format

    # preallocated outputs, filled chunk by chunk (no Python loop over rows)
    cap = max(scan.n_lines - 1, 1)
    matrix = np.full((cap, len(numeric_cols)), np.nan)
    local = np.empty(cap, dtype="datetime64[ns]")
    keep = np.zeros(cap, dtype=bool)
    all_lines = _line_numbers(cap, stream.skip_rows)
    passed: dict[str, list] = {c: [] for c in pass_cols}
    bad_cells: dict[str, list] = {}  # column -> [count, first line, first text]
    previous = None  # (text, stamp, line) of the last stamped row of the previous chunk
    pos = 0
    truncated = scan.last_fields is not None and scan.last_fields < len(header.names)
    for chunk, is_last in _with_last(_csv_chunks(path, header, stream, scan.n_lines - 1)):
        m = len(chunk)
        if pos + m > cap:  # more rows than lines counted (quoted line breaks): grow
            grow = pos + m - cap
            matrix = np.vstack([matrix, np.full((grow, matrix.shape[1]), np.nan)])
            local = np.concatenate([local, np.empty(grow, dtype=local.dtype)])
            keep = np.concatenate([keep, np.zeros(grow, dtype=bool)])
            all_lines = _line_numbers(pos + m, stream.skip_rows)
            cap = pos + m
        lines = all_lines[pos:pos + m]
        # blank lines (kept so that line numbers stay exact): no timestamp and no value
        blank = pd.isna(chunk[ts_cols[0]].to_numpy())
        if blank.any():
            blank[blank] = chunk.loc[blank].isna().all(axis=1).to_numpy()
        if is_last and truncated and not blank.all():
            # a truncated last line (fewer fields than the header): dropped with a warning
            last = int(np.flatnonzero(~blank)[-1])
            blank[last] = True
            warnings_.append(f"{path}: row {lines[last]}: last line has {scan.last_fields} of "
                             f"{len(header.names)} fields (truncated write): dropped")
        keep[pos:pos + m] = ~blank
        at = {name: k for k, name in enumerate(chunk.columns)}
        numeric_at = [at[c] for c in numeric_cols]
        kinds = chunk.dtypes.to_numpy()
        if numeric_cols and all(kinds[k].kind in "fiub" for k in numeric_at):
            # every value column parsed as numbers (the usual case): one float block, as
            # _to_float gives column by column; no text, so no bad cells (columns taken by
            # position: cheaper than by name for a few hundred rows)
            values = chunk.iloc[:, numeric_at].to_numpy(dtype=np.float64, na_value=np.nan)
            if sentinels.size:
                values[np.isin(values, sentinels)] = np.nan
            matrix[pos:pos + m] = values
            numeric_done = True
        else:
            numeric_done = False
        for j, col in enumerate([] if numeric_done else numeric_cols):
            values, bad = _to_float(chunk[col], stream.decimal)
            if bad.any():
                first = int(np.argmax(bad))
                if stream.decimal == ".":
                    held = chunk[col][bad].astype(str)
                    comma = held.str.fullmatch(_DECIMAL_COMMA).to_numpy()
                    if comma.mean() > 0.5:
                        at = int(np.flatnonzero(bad)[int(np.argmax(comma))])
                        raise InputError(f"values such as {_short(chunk[col].iloc[at])} use a decimal comma: "
                                         "declare input.decimal = \",\"", file=path, row=int(lines[at]), column=col)
                entry = bad_cells.setdefault(col, [0, int(lines[first]), _short(chunk[col].iloc[first])])
                entry[0] += int(bad.sum())
            if sentinels.size:
                values[np.isin(values, sentinels)] = np.nan
            matrix[pos:pos + m, j] = values
        for col in pass_cols:
            passed[col].append(chunk[col].to_numpy().copy())  # a copy: a view would pin the chunk

        stamped = np.flatnonzero(~blank)
        if stamped.size == m:  # no blank line (the usual case): the chunk's rows, index 0 … m − 1
            text = _timestamp_text(chunk, stream)
        else:
            text = _timestamp_text(chunk.iloc[stamped], stream).reset_index(drop=True)
        tlines = lines[stamped]
        no_stamp = pd.isna(text.to_numpy())
        if no_stamp.any():
            i = int(np.argmax(no_stamp))
            raise InputError("empty timestamp", file=path, row=int(tlines[i]), column=ts_cols[0])
        stamps, failed = _parse_stamps(text, fmt)
        if failed.any():
            i = int(np.argmax(failed))
            swapped = _swap_day_month(fmt)
            if swapped != fmt:
                alt, alt_failed = _parse_stamps(text[failed], swapped)
                if not alt_failed.all():
                    j = int(np.flatnonzero(failed)[int(np.argmax(~alt_failed))])
                    raise InputError(
                        f"timestamp {_short(text.iloc[j], 40)} does not fit timestamp_format {fmt!r} but does "
                        "with day and month swapped: day and month look swapped (a file edited in a spreadsheet?)",
                        file=path, row=int(tlines[j]), column=" ".join(ts_cols))
            raise InputError(f"timestamp {_short(text.iloc[i], 40)} does not match timestamp_format {fmt!r}",
                             file=path, row=int(tlines[i]), column=" ".join(ts_cols))
        if len(text):
            if previous is None:
                _check_swapped_jumps(path, text, stamps, tlines, fmt)
            else:
                _check_swapped_jumps(path, pd.concat([pd.Series([previous[0]]), text], ignore_index=True),
                                     pd.concat([pd.Series([previous[1]]), stamps], ignore_index=True),
                                     np.concatenate([[previous[2]], tlines]), fmt)
            previous = (text.iloc[-1], stamps.iloc[-1], tlines[-1])
            local[pos + stamped] = stamps.to_numpy()
        pos += m

    keep = keep[:pos]
    lines = all_lines[:pos]
    if not keep.any():
        raise InputError("no data rows after the header (header only)", file=path)
    for col, (k, first_line, first_text) in bad_cells.items():
        warnings_.append(f"{path}: column {col!r}: {k} non-numeric cell{'s' if k > 1 else ''} set missing "
                         f"(first at row {first_line}: {first_text})")
    n_bad = int(sum(v[0] for v in bad_cells.values()))
    everything = bool(keep.all())
    matrix = matrix[:pos] if everything else matrix[:pos][keep]  # a view when nothing is dropped
    lines = lines if everything else lines[keep]
    stamps = pd.Series(local[:pos] if everything else local[:pos][keep])
    passthrough = {c: (np.concatenate(parts) if parts else np.empty(0, dtype=object)) for c, parts in passed.items()}
    passthrough = {c: (v if everything else v[keep]) for c, v in passthrough.items()}

    if stream.interval_minutes:
        interval = pd.Timedelta(minutes=stream.interval_minutes)
    else:
        steps = np.diff(np.unique(stamps.to_numpy()))
        if steps.size == 0:
            raise InputError("cannot infer the averaging interval from a single stamp: set input.interval_minutes",
                             file=path)
        interval = pd.Timedelta(np.median(steps)).round("1min")
    unique = stamps.to_numpy()
    if not (unique[1:] > unique[:-1]).all():  # sorted and unique already: the usual case
        unique = np.unique(unique)
    if unique.size >= 4:
        smallest = pd.Timedelta(np.diff(unique).min())
        # two neighbours may each lie up to the snap tolerance off the grid (logger jitter)
        if smallest > interval * (1 + 2 * SNAP_TOLERANCE):
            raise InputError(f"consecutive stamps are at least {smallest} apart, but the stream's interval is "
                             f"{interval}: a file of another averaging interval (check input.interval_minutes)",
                             file=path)
    warnings_ += _dst_warnings(path, stamps, lines, interval)

    # interval starts in local standard time, snapped to the grid
    shift = interval.value if stream.timestamp_marks == "end" else 0  # ns: stamps mark the ends
    starts_ns = stamps.to_numpy().view(np.int64) - shift if stamps.dtype == "datetime64[ns]" else None
    if starts_ns is not None and interval.value > 0 and not (starts_ns % interval.value).any():
        # every stamp on the grid (the usual case): rounding changes nothing, nothing is off
        utc = pd.DatetimeIndex((starts_ns - pd.Timedelta(hours=site.utc_offset_hours).value)
                               .view("datetime64[ns]"), name="timestamp_start").tz_localize("UTC")
    else:
        starts = stamps - interval if stream.timestamp_marks == "end" else stamps
        utc = _snap_to_grid(path, stamps, starts, lines, interval, ts_cols, site, warnings_)

    index = utc if isinstance(utc, pd.DatetimeIndex) else pd.DatetimeIndex(utc, name="timestamp_start")
    if all(values.dtype == np.float64 for values in passthrough.values()):
        # passthrough columns read as numbers (float64 as read): one float block
        block = np.column_stack([matrix, *passthrough.values()]) if passthrough else matrix
        raw = pd.DataFrame(block, columns=numeric_cols + pass_cols, index=index, copy=False)
    else:
        raw = pd.DataFrame(matrix, columns=numeric_cols, index=index, copy=False)
        for col, values in passthrough.items():
            raw[col] = values  # as read

    # ---- order ------------------------------------------------------------------------
    stamps_i8 = raw.index.asi8
    in_order = bool((stamps_i8[1:] > stamps_i8[:-1]).all())  # sorted, no duplicate: the usual case
    if not in_order and not raw.index.is_monotonic_increasing:
        back = np.flatnonzero(np.diff(raw.index.asi8) < 0)
        warnings_.append(f"{path}: row {lines[back[0] + 1]}: stamps out of order (first step back after "
                         f"row {lines[back[0]]}); rows sorted by time")
        order = np.argsort(raw.index.asi8, kind="stable")
        raw, lines = raw.iloc[order], lines[order]

    # ---- duplicates -------------------------------------------------------------------
    dup = np.zeros(len(raw), dtype=bool) if in_order else raw.index.duplicated(keep=False)
    if dup.any():
        sub = raw.loc[dup]
        n_distinct = sub.groupby(level=0, sort=False).nunique(dropna=False)
        conflict = (n_distinct > 1).any(axis=1)
        if conflict.any():
            stamp = conflict.index[np.argmax(conflict.to_numpy())]
            at = np.flatnonzero(raw.index == stamp)
            col = n_distinct.columns[np.argmax((n_distinct.loc[stamp] > 1).to_numpy())]
            local = stamp.tz_convert(site.tz).tz_localize(None)
            hint = ""
            if _near_switch(pd.Series([local]), dst_switch_dates([local.year]))[0]:
                hint = (" on a daylight-saving switch date: the logger clock seems to follow daylight-saving "
                        "time (the local hour repeats); stamps must be in fixed standard time")
            raise InputError(f"rows {lines[at[0]]} and {lines[at[1]]} share the interval starting "
                             f"{local:%Y-%m-%d %H:%M} (local standard time) with different values{hint}",
                             file=path, row=int(lines[at[0]]), column=col)
        keep = ~raw.index.duplicated(keep="first")
        warnings_.append(f"{path}: {int((~keep).sum())} rows repeat an earlier stamp with identical values: "
                         f"merged (first at row {lines[np.flatnonzero(~keep)[0]]})")
        raw, lines = raw.loc[keep], lines[keep]

    for message in warnings_:
        warn(message)
    return IngestedFile(path=path, sha256=scan.sha256, stream=stream.name, raw=raw,
                        rows=np.asarray(lines, dtype=np.int64), interval=interval,
                        warnings=warnings_, n_bad_cells=n_bad)


# =======================================================================================
# build_working_frame
# =======================================================================================
def _stream_interval(stream: StreamConfig, raw: pd.DataFrame | None) -> pd.Timedelta:
    if stream.interval_minutes:
        return pd.Timedelta(minutes=stream.interval_minutes)
    if raw is not None and len(raw) > 1:
        steps = np.diff(np.unique(raw.index.asi8))
        return pd.Timedelta(int(np.median(steps)), unit="ns").round("1min")
    raise ConfigError(f"stream {stream.name!r}: interval unknown; set interval_minutes", key="input.interval_minutes")


def _aggregate(codes: np.ndarray, values: np.ndarray, reject: np.ndarray, kind: str,
               n_sub: int, counts: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Aggregate stream values to site-interval codes.

    Returns ``{"codes", "value", "instrument", "incomplete", "count"}`` arrays over the unique codes.
    """
    uniq, inv = np.unique(codes, return_inverse=True)
    m = uniq.size
    present = np.isfinite(values)
    acc = present & ~reject
    need = n_sub if kind == "sum" else max(1, math.ceil(MIN_SHARE * n_sub - 1e-9))
    n_present = np.bincount(inv, weights=present, minlength=m)
    n_acc = np.bincount(inv, weights=acc, minlength=m)
    use_acc = n_acc >= need
    w = np.where(use_acc[inv], acc, present)
    cnt = np.bincount(inv, weights=w, minlength=m)
    valid = cnt >= need
    if kind == "vector":
        rad = np.deg2rad(np.where(w, values, 0.0))
        s = np.bincount(inv, weights=np.where(w, np.sin(rad), 0.0), minlength=m)
        c = np.bincount(inv, weights=np.where(w, np.cos(rad), 0.0), minlength=m)
        out = np.round(np.mod(np.rad2deg(np.arctan2(s, c)), 360.0), 9)
        out = np.where(out >= 360.0, 0.0, out)
    else:
        total = np.bincount(inv, weights=np.where(w, values, 0.0), minlength=m)
        out = total if kind == "sum" else total / np.where(cnt > 0, cnt, 1)
    out = np.where(valid, out, np.nan)
    instrument = valid & ~use_acc
    incomplete = (n_present > 0) & ~valid
    result = {"codes": uniq, "value": out, "instrument": instrument, "incomplete": incomplete}
    if counts is not None:
        best = np.zeros(m, dtype=np.int64)
        np.maximum.at(best, inv, np.where(w, counts, 0))
        result["count"] = np.where(valid, best, 0)
    return result


def _source_matrix(raw: pd.DataFrame, cols, stream: StreamConfig, var: str, cfg: SiteConfig) -> np.ndarray:
    for c in cols:
        if c not in raw.columns:
            raise ConfigError(f"stream {stream.name!r}: column {c!r} mapped to {var} is not in the stored data",
                              file=cfg.path, key=f"input.columns.{var}")
    return np.column_stack([pd.to_numeric(raw[c], errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
                            for c in cols])


def build_working_frame(raw_by_stream: dict, cfg: SiteConfig, *, ingested=()) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    """The working frame (DEVELOPERS.md) from the raw frames of every stream.

    Parameters
    ----------
    raw_by_stream : dict of str to pandas.DataFrame
        Per stream name, the raw frame of :class:`IngestedFile` (index UTC interval starts,
        source columns as read); several files of a stream concatenated.
    cfg : SiteConfig
        The site configuration.
    ingested : iterable of IngestedFile, optional
        The files just read, whose bad-cell counts and warnings go into the report.

    Returns
    -------
    frame : pandas.DataFrame
        Index ``timestamp_start`` (site tz), regular and complete at the site interval;
        mapped canonical variables in canonical units after history corrections,
        ``<var>_sensor_count`` for replicated variables, passthrough columns, the history
        trace columns ``<var>_history_entry``, and the site parameter columns.
    flags : pandas.DataFrame
        int32 bitmask per mapped variable: MISSING (1), INSTRUMENT (8), HISTORY (64).
    report : dict
        JSON-serialisable: ``n_intervals``, ``start``, ``end``, ``interval_minutes``,
        ``streams``, ``unit_warnings``, ``warnings``, ``missing``, ``instrument_rejected``,
        ``incomplete_intervals``, ``clock_shifted``, ``bad_cells``, ``n_bad_cells``.

    Raises
    ------
    ConfigError
        A stream longer than (or not dividing) the site interval, a variable or passthrough
        name mapped in two streams, data of an unknown stream, an unknown unit string.
    InputError
        No data at all.
    """
    site = cfg.site
    streams = {s.name: s for s in cfg.inputs}
    for name in raw_by_stream:
        if name not in streams:
            raise ConfigError(f"stored data of stream {name!r}, which the configuration does not declare",
                              file=cfg.path, key="input")
    site_iv = (pd.Timedelta(minutes=site.interval_minutes) if site.interval_minutes
               else _stream_interval(cfg.inputs[0], raw_by_stream.get(cfg.inputs[0].name)))
    site_minutes = int(site_iv / pd.Timedelta(minutes=1))
    site = dataclasses.replace(site, interval_minutes=site_minutes)
    site_ns = site_iv.value
    offset_ns = pd.Timedelta(hours=site.utc_offset_hours).value

    report: dict = {"interval_minutes": site_minutes, "streams": {}, "unit_warnings": [], "warnings": [],
                    "instrument_rejected": {}, "incomplete_intervals": {}, "clock_shifted": {}}
    per_var: dict[str, dict] = {}
    counts: dict[str, dict] = {}
    passthrough: dict[str, pd.Series] = {}
    owner: dict[str, str] = {}
    all_codes = []

    for stream in cfg.inputs:
        raw = raw_by_stream.get(stream.name)
        if raw is None or len(raw) == 0:
            continue
        idx = raw.index if isinstance(raw.index, pd.DatetimeIndex) else pd.DatetimeIndex(raw.index)
        idx = idx.tz_localize("UTC") if idx.tz is None else idx.tz_convert("UTC")
        s_iv = _stream_interval(stream, raw)
        if s_iv > site_iv or site_iv % s_iv != pd.Timedelta(0):
            raise ConfigError(f"stream {stream.name!r} has a {s_iv} interval, which is longer than or does not "
                              f"divide the site's {site_iv}", file=cfg.path, key="input.interval_minutes")
        n_sub = int(site_iv // s_iv)
        local_ns = idx.asi8 + offset_ns
        report["streams"][stream.name] = {"rows": int(len(raw)), "interval_minutes": int(s_iv / pd.Timedelta(minutes=1)),
                                          "aggregated_from_sub_intervals": n_sub}
        shifts = {}
        for var, cols in stream.columns.items():
            if var in owner:
                raise ConfigError(f"{var} is mapped in streams {owner[var]!r} and {stream.name!r}",
                                  file=cfg.path, key=f"input.columns.{var}")
            owner[var] = stream.name
            x = _source_matrix(raw, cols, stream, var, cfg)
            x = x * float(stream.scale.get(var, 1.0)) + float(stream.offset.get(var, 0.0))
            unit = stream.units.get(var)
            units.conversion(var, unit, key=f"input.units.{var}", file=cfg.path)  # unknown unit: error first
            for message in units.sanity_warnings(x, var, unit, where=f"stream {stream.name!r}"):
                report["unit_warnings"].append(message)
                warn(message)
            x = units.to_canonical(x, var, unit, key=f"input.units.{var}", file=cfg.path)
            finite = np.isfinite(x)
            n_ok = finite.sum(axis=1)
            value = np.where(n_ok > 0, np.where(finite, x, 0.0).sum(axis=1) / np.maximum(n_ok, 1), np.nan)
            reject = np.zeros(len(raw), dtype=bool)
            if var in stream.flags:
                fc = stream.flags[var]
                if fc.column not in raw.columns:
                    raise ConfigError(f"stream {stream.name!r}: flag column {fc.column!r} is not in the stored data",
                                      file=cfg.path, key=f"input.flags.{var}")
                fv = pd.to_numeric(raw[fc.column], errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
                reject = np.isin(fv, np.asarray([float(r) for r in fc.reject], dtype=np.float64))
            shift = np.asarray(history.shift_minutes(idx, cfg.history, var, site), dtype=np.float64)
            shift_ns = np.round(shift * 60e9 / s_iv.value) * s_iv.value
            if np.any(np.abs(shift_ns - shift * 60e9) > 0.5e9):
                message = (f"stream {stream.name!r}: {var} clock shift is not a multiple of the {s_iv} interval: "
                           "rounded to the nearest interval")
                report["warnings"].append(message)
                warn(message)
            shifts[var] = shift_ns
            if np.any(shift_ns != 0):
                report["clock_shifted"][var] = int(np.count_nonzero(shift_ns))
            codes = np.floor_divide(local_ns + shift_ns.astype(np.int64), site_ns)
            kind = "sum" if var == "precip" else "vector" if var == "wind_dir" else "mean"
            agg = _aggregate(codes, value, reject, kind, n_sub, n_ok if len(cols) > 1 else None)
            per_var[var] = agg
            all_codes.append(agg["codes"])
            if len(cols) > 1:
                counts[var] = agg
        # passthrough: shifted with the stream's variables when they all share one shift
        common = None
        if shifts:
            arrs = list(shifts.values())
            common = arrs[0] if all(np.array_equal(arrs[0], a) for a in arrs[1:]) else None
        p_codes = np.floor_divide(local_ns + (common.astype(np.int64) if common is not None else 0), site_ns)
        for out_name, col in stream.passthrough.items():
            if out_name in passthrough or out_name in CANONICAL_VARIABLES:
                raise ConfigError(f"passthrough name {out_name!r} is used twice or is a canonical variable",
                                  file=cfg.path, key=f"input.passthrough.{out_name}")
            if col not in raw.columns:
                raise ConfigError(f"stream {stream.name!r}: passthrough column {col!r} is not in the stored data",
                                  file=cfg.path, key=f"input.passthrough.{out_name}")
            series = pd.Series(raw[col].to_numpy(), index=p_codes)
            if n_sub > 1:
                grouped = series.groupby(level=0)
                series = grouped.mean() if pd.api.types.is_numeric_dtype(series.dtype) else grouped.last()
            else:
                series = series[~series.index.duplicated(keep="last")]
            passthrough[out_name] = series
            all_codes.append(series.index.to_numpy(dtype=np.int64))

    if not all_codes or all(c.size == 0 for c in all_codes):
        raise InputError("no data in any stream", file=cfg.path)
    lo = min(int(c.min()) for c in all_codes if c.size)
    hi = max(int(c.max()) for c in all_codes if c.size)
    grid = np.arange(lo, hi + 1, dtype=np.int64)
    index = pd.DatetimeIndex(grid * site_ns, name="timestamp_start").tz_localize(site.tz)

    columns: dict[str, np.ndarray] = {}
    instrument: dict[str, np.ndarray] = {}
    for var in CANONICAL_VARIABLES:
        if var not in per_var:
            continue
        agg = per_var[var]
        pos = agg["codes"] - lo
        col = np.full(grid.size, np.nan)
        col[pos] = agg["value"]
        columns[var] = col
        inst = np.zeros(grid.size, dtype=bool)
        inst[pos] = agg["instrument"]
        instrument[var] = inst
        report["instrument_rejected"][var] = int(inst.sum())
        report["incomplete_intervals"][var] = int(agg["incomplete"].sum())
    for var, agg in counts.items():
        col = np.zeros(grid.size, dtype=np.int64)
        col[agg["codes"] - lo] = agg["count"]
        columns[f"{var}_sensor_count"] = col
    frame = pd.DataFrame(columns, index=index)
    for name, series in passthrough.items():
        frame[name] = series.reindex(grid).to_numpy()

    mapped = [v for v in CANONICAL_VARIABLES if v in per_var]
    flags = pd.DataFrame({v: np.where(instrument[v], flagbits.INSTRUMENT, 0).astype(flagbits.FLAG_DTYPE)
                          for v in mapped}, index=index)

    frame, trace = history.apply_corrections(frame, cfg.history, site)
    flags = history.apply_exclusions(flags, cfg.history)
    params = history.site_parameters(frame.index, site, cfg.history)
    extra = [df for df in (trace, params) if df is not None and len(df.columns)]
    if extra:
        frame = pd.concat([frame, *[df.reindex(frame.index) for df in extra]], axis=1)
    missing = {}
    for v in mapped:
        nan = np.isnan(frame[v].to_numpy(dtype=np.float64))
        flags[v] = (flags[v].to_numpy() | np.where(nan, flagbits.MISSING, 0)).astype(flagbits.FLAG_DTYPE)
        missing[v] = int(nan.sum())

    bad_cells = {}
    for item in ingested:
        bad_cells[str(item.path)] = int(item.n_bad_cells)
        report["warnings"].extend(item.warnings)
    report.update({
        "n_intervals": int(len(frame)),
        "start": index[0].isoformat(),
        "end": (index[-1] + site_iv).isoformat(),
        "missing": missing,
        "bad_cells": bad_cells,
        "n_bad_cells": int(sum(bad_cells.values())),
    })
    report["warnings"] = report["unit_warnings"] + report["warnings"]
    return frame, flags, report

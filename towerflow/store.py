"""The site store (CONTRACT §3): every ingested raw value, deduplicated, with provenance.

Layout of ``DIR/SITE_ID/store/``::

    manifest.json                         the single commit point (see below)
    stream-<name>.<sha256[:16]>.parquet   one per stream: the raw values of every file
                                          ingested into the stream, one row per interval
    conflicts.<sha256[:16]>.parquet       the conflicts log (absent until the first conflict)
    store.lock                            present while a run holds the store

Stream files hold the values exactly as :class:`pipeline.ingest.IngestedFile` gives them
(before scaling and unit conversion; a wrong unit or scale found later is fixed by
reprocessing), index ``timestamp_start`` (UTC), the source columns, and per-row provenance
columns: ``__source_file`` / ``__source_sha256`` / ``__ingested_at`` name the file that
first wrote the row; ``__changed_by_file`` / ``__changed_by_sha256`` name the last file
that later filled a missing value in the row or superseded one (empty otherwise). Every
value that a file tried to change (kept or superseded) is in the conflicts log with both
values and both sources, so each stored value can be traced to its file.

``manifest.json`` lists every file ingested (sha256, name, stream, rows, interval, what it
added) and, per stream, the name and sha256 of its current data file. Data files are never
modified: a change writes new content-named files, then replaces the manifest with
:func:`os.replace`. The manifest is therefore the one atomic switch between the old and the
new store; a run that fails or is killed at any point leaves the old manifest pointing at
the old, intact files (new files written before the failure are deleted on an exception,
and left-overs of a killed run are removed by the next locked run). Every file is checked
against the sha256 in the manifest when read: a corrupted file raises
:class:`~pipeline.errors.StoreError` naming it, never silently used.

Merging rules (:meth:`SiteStore.add`): new intervals are added; values equal to the stored
ones (within a relative 1e-7, i.e. the same number written with a different number of
digits) merge silently; a missing stored value is filled by the new file; a value that
differs keeps the stored value and is logged (``supersede=True``: the new value wins and the
old one is logged). A file whose overlap with the store conflicts wholesale (at least
:attr:`SiteStore.clock_reset_fraction` of the overlapping non-missing values differ, over at
least :attr:`SiteStore.clock_reset_min_overlap` of overlapping intervals) is refused — even
with ``supersede`` — because it looks like a logger whose clock was reset and restamped old
data. The same file (same sha256) again changes nothing. A file whose interval differs from
the stream's stored interval is refused.

Runs and concurrency: :meth:`SiteStore.prepare` merges files in memory and returns a
:class:`PendingChange` (the merged frames to process, the reports); its ``commit()`` takes
the store's lock file (``store.lock``: pid, host, time; a live holder makes a second run fail
with "store is locked by pid N since T"; a lock left by a dead process on this host is taken
over with a warning) and writes only if the manifest is still the one the change was
prepared from — otherwise another run committed first and the change is refused, nothing
written. :meth:`SiteStore.add` / :meth:`SiteStore.add_many` prepare and commit under one
lock. A pending change can be saved to a folder and loaded in another process
(:meth:`PendingChange.save`, :func:`load_pending`).
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import socket
import uuid
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.errors import StoreError, warn

from .atomic import atomic_write_bytes, atomic_write_text, parquet_bytes, remove_stale_temporaries

__all__ = ["SiteStore", "AddReport", "PendingChange", "load_pending", "MANIFEST_NAME", "LOCK_NAME"]

MANIFEST_NAME = "manifest.json"
LOCK_NAME = "store.lock"
FORMAT_VERSION = 1
INDEX_NAME = "timestamp_start"

#: provenance name (as returned by :meth:`SiteStore.provenance`) -> column in the stream file
PROVENANCE_COLUMNS: dict[str, str] = {
    "source_file": "__source_file",
    "source_sha256": "__source_sha256",
    "ingested_at": "__ingested_at",
    "changed_by_file": "__changed_by_file",
    "changed_by_sha256": "__changed_by_sha256",
}
_PROV = tuple(PROVENANCE_COLUMNS.values())
_STREAM_RE = re.compile(r"[A-Za-z0-9_-]+")
_DATA_FILE_RE = re.compile(r"stream-([A-Za-z0-9_-]+)\.([0-9a-f]{16})\.parquet")
_LOG_FILE_RE = re.compile(r"conflicts\.([0-9a-f]{16})\.parquet")
_RTOL = 1e-7  # relative tolerance of "the same value" (digits written differently)

_LOG_COLUMNS = [
    "logged_at", "stream", "timestamp_start", "column", "outcome",
    "stored_value", "new_value", "stored_text", "new_text",
    "stored_file", "stored_sha256", "new_file", "new_sha256",
]


@dataclass
class AddReport:
    """What adding one file did to the store.

    Attributes
    ----------
    file, sha256, stream : str
        The file's name, its sha256 and its stream.
    rows : int
        Rows in the file.
    already_ingested : bool
        The same bytes were ingested before: nothing changed.
    new_rows : int
        Intervals the store did not hold.
    identical_rows : int
        Overlapping intervals whose every value the store already held (merged silently).
    changed_rows : int
        Overlapping intervals where the file filled a missing value or superseded one.
    filled_values : int
        Missing stored values the file supplied.
    conflicts : int
        Values that differ from the stored ones (logged).
    superseded : int
        Of those, values replaced by the file's (``supersede=True``).
    new_columns : list of str
        Source columns the stream did not hold yet.
    """

    file: str
    sha256: str
    stream: str
    rows: int
    already_ingested: bool = False
    new_rows: int = 0
    identical_rows: int = 0
    changed_rows: int = 0
    filled_values: int = 0
    conflicts: int = 0
    superseded: int = 0
    new_columns: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def _now() -> pd.Timestamp:
    return pd.Timestamp.now(tz="UTC").floor("s")


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


def _equal(stored: np.ndarray, new: np.ndarray) -> np.ndarray:
    """Elementwise "same value" of two columns (numbers within _RTOL, otherwise as text)."""
    if stored.dtype.kind in "fiu" and new.dtype.kind in "fiu":
        a = stored.astype(np.float64)
        b = new.astype(np.float64)
        with np.errstate(invalid="ignore"):
            # numpy.isclose(a, b, rtol=_RTOL, atol=0.0) written out (its own expression,
            # without its per-call argument checks)
            return (np.abs(a - b) <= _RTOL * np.abs(b)) & np.isfinite(b) | (a == b)
    return np.array([str(x) == str(y) for x, y in zip(stored, new)], dtype=bool)


def _float_block(frame: pd.DataFrame, cols, rows=None) -> np.ndarray:
    """The float64 columns ``cols`` of ``frame`` (rows ``rows``) as one 2-D array, a new one:
    the values of ``frame[cols].to_numpy()[rows]``, selected by position (cheaper than by
    label for a few hundred rows)."""
    block = frame.iloc[:, frame.columns.get_indexer(cols)].to_numpy()
    return block if rows is None else block[rows]


def _positions(index: pd.DatetimeIndex, stamps_i8: np.ndarray) -> np.ndarray:
    """Positions in ``index`` of stamps (int64 ns) that it holds: ``index.get_indexer`` by a
    binary search on the sorted stamps (checked; the general look-up otherwise)."""
    values = index.asi8
    pos = np.searchsorted(values, stamps_i8).astype(np.intp)
    if pos.size and (pos.max() >= values.size or not np.array_equal(values[pos], stamps_i8)
                     or not index.is_monotonic_increasing):
        return index.get_indexer(pd.DatetimeIndex(stamps_i8.view("datetime64[ns]")).tz_localize("UTC")
                                 .tz_convert(index.tz))
    return pos


def _text_or(value, fallback):
    """``value`` if it is a non-empty text, else ``fallback`` (a missing value may be None or NaN)."""
    return value if isinstance(value, str) and value else fallback


def _clean_objects(frame: pd.DataFrame) -> pd.DataFrame:
    """Object columns as str or None (parquet needs one type per column)."""
    out = frame
    for col, dtype in frame.dtypes.items():
        if dtype == object and col not in _PROV:
            values = frame[col].to_numpy()
            cleaned = np.array([None if (v is None or (isinstance(v, float) and np.isnan(v))) else
                                (v if isinstance(v, str) else str(v)) for v in values], dtype=object)
            if out is frame:
                out = frame.copy()
            out[col] = cleaned
    return out


def _concat_rows(parts: list[pd.DataFrame]) -> pd.DataFrame:
    """Frames with the same columns and dtypes stacked row-wise, column by column.

    ``pandas.concat`` tests object columns value by value for all-missing blocks (slow for
    the provenance columns, and it turns NaN into None there); frames that differ in
    columns or dtypes go through ``pandas.concat``.
    """
    first = parts[0]
    if any(not p.columns.equals(first.columns) or not p.dtypes.equals(first.dtypes) for p in parts[1:]):
        return pd.concat(parts)
    index = first.index.append([p.index for p in parts[1:]])
    data = {}
    floats = [j for j, dtype in enumerate(first.dtypes) if dtype == np.float64]
    block = np.concatenate([p.iloc[:, floats].to_numpy() for p in parts]) if floats else None
    for j, (col, dtype) in enumerate(first.dtypes.items()):
        if dtype == np.float64:
            values = block[:, floats.index(j)]
        elif isinstance(dtype, np.dtype):
            values = np.concatenate([p.iloc[:, j].to_numpy() for p in parts])
        else:
            values = pd.concat([p.iloc[:, j] for p in parts], ignore_index=True).array
        data[col] = pd.Series(values, index=index, dtype=dtype, copy=False)  # no type inference
    return pd.DataFrame(data, index=index, columns=first.columns)


_MAX_PIECES = 40


class _Pieces:
    """A stream's merged frame as time-ordered, non-overlapping pieces (one concat at the end).

    Merging a file touches only the stored rows within the file's time span (plus one
    neighbouring row, so that the merge always sees a non-empty store): merging N weekly
    files costs O(N) instead of the O(N²) of re-building the whole frame per file. The
    result is the frame the file-by-file merge of the whole frame gives, column order and
    object cleaning included.
    """

    def __init__(self, stored: pd.DataFrame | None):
        self.parts: list[pd.DataFrame] = [] if stored is None or len(stored) == 0 else [stored]
        self.empty = stored  # None, or an empty stored frame (its columns)
        self.order: list[str] = [] if stored is None else [c for c in stored.columns if c not in _PROV]
        self.widened = False  # a merge added columns: the other pieces lack them until the end
        self.bounds: list[tuple[int, int]] | None = None  # (first, last) ns of each piece

    def merge(self, merge_fn, raw: pd.DataFrame):
        for c in raw.columns:
            if c not in self.order:
                self.order.append(c)
        if not self.parts or len(raw) == 0:  # nothing stored yet, or an empty file: the plain merge
            stored = self.frame() if self.parts else self.empty
            merged, log = merge_fn(stored)
            self.parts = [merged] if len(merged) else []
            self.empty = merged.iloc[:0] if not len(merged) else None
            self.bounds = None
            return merged, log
        first, last = raw.index.asi8[0], raw.index.asi8[-1]
        if self.bounds is None:
            self.bounds = [(p.index.asi8[0], p.index.asi8[-1]) for p in self.parts]
        # pieces whose rows may fall in [first, last]; at least one piece (a neighbour row)
        lo = next((i for i, (_, t) in enumerate(self.bounds) if t >= first), len(self.parts) - 1)
        hi = max((i for i, (t, _) in enumerate(self.bounds) if t <= last), default=0)
        lo, hi = min(lo, hi), max(lo, hi)
        local = self.parts[lo] if lo == hi else _concat_rows(self.parts[lo:hi + 1])
        idx = local.index.asi8
        a = int(idx.searchsorted(first, side="left"))
        b = int(idx.searchsorted(last, side="right"))
        if a == b:  # no stored row in the file's span: take the nearest one before (or after)
            a, b = (a - 1, a) if a > 0 else (a, a + 1)
        merged, log = merge_fn(local.iloc[a:b])
        if len(merged.columns) != len(local.columns):
            self.widened = True
        new = [p for p in (local.iloc[:a], merged, local.iloc[b:]) if len(p)]
        self.parts[lo:hi + 1] = new
        self.bounds[lo:hi + 1] = [(p.index.asi8[0], p.index.asi8[-1]) for p in new]
        # keep few pieces (files arrive mostly in time order: the last pieces are the ones
        # merged into next): every _MAX_PIECES files the older pieces are joined into one
        if len(self.parts) > _MAX_PIECES:
            self.parts[:-2] = [_concat_rows(self.parts[:-2])]
            self.bounds[:-2] = [(self.bounds[0][0], self.bounds[-3][1])]
        return merged, log

    def frame(self) -> pd.DataFrame:
        if not self.parts:
            return self.empty
        if len(self.parts) == 1 and not self.widened:
            return self.parts[0]
        out = _concat_rows(self.parts)[self.order + list(_PROV)]
        if self.widened:
            out = _clean_objects(out)
        out.index = pd.DatetimeIndex(out.index, freq=None, name=INDEX_NAME)
        self.parts, self.widened, self.bounds = [out], False, None
        return out


def _refuse_clock_reset(compared, differ, interval, store, path) -> int:
    """Refuse a file whose overlap with the store mostly differs (a logger clock reset that
    restamped old data); returns the number of differing values."""
    n_compared = int(compared.sum())
    n_differ = int(differ.sum())
    rows_compared = int(compared.any(axis=1).sum())
    if (n_compared and rows_compared * interval >= store.clock_reset_min_overlap
            and n_differ / n_compared >= store.clock_reset_fraction):
        raise StoreError(
            f"{n_differ} of {n_compared} values overlapping the store over "
            f"{_span(rows_compared * interval)} differ from the stored ones: this looks like a logger "
            f"clock reset that restamped old data; file refused, nothing written", file=path)
    return n_differ


class _FloatStream:
    """A stream's merge, file by file, on numpy arrays while every source column is float64.

    The usual case (logger exports of numbers): the merge of :meth:`SiteStore._merge`, whole
    frame semantics, without a pandas frame per file. The merged rows are kept as pieces
    (the stored rows, then the new rows of each file) with a sorted look-up of their stamps;
    a file's overlap with the merged rows is compared and filled in place, its new rows
    become a piece. :meth:`frame` builds the one merged frame (rows in time order, columns
    in order of appearance, then the provenance columns) that the file-by-file merge of
    :meth:`SiteStore._merge` gives. A file it cannot take (text columns, no rows) goes to the
    general merge: ``_Pieces(self.frame())`` continues from the same merged frame.
    """

    def __init__(self, stored: pd.DataFrame | None, now):
        self.now = now
        self.stored = stored
        self.cols: list[str] = []
        self.col_at: dict[str, int] = {}
        self.values: list[np.ndarray] = []  # per piece: rows × columns known then (float64)
        self.source: list[np.ndarray] = []  # per piece: __source_file, __source_sha256 (object)
        self.source_sha: list[np.ndarray] = []
        self.changed: list[np.ndarray] = []  # per piece: __changed_by_file, __changed_by_sha256
        self.changed_sha: list[np.ndarray] = []
        # sorted stamps (ns) of the merged rows, their piece and row in the piece: the first
        # _n_keys entries of buffers that grow by doubling (files usually arrive in time order
        # and are appended: amortised O(1) per row, where a new array per file would copy the
        # whole record again for every file)
        self._keys = np.empty(0, dtype=np.int64)
        self._key_piece = np.empty(0, dtype=np.intp)
        self._key_row = np.empty(0, dtype=np.intp)
        self._n_keys = 0
        self.tz = None
        if stored is not None:
            self._add_columns([c for c in stored.columns if c not in _PROV])
            self.tz = stored.index.tz
            n = len(stored)
            self._add_piece(stored[self.cols].to_numpy(dtype=np.float64, copy=True), stored.index.asi8,
                            *(stored[c].to_numpy(dtype=object, copy=True) for c in
                              (PROVENANCE_COLUMNS["source_file"], PROVENANCE_COLUMNS["source_sha256"],
                               PROVENANCE_COLUMNS["changed_by_file"], PROVENANCE_COLUMNS["changed_by_sha256"])),
                            n=n)

    @staticmethod
    def takes_stored(stored: pd.DataFrame | None, now) -> bool:
        """True if the stored frame (None: a new stream) and ``now`` suit the float merge."""
        if not (isinstance(now, pd.Timestamp) and now.tz is not None):
            return False
        if stored is None:
            return True
        if len(stored) == 0 or not all(c in stored.columns for c in _PROV):
            return False
        index, dtypes = stored.index, stored.dtypes
        pc = PROVENANCE_COLUMNS
        return (isinstance(index.dtype, pd.DatetimeTZDtype) and index.dtype.unit == "ns"
                and str(index.tz) == "UTC" and index.is_unique and index.is_monotonic_increasing
                and all(dtypes[c] == np.float64 for c in stored.columns if c not in _PROV)
                and all(dtypes[pc[k]] == object for k in ("source_file", "source_sha256",
                                                          "changed_by_file", "changed_by_sha256"))
                and isinstance(dtypes[pc["ingested_at"]], pd.DatetimeTZDtype)
                and str(dtypes[pc["ingested_at"]].tz) == "UTC")

    @staticmethod
    def takes(raw: pd.DataFrame, index: pd.DatetimeIndex) -> bool:
        """True if a checked file (``index``: its UTC stamps) suits the float merge."""
        return (len(raw) > 0 and index.dtype.unit == "ns"
                and all(dtype == np.float64 for dtype in raw.dtypes))

    def _add_columns(self, cols) -> None:
        for c in cols:
            self.col_at[c] = len(self.cols)
            self.cols.append(c)

    def _add_piece(self, values, stamps, source, source_sha, changed, changed_sha, *, n) -> None:
        k = len(self.values)
        self.values.append(values)
        self.source.append(source)
        self.source_sha.append(source_sha)
        self.changed.append(changed)
        self.changed_sha.append(changed_sha)
        rows = np.arange(n, dtype=np.intp)
        piece = np.full(n, k, dtype=np.intp)
        m = self._n_keys
        if not m or not n or stamps[0] > self._keys[m - 1]:  # appended in time order
            if m + n > self._keys.size:
                capacity = max(2 * self._keys.size, m + n, 1024)
                for name in ("_keys", "_key_piece", "_key_row"):
                    grown = np.empty(capacity, dtype=getattr(self, name).dtype)
                    grown[:m] = getattr(self, name)[:m]
                    setattr(self, name, grown)
            self._keys[m:m + n] = stamps
            self._key_piece[m:m + n] = piece
            self._key_row[m:m + n] = rows
            self._n_keys = m + n
        else:
            at = np.searchsorted(self.keys, stamps)  # stamps are new: insert them in order
            self._keys = np.insert(self.keys, at, stamps)
            self._key_piece = np.insert(self.key_piece, at, piece)
            self._key_row = np.insert(self.key_row, at, rows)
            self._n_keys = self._keys.size

    @property
    def keys(self) -> np.ndarray:
        return self._keys[:self._n_keys]

    @property
    def key_piece(self) -> np.ndarray:
        return self._key_piece[:self._n_keys]

    @property
    def key_row(self) -> np.ndarray:
        return self._key_row[:self._n_keys]

    def _widen(self, k: int) -> np.ndarray:
        """Piece ``k`` with a column for every column known now (NaN in those added later)."""
        block = self.values[k]
        if block.shape[1] < len(self.cols):
            pad = np.full((block.shape[0], len(self.cols) - block.shape[1]), np.nan)
            block = self.values[k] = np.hstack([block, pad])
        return block

    def merge(self, store: "SiteStore", ing, cols: list[str], index: pd.DatetimeIndex, name: str,
              stream: str, interval: pd.Timedelta, supersede: bool, report: AddReport):
        """Merge one checked file (columns ``cols``, UTC stamps ``index``); the conflicts log part or None."""
        sha = str(ing.sha256)
        values = ing.raw.to_numpy(dtype=np.float64)
        r_i8 = index.asi8
        n = r_i8.size
        if self.tz is None:
            self.tz = index.tz
        # the file's rows already merged (stamps unique and sorted on both sides)
        at = np.searchsorted(self.keys, r_i8)
        hit = at < self.keys.size
        hit[hit] = self.keys[at[hit]] == r_i8[hit]
        r_pos = np.flatnonzero(hit)
        n_ov = r_pos.size
        s_piece, s_row = self.key_piece[at[r_pos]], self.key_row[at[r_pos]]
        new_cols = [c for c in cols if c not in self.col_at]
        common = [c for c in cols if c in self.col_at]
        r_common = [cols.index(c) for c in common]
        s_common = [self.col_at[c] for c in common]

        # stored values of the overlap (NaN in columns a piece did not have yet)
        s_all = np.full((n_ov, len(common)), np.nan)
        for k in np.unique(s_piece):
            sel = np.flatnonzero(s_piece == k)
            block = self.values[k]
            known = [j for j, c in enumerate(s_common) if c < block.shape[1]]
            if known:
                s_all[np.ix_(sel, known)] = block[np.ix_(s_row[sel], [s_common[j] for j in known])]
        r_all = values[np.ix_(r_pos, r_common)]
        s_na, r_na = np.isnan(s_all), np.isnan(r_all)
        compared = ~s_na & ~r_na  # both non-missing
        differ = compared & ~_equal(s_all, r_all)
        fill = s_na & ~r_na
        r_added = values[np.ix_(r_pos, [cols.index(c) for c in new_cols])]
        extra = (~np.isnan(r_added)).any(axis=1)  # overlap rows with values in columns new to the stream

        n_differ = _refuse_clock_reset(compared, differ, interval, store, ing.path)

        report.new_columns = new_cols
        report.new_rows = int(n - n_ov)
        report.conflicts = n_differ
        report.filled_values = int(fill.sum()) + int((~np.isnan(r_added)).sum())
        replace = fill | (differ if supersede else False)
        changed = replace.any(axis=1) | extra
        report.changed_rows = int(changed.sum())
        report.superseded = n_differ if supersede else 0
        report.identical_rows = int(n_ov - report.changed_rows - (differ.any(axis=1) & ~changed).sum())

        log = None
        if n_differ:  # the log first: it names the values and files before this merge
            entries = []
            for i, j in zip(*np.nonzero(differ)):
                k, row = s_piece[i], s_row[i]
                entries.append({
                    "logged_at": self.now, "stream": stream, "timestamp_start": index[r_pos[i]],
                    "column": common[j], "outcome": "superseded" if supersede else "kept_stored",
                    "stored_value": float(s_all[i, j]), "new_value": float(r_all[i, j]),
                    "stored_text": None, "new_text": None,
                    "stored_file": _text_or(self.changed[k][row], self.source[k][row]),
                    "stored_sha256": _text_or(self.changed_sha[k][row], self.source_sha[k][row]),
                    "new_file": name, "new_sha256": sha,
                })
            log = pd.DataFrame(entries, columns=_LOG_COLUMNS)
            what = "the new values replaced the stored ones" if supersede else "the stored values were kept"
            report.warnings.append(f"{ing.path}: {n_differ} values differ from the store ({what}; "
                                   "see the store's conflicts log)")

        # the overlap: filled or superseded values, values of columns new to the stream
        self._add_columns(new_cols)
        r_new_at = [self.col_at[c] for c in new_cols]
        for k in np.unique(s_piece):
            sel = np.flatnonzero(s_piece == k)
            rows = s_row[sel]
            block = self._widen(k)
            if new_cols:
                block[np.ix_(rows, r_new_at)] = r_added[sel]
            for j, c in enumerate(s_common):
                put = np.flatnonzero(replace[sel, j])
                if put.size:
                    block[rows[put], c] = r_all[sel[put], j]
            touched = rows[changed[sel]]
            if touched.size:
                self.changed[k][touched] = name
                self.changed_sha[k][touched] = sha
        # the new rows: one piece
        new = np.flatnonzero(~hit)
        if new.size:
            if cols == self.cols:
                block = values[new]  # a copy
            else:
                block = np.full((new.size, len(self.cols)), np.nan)
                block[:, [self.col_at[c] for c in cols]] = values[new]
            none = np.full(new.size, None, dtype=object)
            self._add_piece(block, r_i8[new], np.full(new.size, name, dtype=object),
                            np.full(new.size, sha, dtype=object), none, none.copy(), n=new.size)
        return log

    def frame(self) -> pd.DataFrame | None:
        """The merged frame: rows in time order, the source columns, the provenance columns
        (None for a new stream that no file was merged into)."""
        if not self.values:
            return None
        offsets = np.cumsum([0] + [len(v) for v in self.values[:-1]])
        take = offsets[self.key_piece] + self.key_row
        values = np.concatenate([self._widen(k) for k in range(len(self.values))])[take]
        index = pd.DatetimeIndex(self.keys.view("datetime64[ns]"), name=INDEX_NAME).tz_localize(self.tz)
        out = pd.DataFrame(values, index=index, columns=list(self.cols), copy=False)
        pc = PROVENANCE_COLUMNS
        out[pc["source_file"]] = np.concatenate(self.source)[take]
        out[pc["source_sha256"]] = np.concatenate(self.source_sha)[take]
        if self.stored is None:
            out[pc["ingested_at"]] = self.now
        else:
            # the stored rows keep theirs, the new rows get now (in the stored column's unit)
            stored_at = np.where(self.key_piece == 0, self.key_row, -1)
            out[pc["ingested_at"]] = self.stored[pc["ingested_at"]].array.take(
                stored_at, allow_fill=True, fill_value=self.now)
        out[pc["changed_by_file"]] = np.concatenate(self.changed)[take]
        out[pc["changed_by_sha256"]] = np.concatenate(self.changed_sha)[take]
        return out


class SiteStore:
    """The store of one site under ``root`` (``DIR/SITE_ID/store``).

    Parameters
    ----------
    root : str or os.PathLike
        The store folder; created on the first write.
    clock_reset_fraction : float
        Fraction of differing overlapping values from which a file is refused as a clock
        reset (default 0.5: common practice for "wholesale", our choice).
    clock_reset_min_overlap : str or pandas.Timedelta
        Overlap (intervals with compared values × interval) below which a file is never
        refused as a clock reset, only logged (default "1 day": our choice).
    """

    def __init__(self, root, *, clock_reset_fraction: float = 0.5,
                 clock_reset_min_overlap="1 day"):
        self.root = Path(root)
        self.clock_reset_fraction = float(clock_reset_fraction)
        self.clock_reset_min_overlap = pd.Timedelta(clock_reset_min_overlap)
        self._lock_depth = 0
        self._lock_token: str | None = None

    # ------------------------------------------------------------------ paths and manifest
    @property
    def manifest_path(self) -> Path:
        return self.root / MANIFEST_NAME

    @property
    def lock_path(self) -> Path:
        return self.root / LOCK_NAME

    def _empty_manifest(self) -> dict:
        return {"format": FORMAT_VERSION, "streams": {}, "files": [], "conflicts": None, "updated_at": None}

    def _load_manifest(self) -> dict:
        return self._load_manifest_raw()[1]

    def _load_manifest_raw(self) -> tuple[bytes | None, dict]:
        path = self.manifest_path
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            return None, self._empty_manifest()
        except OSError as exc:
            raise StoreError(f"cannot read the store manifest ({exc.strerror})", file=path) from None
        try:
            manifest = json.loads(data.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise StoreError(f"store manifest is corrupted ({exc})", file=path) from None
        ok = (isinstance(manifest, dict) and manifest.get("format") == FORMAT_VERSION
              and isinstance(manifest.get("streams"), dict) and isinstance(manifest.get("files"), list))
        if not ok:
            raise StoreError("store manifest is corrupted or of an unknown format", file=path)
        for stream, entry in manifest["streams"].items():
            if (not isinstance(entry, dict) or not _DATA_FILE_RE.fullmatch(str(entry.get("data", "")))
                    or not isinstance(entry.get("sha256"), str)):
                raise StoreError(f"store manifest entry for stream {stream!r} is corrupted", file=path)
        log = manifest.get("conflicts")
        if log is not None and (not isinstance(log, dict) or not _LOG_FILE_RE.fullmatch(str(log.get("data", "")))):
            raise StoreError("store manifest entry for the conflicts log is corrupted", file=path)
        return data, manifest

    def _read_verified(self, name: str, sha256: str) -> pd.DataFrame:
        import pyarrow as pa
        import pyarrow.parquet as pq
        import hashlib

        path = self.root / name
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            raise
        except OSError as exc:
            raise StoreError(f"cannot read the store file ({exc.strerror})", file=path) from None
        if hashlib.sha256(data).hexdigest() != sha256:
            raise StoreError("store file is corrupted: its sha256 does not match the manifest; "
                             "restore it from a backup or rebuild the store from the logger files", file=path)
        try:
            return pq.read_table(pa.BufferReader(data)).to_pandas()
        except Exception as exc:  # noqa: BLE001 - any parquet failure is a corrupted file
            raise StoreError(f"store file is not readable parquet ({type(exc).__name__})", file=path) from None

    def _load_stream(self, manifest: dict, stream: str) -> pd.DataFrame:
        entry = manifest["streams"][stream]
        frame = self._read_verified(entry["data"], entry["sha256"])
        frame.index = pd.DatetimeIndex(frame.index, name=INDEX_NAME)
        return frame

    def _retrying(self, fn):
        """Run ``fn(manifest)``; once more with a fresh manifest if a file vanished under it."""
        for attempt in range(3):
            manifest = self._load_manifest()
            try:
                return fn(manifest)
            except FileNotFoundError as exc:
                if attempt == 2:
                    raise StoreError("store file listed in the manifest is missing",
                                     file=exc.filename or self.root) from None
        raise AssertionError("unreachable")  # pragma: no cover

    # ------------------------------------------------------------------ reading
    def streams(self) -> dict[str, pd.Timedelta]:
        """The streams held and their intervals."""
        manifest = self._load_manifest()
        return {s: pd.Timedelta(seconds=e["interval_seconds"]) for s, e in manifest["streams"].items()}

    def files(self) -> pd.DataFrame:
        """The files ingested, in order, as recorded in the manifest."""
        return pd.DataFrame(self._load_manifest()["files"])

    def read(self) -> dict[str, pd.DataFrame]:
        """Raw frames per stream: source columns only, index ``timestamp_start`` (UTC)."""
        def go(manifest):
            out = {}
            for stream in manifest["streams"]:
                frame = self._load_stream(manifest, stream)
                out[stream] = frame.drop(columns=[c for c in _PROV if c in frame.columns])
            return out
        return self._retrying(go)

    def provenance(self, stream: str) -> pd.DataFrame:
        """Per-row provenance of ``stream``: ``source_file``, ``source_sha256``,
        ``ingested_at``, ``changed_by_file``, ``changed_by_sha256`` (see the module notes)."""
        def go(manifest):
            if stream not in manifest["streams"]:
                raise StoreError(f"the store holds no stream {stream!r}", file=self.manifest_path)
            frame = self._load_stream(manifest, stream)
            prov = frame[list(_PROV)]
            return prov.rename(columns={v: k for k, v in PROVENANCE_COLUMNS.items()})
        return self._retrying(go)

    def conflicts(self) -> pd.DataFrame:
        """The conflicts log: every value a file tried to change, kept or superseded.

        Columns: ``logged_at``, ``stream``, ``timestamp_start``, ``column``, ``outcome``
        (``"kept_stored"`` or ``"superseded"``), ``stored_value`` / ``new_value`` (numbers),
        ``stored_text`` / ``new_text`` (non-numeric columns), ``stored_file``,
        ``stored_sha256``, ``new_file``, ``new_sha256``.
        """
        def go(manifest):
            log = manifest.get("conflicts")
            if not log:
                return pd.DataFrame(columns=_LOG_COLUMNS)
            return self._read_verified(log["data"], log["sha256"]).reset_index(drop=True)
        return self._retrying(go)

    def verify(self) -> None:
        """Check every file listed in the manifest against its sha256 (StoreError if not)."""
        def go(manifest):
            for stream in manifest["streams"]:
                self._load_stream(manifest, stream)
            log = manifest.get("conflicts")
            if log:
                self._read_verified(log["data"], log["sha256"])
        self._retrying(go)

    # ------------------------------------------------------------------ lock
    @contextlib.contextmanager
    def lock(self):
        """Hold the store's lock file (re-entrant within this object).

        Raises
        ------
        StoreError
            "store is locked by pid N since T" while another live process holds it. A lock
            left by a dead process on this host is taken over with a warning.
        """
        if self._lock_depth:
            self._lock_depth += 1
            try:
                yield self
            finally:
                self._lock_depth -= 1
            return
        self.root.mkdir(parents=True, exist_ok=True)
        token = self._acquire()
        self._lock_token, self._lock_depth = token, 1
        try:
            remove_stale_temporaries(self.root)
            yield self
        finally:
            self._lock_depth, self._lock_token = 0, None
            self._release(token)

    def _read_lock(self) -> dict | None:
        try:
            info = json.loads(self.lock_path.read_text(encoding="utf-8"))
            return info if isinstance(info, dict) else {}
        except FileNotFoundError:
            return None
        except (OSError, ValueError):
            return {}

    def _acquire(self) -> str:
        token = uuid.uuid4().hex
        host = socket.gethostname()
        for _ in range(5):
            try:
                fd = os.open(self.lock_path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                info = self._read_lock()
                if info is None:  # released meanwhile
                    continue
                pid = info.get("pid")
                since = info.get("since", "an unknown time")
                same_host = info.get("host") == host
                if not isinstance(pid, int) or not same_host or _pid_alive(pid):
                    if not isinstance(pid, int):
                        try:
                            age = _now().timestamp() - self.lock_path.stat().st_mtime
                        except FileNotFoundError:
                            continue
                        if age > 60:  # an empty or broken lock file older than a minute
                            self._take_over(info, "an unreadable lock file")
                            continue
                    where = "" if same_host or not info.get("host") else f" on host {info.get('host')}"
                    who = f"pid {pid}{where} since {since}" if isinstance(pid, int) else "another process"
                    raise StoreError(f"store is locked by {who}: another run is using this site's store; "
                                     "wait for it to finish", file=self.lock_path)
                self._take_over(info, f"a stale lock of pid {pid} (no longer running) from {since}")
                continue
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                json.dump({"pid": os.getpid(), "host": host, "since": _now().isoformat(),
                           "token": token}, fh)
                fh.flush()
                os.fsync(fh.fileno())
            return token
        raise StoreError("cannot take the store lock (it keeps changing hands)", file=self.lock_path)

    def _take_over(self, info: dict, what: str) -> None:
        aside = self.root / f".{LOCK_NAME}.stale-{uuid.uuid4().hex}"
        try:
            os.rename(self.lock_path, aside)
        except FileNotFoundError:
            return
        try:
            moved = json.loads(aside.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            moved = {}
        if moved != info:  # another process took over and locked in between: give it back
            with contextlib.suppress(FileExistsError):
                os.link(aside, self.lock_path)
            aside.unlink()
            return
        aside.unlink()
        warn(f"{self.lock_path}: took over {what}")

    def _release(self, token: str) -> None:
        info = self._read_lock()
        if info and info.get("token") == token:
            with contextlib.suppress(FileNotFoundError):
                self.lock_path.unlink()

    # ------------------------------------------------------------------ adding
    def add(self, ingested, *, supersede: bool = False) -> AddReport:
        """Add one :class:`pipeline.ingest.IngestedFile`; see the module notes for the rules.

        Raises
        ------
        StoreError
            Clock-reset file, interval mix, malformed frame, corrupted store, lock held.
            Nothing is written then.
        """
        return self.add_many([ingested], supersede=supersede)[0]

    def add_many(self, ingested_files, *, supersede: bool = False) -> list[AddReport]:
        """Add several files in order and write once at the end.

        If any file is refused, nothing is written: the store stays byte-for-byte as it was.
        """
        with self.lock():
            pending = self.prepare(ingested_files, supersede=supersede)
            pending.commit()
            return pending.reports

    def prepare(self, ingested_files, *, supersede: bool = False) -> "PendingChange":
        """Merge files into the store in memory; nothing is written until ``commit()``.

        Returns
        -------
        PendingChange
            ``frames`` (the raw frames per stream as :meth:`read` will return them after the
            commit), ``reports``, ``report`` (JSON-ready totals), ``warnings``; ``commit()``
            writes the change atomically, refusing if another run changed the store since.

        Raises
        ------
        StoreError
            As :meth:`add`; nothing is written.
        """
        ingested_files = list(ingested_files)
        for attempt in range(3):
            manifest_bytes, manifest = self._load_manifest_raw()
            try:
                frames = {stream: self._load_stream(manifest, stream) for stream in manifest["streams"]}
                break
            except FileNotFoundError as exc:  # another run committed and cleaned up meanwhile
                if attempt == 2:
                    raise StoreError("store file listed in the manifest is missing",
                                     file=exc.filename) from None
        new_manifest = json.loads(json.dumps(manifest))
        known = {f["sha256"] for f in manifest["files"]}
        dirty: set[str] = set()
        log_parts: list[pd.DataFrame] = []
        reports = []
        now = _now()
        # merged streams, kept in pieces until the end: numpy pieces while every column is a float
        # (_FloatStream), else time-ordered frames (_Pieces)
        mergers: dict[str, _FloatStream | _Pieces] = {}
        for ing in ingested_files:
            name = Path(ing.path).name
            stream = str(ing.stream)
            report = AddReport(file=name, sha256=str(ing.sha256), stream=stream, rows=len(ing.raw))
            if report.sha256 in known:
                report.already_ingested = True
                reports.append(report)
                continue
            cols, index = self._check_ingested(ing)
            interval = pd.Timedelta(ing.interval)
            entry = new_manifest["streams"].get(stream)
            if entry is not None and pd.Timedelta(seconds=entry["interval_seconds"]) != interval:
                stored = pd.Timedelta(seconds=entry["interval_seconds"])
                raise StoreError(
                    f"stream {stream!r} holds {_minutes(stored)} data but this file is {_minutes(interval)}: "
                    "refusing to mix intervals in one stream", file=ing.path)
            merger = mergers.get(stream)
            if merger is None:
                stored = frames.get(stream)
                merger = mergers[stream] = (_FloatStream(stored, now) if _FloatStream.takes_stored(stored, now)
                                            else _Pieces(stored))
            if isinstance(merger, _FloatStream) and not merger.takes(ing.raw, index):
                merger = mergers[stream] = _Pieces(merger.frame())  # the general merge from here on
            if isinstance(merger, _FloatStream):
                log = merger.merge(self, ing, cols, index, name, stream, interval, supersede, report)
            else:
                raw = self._checked_frame(ing, cols, index)
                _, log = merger.merge(lambda stored: self._merge(stored, raw, ing, name, stream, interval,
                                                                 supersede, now, report), raw)
            dirty.add(stream)
            if log is not None and len(log):
                log_parts.append(log)
            if entry is None:
                new_manifest["streams"][stream] = {"interval_seconds": int(interval.total_seconds())}
            known.add(report.sha256)
            record = {k: v for k, v in asdict(report).items() if k not in ("warnings", "already_ingested")}
            record.update({"path": str(ing.path), "interval_seconds": int(interval.total_seconds()),
                           "ingested_at": now.isoformat(),
                           "first": index[0].isoformat() if len(index) else None,
                           "last": index[-1].isoformat() if len(index) else None})
            new_manifest["files"].append(record)
            reports.append(report)
        for stream, merger in mergers.items():
            frames[stream] = merger.frame()
        return PendingChange(store=self, base_sha256=_sha(manifest_bytes), old_manifest=manifest,
                             new_manifest=new_manifest, full_frames=frames, dirty=dirty,
                             log_parts=log_parts, reports=reports, now=now)

    def _check_ingested(self, ing) -> tuple[list[str], pd.DatetimeIndex]:
        """Check an ingested file's frame; its column names (str) and UTC stamps (StoreError if bad)."""
        raw = ing.raw
        where = ing.path
        if not isinstance(raw, pd.DataFrame):
            raise StoreError("ingested data is not a table", file=where)
        if not _STREAM_RE.fullmatch(str(ing.stream)):
            raise StoreError(f"stream name {ing.stream!r} may hold only letters, digits, '_' and '-'", file=where)
        if not isinstance(raw.index, pd.DatetimeIndex) or raw.index.tz is None:
            raise StoreError("ingested rows are not stamped with time-zone-aware interval starts", file=where)
        if not raw.index.is_unique:
            dup = raw.index[raw.index.duplicated()][0]
            raise StoreError(f"interval {dup.isoformat()} appears twice", file=where)
        if not raw.index.is_monotonic_increasing:
            raise StoreError("ingested rows are not in time order", file=where)
        if pd.Timedelta(ing.interval) <= pd.Timedelta(0):
            raise StoreError(f"interval {ing.interval!r} is not positive", file=where)
        cols = [str(c) for c in raw.columns]
        if len(set(cols)) != len(cols):
            raise StoreError("ingested table has duplicate column names", file=where)
        for c in cols:
            if c.startswith("__") or c == INDEX_NAME:
                raise StoreError(f"column name {c!r} is reserved by the store", file=where, column=c)
        return cols, raw.index.tz_convert("UTC").rename(INDEX_NAME)

    @staticmethod
    def _checked_frame(ing, cols: list[str], index: pd.DatetimeIndex) -> pd.DataFrame:
        """The checked file's frame as the general merge takes it (a copy, object columns cleaned)."""
        out = ing.raw.copy()
        out.columns = cols
        out.index = index
        return _clean_objects(out)

    def _merge(self, stored, raw, ing, name, stream, interval, supersede, now, report):
        sha = str(ing.sha256)
        if stored is None or len(stored) == 0:
            data = raw.copy()
            data[PROVENANCE_COLUMNS["source_file"]] = name
            data[PROVENANCE_COLUMNS["source_sha256"]] = sha
            data[PROVENANCE_COLUMNS["ingested_at"]] = now
            data[PROVENANCE_COLUMNS["changed_by_file"]] = None
            data[PROVENANCE_COLUMNS["changed_by_sha256"]] = None
            data.index = pd.DatetimeIndex(data.index, freq=None, name=INDEX_NAME)
            report.new_rows = len(raw)
            report.new_columns = list(raw.columns) if stored is None else \
                [c for c in raw.columns if c not in stored.columns]
            return data, None

        stored_cols = [c for c in stored.columns if c not in _PROV]
        new_cols = [c for c in raw.columns if c not in stored_cols]
        common = [c for c in raw.columns if c in stored_cols]
        # both indexes are sorted and unique (the store's pieces, a checked file): the overlap
        # and its positions on the int64 stamps (what intersection and get_indexer give)
        s_i8, r_i8 = stored.index.asi8, raw.index.asi8
        r_in = np.isin(r_i8, s_i8)
        overlap = raw.index[r_in]
        n_ov = len(overlap)
        s_pos = np.searchsorted(s_i8, r_i8[r_in]).astype(np.intp)
        r_pos = np.flatnonzero(r_in).astype(np.intp)

        differ = np.zeros((n_ov, len(common)), dtype=bool)
        fill = np.zeros((n_ov, len(common)), dtype=bool)
        compared = np.zeros((n_ov, len(common)), dtype=bool)  # both non-missing
        # all compared columns float (the usual case): one 2-D array each instead of per-column
        # frame look-ups (same elementwise tests)
        s_types, r_types = stored.dtypes, raw.dtypes
        all_float = bool(common) and all(s_types[c] == np.float64 and r_types[c] == np.float64 for c in common)
        raw_block = _float_block(raw, common) if all_float else None
        s_block = _float_block(stored, common) if all_float else None
        if all_float:
            s_all = s_block[s_pos]
            r_all = raw_block[r_pos]
        for j, col in enumerate(common):
            s = s_all[:, j] if all_float else stored[col].to_numpy()[s_pos]
            r = r_all[:, j] if all_float else raw[col].to_numpy()[r_pos]
            s_na = pd.isna(s)
            r_na = pd.isna(r)
            both = ~s_na & ~r_na
            eq = np.ones(n_ov, dtype=bool)
            if both.any():
                eq[both] = _equal(s[both], r[both])
            compared[:, j] = both
            differ[:, j] = both & ~eq
            fill[:, j] = s_na & ~r_na
        extra = np.zeros(n_ov, dtype=bool)  # overlap rows with values in columns new to the stream
        for col in new_cols:
            extra |= ~pd.isna(raw[col].to_numpy()[r_pos])

        n_differ = _refuse_clock_reset(compared, differ, interval, self, ing.path)

        report.new_columns = new_cols
        report.new_rows = int(len(raw) - n_ov)
        report.conflicts = n_differ
        report.filled_values = int(fill.sum()) + int(sum(
            (~pd.isna(raw[c].to_numpy()[r_pos])).sum() for c in new_cols))
        replace = fill | (differ if supersede else False)
        changed = replace.any(axis=1) | extra
        report.changed_rows = int(changed.sum())
        report.superseded = n_differ if supersede else 0
        report.identical_rows = int(n_ov - report.changed_rows - (differ.any(axis=1) & ~changed).sum())

        # the merged frame: union of rows and columns
        index = stored.index.union(raw.index)
        out = stored.reindex(index)
        # one frame built at the end, not per-column inserts
        columns = {col: out[col] for col in out.columns if not (all_float and col in common)}
        for col in new_cols:
            columns[col] = raw[col].reindex(index)
        idx_i8, ov_i8 = index.asi8, r_i8[r_in]
        stored_at = _positions(index, s_i8)  # every stored row is in the union
        new_only = np.ones(len(index), dtype=bool)
        new_only[stored_at] = False  # ~index.isin(stored.index)
        new_pos = _positions(raw.index, idx_i8[new_only])  # the new rows come from the file
        if all_float:  # out[common].to_numpy(): the stored values on their rows, NaN on the new
            out_block = np.full((len(index), len(common)), np.nan)
            out_block[stored_at] = s_block
        else:
            out_block = None
        for col_j, col in enumerate(common):
            values = out_block[:, col_j] if all_float else columns[col].to_numpy(copy=True)
            incoming = raw_block[:, col_j] if all_float else raw[col].to_numpy()
            if values.dtype != incoming.dtype and not (values.dtype.kind == "f" and incoming.dtype.kind in "fiu"):
                values = values.astype(object)
            values[new_only] = incoming[new_pos]
            rows = np.flatnonzero(replace[:, col_j])
            if len(rows):
                values[_positions(index, ov_i8[rows])] = incoming[r_pos[rows]]
            columns[col] = values
        pc = PROVENANCE_COLUMNS
        # provenance of the new rows, set on the arrays (text columns already of object type
        # and a UTC time column: what the .loc assignments below would give)
        quick = bool(new_only.any()) and all(
            columns[pc[k]].dtype == object for k in ("source_file", "source_sha256")) and \
            isinstance(columns[pc["ingested_at"]].dtype, pd.DatetimeTZDtype) and \
            str(columns[pc["ingested_at"]].dtype.tz) == "UTC" and getattr(now, "tz", None) is not None
        if quick:
            for key, value in (("source_file", name), ("source_sha256", sha)):
                arr = columns[pc[key]].to_numpy(dtype=object, copy=True)
                arr[new_only] = value
                columns[pc[key]] = arr
            stamps = columns[pc["ingested_at"]].array.copy()
            stamps[new_only] = now
            columns[pc["ingested_at"]] = stamps
        out = pd.DataFrame({col: columns[col] for col in stored_cols + new_cols + list(_PROV)}, index=index)
        if not quick:
            out.loc[new_only, pc["source_file"]] = name
            out.loc[new_only, pc["source_sha256"]] = sha
            out.loc[new_only, pc["ingested_at"]] = now
        if changed.any():
            where = _positions(index, ov_i8[changed])
            for key, value in (("changed_by_file", name), ("changed_by_sha256", sha)):
                col = out[pc[key]].to_numpy(dtype=object, copy=True)
                col[where] = value
                out[pc[key]] = col
        out = _clean_objects(out)
        out.index = pd.DatetimeIndex(out.index, freq=None, name=INDEX_NAME)

        log = None
        if n_differ:
            rows, cols = np.nonzero(differ)
            s_rows = s_pos[rows]
            r_rows = r_pos[rows]
            entries = []
            for i, j, sr, rr in zip(rows, cols, s_rows, r_rows):
                col = common[j]
                sv = stored[col].iat[sr]
                rv = raw[col].iat[rr]
                numeric = isinstance(sv, (int, float, np.number)) and isinstance(rv, (int, float, np.number))
                entries.append({
                    "logged_at": now, "stream": stream, "timestamp_start": overlap[i], "column": col,
                    "outcome": "superseded" if supersede else "kept_stored",
                    "stored_value": float(sv) if numeric else np.nan,
                    "new_value": float(rv) if numeric else np.nan,
                    "stored_text": None if numeric else str(sv), "new_text": None if numeric else str(rv),
                    "stored_file": _text_or(stored[pc["changed_by_file"]].iat[sr], stored[pc["source_file"]].iat[sr]),
                    "stored_sha256": _text_or(stored[pc["changed_by_sha256"]].iat[sr],
                                              stored[pc["source_sha256"]].iat[sr]),
                    "new_file": name, "new_sha256": sha,
                })
            log = pd.DataFrame(entries, columns=_LOG_COLUMNS)
            what = "the new values replaced the stored ones" if supersede else "the stored values were kept"
            report.warnings.append(f"{ing.path}: {n_differ} values differ from the store ({what}; "
                                   "see the store's conflicts log)")
        return out, log

    def _commit(self, old_manifest, new_manifest, frames, dirty, log_parts, now) -> None:
        import hashlib

        created: list[Path] = []

        def write_content(prefix: str, data: bytes) -> tuple[str, str]:
            sha = hashlib.sha256(data).hexdigest()
            name = f"{prefix}.{sha[:16]}.parquet"
            path = self.root / name
            if path.exists():
                with contextlib.suppress(OSError):
                    if hashlib.sha256(path.read_bytes()).hexdigest() == sha:
                        return name, sha
            existed = path.exists()
            atomic_write_bytes(path, data)
            if not existed:
                created.append(path)
            return name, sha

        try:
            for stream in sorted(dirty):
                frame = frames[stream]
                name, sha = write_content(f"stream-{stream}", parquet_bytes(frame))
                entry = new_manifest["streams"][stream]
                entry.update({"data": name, "sha256": sha, "rows": int(len(frame)),
                              "columns": [c for c in frame.columns if c not in _PROV],
                              "first": frame.index[0].isoformat() if len(frame) else None,
                              "last": frame.index[-1].isoformat() if len(frame) else None})
            if log_parts:
                old_log = old_manifest.get("conflicts")
                parts = []
                if old_log:
                    try:
                        parts.append(self._read_verified(old_log["data"], old_log["sha256"]).reset_index(drop=True))
                    except FileNotFoundError:
                        raise StoreError("the conflicts log listed in the manifest is missing",
                                         file=self.root / old_log["data"]) from None
                parts.extend(log_parts)
                log = pd.concat(parts, ignore_index=True)
                log["timestamp_start"] = pd.to_datetime(log["timestamp_start"], utc=True)
                log["logged_at"] = pd.to_datetime(log["logged_at"], utc=True)
                name, sha = write_content("conflicts", parquet_bytes(log.reset_index(drop=True)))
                new_manifest["conflicts"] = {"data": name, "sha256": sha, "rows": int(len(log))}
            new_manifest["updated_at"] = now.isoformat()
            text = json.dumps(new_manifest, indent=1, sort_keys=True, default=str) + "\n"
            atomic_write_text(self.manifest_path, text)  # the commit point
        except BaseException:
            for path in created:
                with contextlib.suppress(OSError):
                    path.unlink()
            raise
        self._collect_garbage(new_manifest)

    def _collect_garbage(self, manifest: dict) -> None:
        keep = {e["data"] for e in manifest["streams"].values()}
        if manifest.get("conflicts"):
            keep.add(manifest["conflicts"]["data"])
        for entry in self.root.iterdir():
            if entry.name in keep:
                continue
            if _DATA_FILE_RE.fullmatch(entry.name) or _LOG_FILE_RE.fullmatch(entry.name):
                with contextlib.suppress(OSError):
                    entry.unlink()


def _minutes(delta: pd.Timedelta) -> str:
    minutes = delta.total_seconds() / 60
    return f"{minutes:g}-minute"


def _span(delta: pd.Timedelta) -> str:
    hours = delta.total_seconds() / 3600
    return f"{hours / 24:.1f} days" if hours >= 24 else f"{hours:g} hours"


def _sha(data: bytes | None) -> str | None:
    import hashlib

    return None if data is None else hashlib.sha256(data).hexdigest()


class PendingChange:
    """A merge prepared in memory by :meth:`SiteStore.prepare`, not yet written.

    Attributes
    ----------
    store_root : Path
        The store folder.
    frames : dict of str to DataFrame
        Raw frames per stream (source columns, index ``timestamp_start`` UTC) as the store
        will hold them after :meth:`commit`; the processing of a run works on these.
    reports : list of AddReport
    report : dict
        JSON-ready totals: ``files`` (one dict per file), ``new_rows`` (per stream),
        ``conflicts``, ``superseded``, ``filled_values``, ``already_ingested``.
    warnings : list of str
        One-line warnings (conflicts found).
    """

    def __init__(self, *, store: SiteStore, base_sha256, old_manifest, new_manifest, full_frames,
                 dirty, log_parts, reports, now):
        self._store = store
        self.store_root = store.root
        self.base_sha256 = base_sha256
        self._old = old_manifest
        self._new = new_manifest
        self._full = full_frames
        self._dirty = set(dirty)
        self._log_parts = list(log_parts)
        self.reports = list(reports)
        self._now = now
        self.committed = False

    @property
    def store(self) -> "SiteStore":
        """The store the change belongs to (its ``lock()`` is re-entrant with :meth:`commit`)."""
        return self._store

    @property
    def changed(self) -> bool:
        """True if committing writes anything (some file was not in the store yet)."""
        return len(self._new["files"]) != len(self._old["files"])

    @property
    def frames(self) -> dict[str, pd.DataFrame]:
        return {s: f.drop(columns=[c for c in _PROV if c in f.columns]) for s, f in self._full.items()}

    @property
    def warnings(self) -> list[str]:
        return [w for r in self.reports for w in r.warnings]

    @property
    def report(self) -> dict:
        new_rows: dict[str, int] = {}
        for r in self.reports:
            new_rows[r.stream] = new_rows.get(r.stream, 0) + r.new_rows
        return {
            "files": [asdict(r) for r in self.reports],
            "new_rows": new_rows,
            "conflicts": sum(r.conflicts for r in self.reports),
            "superseded": sum(r.superseded for r in self.reports),
            "filled_values": sum(r.filled_values for r in self.reports),
            "already_ingested": sum(r.already_ingested for r in self.reports),
        }

    def commit(self) -> None:
        """Write the change atomically (under the store's lock); a no-op if nothing changed.

        Raises
        ------
        StoreError
            The store changed since :meth:`SiteStore.prepare` read it (another run committed
            first): nothing is written; run again. Or the store is locked.
        """
        if self.committed or not self.changed:
            self.committed = True
            return
        store = self._store
        with store.lock():
            current, _ = store._load_manifest_raw()
            if _sha(current) != self.base_sha256:
                raise StoreError("the store changed since this run read it (another run on this site "
                                 "committed first); nothing written: run again", file=store.manifest_path)
            store._commit(self._old, self._new, self._full, self._dirty, self._log_parts, self._now)
        self.committed = True

    def save(self, folder) -> Path:
        """Write the pending change to ``folder`` (for hand-over between processes)."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        streams = sorted(self._full)
        for i, stream in enumerate(streams):
            atomic_write_bytes(folder / f"frame-{i}.parquet", parquet_bytes(self._full[stream]))
        for i, part in enumerate(self._log_parts):
            atomic_write_bytes(folder / f"log-{i}.parquet", parquet_bytes(part))
        meta = {"store_root": str(self.store_root), "base_sha256": self.base_sha256,
                "old_manifest": self._old, "new_manifest": self._new, "streams": streams,
                "dirty": sorted(self._dirty), "n_log_parts": len(self._log_parts),
                "reports": [asdict(r) for r in self.reports], "now": self._now.isoformat(),
                "clock_reset_fraction": self._store.clock_reset_fraction,
                "clock_reset_min_overlap": str(self._store.clock_reset_min_overlap)}
        atomic_write_text(folder / "pending.json", json.dumps(meta, default=str))
        return folder


def load_pending(folder) -> PendingChange:
    """Read back a :class:`PendingChange` written by :meth:`PendingChange.save`."""
    import pyarrow.parquet as pq

    folder = Path(folder)
    try:
        meta = json.loads((folder / "pending.json").read_text(encoding="utf-8"))
        full = {}
        for i, stream in enumerate(meta["streams"]):
            frame = pq.read_table(folder / f"frame-{i}.parquet").to_pandas()
            frame.index = pd.DatetimeIndex(frame.index, name=INDEX_NAME)
            full[stream] = frame
        parts = [pq.read_table(folder / f"log-{i}.parquet").to_pandas() for i in range(meta["n_log_parts"])]
    except (OSError, ValueError, KeyError) as exc:
        raise StoreError(f"pending store change is unreadable ({type(exc).__name__})", file=folder) from None
    store = SiteStore(meta["store_root"], clock_reset_fraction=meta["clock_reset_fraction"],
                      clock_reset_min_overlap=meta["clock_reset_min_overlap"])
    return PendingChange(store=store, base_sha256=meta["base_sha256"], old_manifest=meta["old_manifest"],
                         new_manifest=meta["new_manifest"], full_frames=full, dirty=meta["dirty"],
                         log_parts=parts, reports=[AddReport(**r) for r in meta["reports"]],
                         now=pd.Timestamp(meta["now"]))

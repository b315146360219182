"""Atomic file writes: write aside, flush to disk, rename into place.

Guarantees (POSIX, one local file system):

- :func:`atomic_write_bytes`, :func:`atomic_write_text`, :func:`atomic_write_parquet`:
  the target path holds either its old bytes or the complete new bytes, never a partial
  file, whatever happens (exception, SIGKILL, power loss after the call returned). The data
  go to a temporary file in the same folder (``.NAME.XXXX.tmp``), are fsynced, renamed over
  the target with :func:`os.replace` (atomic on POSIX), and the folder is fsynced so the
  rename itself is durable. On an exception the temporary file is removed; after a SIGKILL
  it may remain as a hidden ``*.tmp`` file that :func:`remove_stale_temporaries` deletes.
- :class:`StagedFolder`: a set of output files written into ``FOLDER/.staging-XXXX`` and,
  when every one is complete, renamed into ``FOLDER`` one by one. If anything fails before
  the renames start, ``FOLDER`` is untouched. POSIX has no rename of several files as one
  step: a crash *during* the rename loop (microseconds, no data written) can leave some
  files new and some old, but each file is always complete. Where the set must change as
  one step (the site store), keep immutable content-named files and switch a single
  manifest file atomically instead (see :mod:`towerflow.store`).
"""
from __future__ import annotations

import hashlib
import io
import os
import shutil
import tempfile
from pathlib import Path

__all__ = [
    "atomic_write_bytes",
    "atomic_write_text",
    "atomic_write_parquet",
    "parquet_bytes",
    "fsync_folder",
    "remove_stale_temporaries",
    "StagedFolder",
]

TEMP_SUFFIX = ".tmp"


def fsync_folder(folder) -> None:
    """fsync a folder so renames and creations in it are durable (no-op where unsupported)."""
    try:
        fd = os.open(os.fspath(folder), os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without folder descriptors
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


_UMASK = _current_umask()


def _write_temp(folder: Path, name: str, data: bytes) -> Path:
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=TEMP_SUFFIX, dir=folder)
    try:
        # mkstemp creates 0600; give the file the permissions an ordinary write would
        os.fchmod(fd, 0o666 & ~_UMASK)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:
        _unlink_quietly(Path(tmp))
        raise
    return Path(tmp)


def _unlink_quietly(path: Path) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


def atomic_write_bytes(path, data: bytes) -> str:
    """Write ``data`` to ``path`` atomically; returns the sha256 (hex) of ``data``.

    Parameters
    ----------
    path : str or os.PathLike
        Target file; its folder must exist.
    data : bytes
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    tmp = _write_temp(folder, path.name, bytes(data))
    try:
        os.replace(tmp, path)
    except BaseException:
        _unlink_quietly(tmp)
        raise
    fsync_folder(folder)
    return hashlib.sha256(data).hexdigest()


def atomic_write_text(path, text: str, *, encoding: str = "utf-8") -> str:
    """Write ``text`` to ``path`` atomically; returns the sha256 of the encoded bytes."""
    return atomic_write_bytes(path, text.encode(encoding))


def parquet_bytes(table_or_frame, **write_options) -> bytes:
    """A pyarrow Table or pandas DataFrame serialised as parquet bytes (in memory)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = table_or_frame
    if not isinstance(table, pa.Table):
        # one thread: on small frames the conversion pool costs more than it saves (measured:
        # 93 columns × 17 520 rows, 0.06 s with the pool, 0.02 s without)
        table = pa.Table.from_pandas(table_or_frame, preserve_index=True, nthreads=1)
    sink = io.BytesIO()
    pq.write_table(table, sink, **write_options)
    return sink.getvalue()


def atomic_write_parquet(path, table_or_frame, **write_options) -> str:
    """Write a pyarrow Table or pandas DataFrame as parquet to ``path`` atomically.

    ``write_options`` go to :func:`pyarrow.parquet.write_table` (e.g. ``compression``).
    Returns the sha256 (hex) of the file's bytes.
    """
    return atomic_write_bytes(path, parquet_bytes(table_or_frame, **write_options))


def remove_stale_temporaries(folder) -> list[Path]:
    """Delete the hidden ``.NAME.XXXX.tmp`` files a killed writer left in ``folder``.

    Call only while holding the folder's lock (a live writer's temporary would go too).
    """
    removed = []
    folder = Path(folder)
    if not folder.is_dir():
        return removed
    for entry in folder.iterdir():
        if entry.name.startswith(".") and entry.name.endswith(TEMP_SUFFIX) and entry.is_file():
            _unlink_quietly(entry)
            removed.append(entry)
    return removed


class StagedFolder:
    """Write a set of files aside, then move them into ``folder`` together.

    Use as a context manager::

        with StagedFolder(out_dir) as stage:
            stage.write_bytes("summary.json", data)
            frame.to_parquet(stage.path("intervals.parquet"))   # any writer
        # on success every staged file has replaced its namesake in out_dir;
        # on an exception out_dir is untouched and the staging folder is removed

    See the module docstring for what is and is not guaranteed.
    """

    def __init__(self, folder):
        self.folder = Path(folder)
        self._staging: Path | None = None

    def __enter__(self) -> "StagedFolder":
        self.folder.mkdir(parents=True, exist_ok=True)
        self._staging = Path(tempfile.mkdtemp(prefix=".staging-", dir=self.folder))
        return self

    def path(self, name: str) -> Path:
        """The staging path for output ``name`` (a plain file name, no folders)."""
        if self._staging is None:
            raise RuntimeError("StagedFolder used outside its with-block")
        if not name or Path(name).name != name or name in (".", ".."):
            raise ValueError(f"not a plain file name: {name!r}")
        return self._staging / name

    def write_bytes(self, name: str, data: bytes) -> str:
        """Stage ``data`` as ``name``; returns its sha256."""
        self.path(name).write_bytes(data)
        return hashlib.sha256(data).hexdigest()

    def write_text(self, name: str, text: str, *, encoding: str = "utf-8") -> str:
        return self.write_bytes(name, text.encode(encoding))

    def commit(self) -> list[Path]:
        """fsync every staged file, rename each into the folder, fsync the folder."""
        staging = self._staging
        assert staging is not None
        names = sorted(p.name for p in staging.iterdir() if p.is_file())
        for name in names:
            with open(staging / name, "rb") as fh:
                os.fsync(fh.fileno())
        fsync_folder(staging)
        moved = []
        for name in names:
            os.replace(staging / name, self.folder / name)
            moved.append(self.folder / name)
        fsync_folder(self.folder)
        return moved

    def __exit__(self, exc_type, exc, tb) -> None:
        staging, self._staging = self._staging, None
        try:
            if exc_type is None:
                self._staging = staging
                self.commit()
        finally:
            self._staging = None
            if staging is not None:
                shutil.rmtree(staging, ignore_errors=True)

"""The site store (CONTRACT §3): deduplication, conflicts, supersede, clock-reset refusal,
interval mixing, corruption, the lock, atomic writes and kills during a write.

IngestedFile objects are built directly (invented data), independent of the CSV reader.
Thresholds tested (50 % differing values over at least a day of overlap) are the store's
documented defaults (our choice, towerflow/store.py).
"""
from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from pandas.testing import assert_frame_equal

from pipeline.errors import StoreError, TowerflowWarning
from pipeline.ingest import IngestedFile
from towerflow import atomic
from towerflow.store import LOCK_NAME, MANIFEST_NAME, SiteStore


def make_file(name, start, n, *, freq="30min", seed=0, stream="main", columns=("LE", "H", "TA"),
              passthrough=True, tz="UTC"):
    """An invented logger week: smooth diurnal series rounded as a logger writes them."""
    idx = pd.date_range(pd.Timestamp(start, tz=tz), periods=n, freq=freq, name="timestamp_start")
    hours = (idx.tz_convert("UTC").hour + idx.tz_convert("UTC").minute / 60).to_numpy()
    rng = np.random.default_rng(seed)
    data = {}
    for k, col in enumerate(columns):
        data[col] = np.round(100 * np.sin((hours - 6) / 24 * 2 * np.pi + k) + rng.normal(0, 5, n), 2)
    raw = pd.DataFrame(data, index=idx)
    if passthrough:
        raw["AGC"] = [f"g{v % 7}" for v in range(n)]
    return ingested(name, raw, stream=stream, interval=pd.Timedelta(freq))


def ingested(name, raw, *, stream="main", interval=pd.Timedelta("30min")):
    digest = hashlib.sha256(name.encode() + pd.util.hash_pandas_object(raw).to_numpy().tobytes()).hexdigest()
    return IngestedFile(path=Path("/incoming") / name, sha256=digest, stream=stream, raw=raw,
                        rows=np.arange(2, len(raw) + 2), interval=interval)


def snapshot(root: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(root.iterdir())}


@pytest.fixture
def store(tmp_path):
    return SiteStore(tmp_path / "invented-meadow" / "store")


WEEK = 7 * 48


def test_add_and_read_roundtrip(store):
    f = make_file("w1.csv", "2025-06-02", WEEK)
    report = store.add(f)
    assert (report.new_rows, report.identical_rows, report.conflicts) == (WEEK, 0, 0)
    frames = store.read()
    assert list(frames) == ["main"]
    got = frames["main"]
    assert list(got.columns) == ["LE", "H", "TA", "AGC"]  # source columns only
    assert got.index.name == "timestamp_start" and str(got.index.tz) == "UTC"
    assert_frame_equal(got, f.raw, check_freq=False)
    assert store.streams() == {"main": pd.Timedelta("30min")}
    files = store.files()
    assert list(files["sha256"]) == [f.sha256] and files.loc[0, "rows"] == WEEK


def test_provenance_per_row(store):
    a = make_file("w1.csv", "2025-06-02", WEEK)
    b = make_file("w2.csv", "2025-06-09", WEEK, seed=1)
    store.add(a)
    store.add(b)
    prov = store.provenance("main")
    assert list(prov.columns) == ["source_file", "source_sha256", "ingested_at", "changed_by_file",
                                  "changed_by_sha256"]
    assert (prov.loc[a.raw.index, "source_sha256"] == a.sha256).all()
    assert (prov.loc[b.raw.index, "source_file"] == "w2.csv").all()
    assert prov["changed_by_sha256"].isna().all()
    assert str(prov["ingested_at"].dt.tz) == "UTC"


def test_identical_overlap_merges_silently(store):
    """Two exports sharing three days: overlapping identical rows merge, new rows added."""
    full = make_file("all.csv", "2025-06-02", 2 * WEEK).raw
    a = ingested("a.csv", full.iloc[:WEEK])
    b = ingested("b.csv", full.iloc[WEEK - 3 * 48:])
    store.add(a)
    report = store.add(b)
    assert report.identical_rows == 3 * 48 and report.new_rows == WEEK and report.conflicts == 0
    assert_frame_equal(store.read()["main"], full, check_freq=False)
    assert len(store.conflicts()) == 0
    # rows first written by a keep their provenance
    assert (store.provenance("main").loc[full.index[:WEEK], "source_file"] == "a.csv").all()


def test_same_file_again_changes_nothing(store):
    f = make_file("w1.csv", "2025-06-02", WEEK)
    store.add(f)
    before = snapshot(store.root)
    report = store.add(f)
    assert report.already_ingested and report.new_rows == 0
    reports = store.add_many([f, f])
    assert all(r.already_ingested for r in reports)
    assert snapshot(store.root) == before  # byte for byte


def test_weeks_out_of_order_give_the_same_store(tmp_path):
    weeks = [make_file(f"w{i}.csv", pd.Timestamp("2025-06-02") + pd.Timedelta(days=7 * i), WEEK, seed=i)
             for i in range(3)]
    ordered, shuffled = SiteStore(tmp_path / "a"), SiteStore(tmp_path / "b")
    for w in weeks:
        ordered.add(w)
    for w in (weeks[2], weeks[0], weeks[1]):
        shuffled.add(w)
    assert_frame_equal(ordered.read()["main"], shuffled.read()["main"])


def test_conflict_keeps_stored_value_and_logs(store):
    a = make_file("a.csv", "2025-06-02", WEEK)
    raw = a.raw.copy()
    raw.iloc[10, 0] += 50.0  # one LE value differs
    raw.iloc[20, 3] = "other"  # one text value differs
    b = ingested("b.csv", raw)
    store.add(a)
    report = store.add(b)
    assert report.conflicts == 2 and report.superseded == 0 and report.warnings
    got = store.read()["main"]
    assert got.iloc[10, 0] == a.raw.iloc[10, 0]
    assert got.iloc[20, 3] == a.raw.iloc[20, 3]
    log = store.conflicts().sort_values("column").reset_index(drop=True)
    assert list(log["column"]) == ["AGC", "LE"]
    le = log.iloc[1]
    assert le["outcome"] == "kept_stored"
    assert le["stored_value"] == a.raw.iloc[10, 0] and le["new_value"] == raw.iloc[10, 0]
    assert le["stored_sha256"] == a.sha256 and le["new_sha256"] == b.sha256
    assert le["timestamp_start"] == a.raw.index[10]
    assert log.iloc[0]["new_text"] == "other"
    # the log is appended to, never rewritten from scratch
    raw2 = a.raw.copy()
    raw2.iloc[30, 1] -= 7.0
    store.add(ingested("c.csv", raw2))
    assert len(store.conflicts()) == 3


def test_rounding_differences_are_not_conflicts(store):
    """The same value written with fewer digits (differences ~1e-9 relative) merges."""
    a = make_file("a.csv", "2025-06-02", 48, passthrough=False)
    raw = a.raw * (1 + 1e-9)
    store.add(a)
    assert store.add(ingested("b.csv", raw)).conflicts == 0


def test_supersede_new_value_wins_and_old_is_logged(store):
    a = make_file("a.csv", "2025-06-02", WEEK)
    raw = a.raw.copy()
    raw.iloc[5:8, 1] = -1.0
    b = ingested("b.csv", raw)
    store.add(a)
    report = store.add(b, supersede=True)
    assert report.conflicts == 3 and report.superseded == 3 and report.changed_rows == 3
    got = store.read()["main"]
    np.testing.assert_array_equal(got.iloc[5:8, 1], -1.0)
    log = store.conflicts()
    assert set(log["outcome"]) == {"superseded"}
    np.testing.assert_array_equal(np.sort(log["stored_value"]), np.sort(a.raw.iloc[5:8, 1]))
    prov = store.provenance("main")
    assert (prov.iloc[5:8]["changed_by_sha256"] == b.sha256).all()
    assert (prov.iloc[5:8]["source_sha256"] == a.sha256).all()
    assert prov.iloc[9]["changed_by_sha256"] is None


def test_missing_values_are_filled_and_new_columns_added(store):
    a = make_file("a.csv", "2025-06-02", 96)
    raw_a = a.raw.copy()
    raw_a.iloc[0:4, 0] = np.nan
    store.add(ingested("a.csv", raw_a))
    raw_b = a.raw.copy()
    raw_b["PA"] = 95.0
    report = store.add(ingested("b.csv", raw_b))
    assert report.conflicts == 0 and report.new_columns == ["PA"]
    assert report.filled_values == 4 + 96
    got = store.read()["main"]
    assert_frame_equal(got[["LE", "H", "TA", "AGC"]], a.raw, check_freq=False)
    assert list(got.columns) == ["LE", "H", "TA", "AGC", "PA"]


def test_clock_reset_file_is_refused(store):
    """A logger whose clock was reset restamps last week's data as this week's."""
    w1 = make_file("w1.csv", "2025-06-02", WEEK, seed=1)
    w2 = make_file("w2.csv", "2025-06-09", WEEK, seed=2)
    store.add_many([w1, w2])
    before = snapshot(store.root)
    # the old data, stamped 5 days late: overlaps w1's last 2 days and w2 with other values
    restamped = w1.raw.copy()
    restamped.index = restamped.index + pd.Timedelta(days=5)
    bad = ingested("w3.csv", restamped)
    for supersede in (False, True):
        with pytest.raises(StoreError, match="clock reset") as info:
            store.add(bad, supersede=supersede)
        assert "w3.csv" in str(info.value) and "\n" not in str(info.value)
    assert snapshot(store.root) == before


def test_short_conflicting_overlap_is_only_logged(store):
    """Under a day of conflicting overlap is not enough to call it a clock reset."""
    a = make_file("a.csv", "2025-06-02", 96, seed=1)
    b = make_file("b.csv", pd.Timestamp("2025-06-03 12:00"), 96, seed=2)  # 12 h overlap
    store.add(a)
    report = store.add(b)
    assert report.conflicts > 0 and report.conflicts == len(store.conflicts())
    assert report.new_rows == 72
    assert_frame_equal(store.read()["main"].iloc[:96], a.raw, check_freq=False)  # stored values kept


def test_interval_mix_is_refused(store):
    store.add(make_file("half-hourly.csv", "2025-06-02", 48))
    before = snapshot(store.root)
    hourly = make_file("hourly.csv", "2025-06-03", 24, freq="60min")
    with pytest.raises(StoreError, match="refusing to mix intervals") as info:
        store.add(hourly)
    assert "hourly.csv" in str(info.value) and "30-minute" in str(info.value)
    assert snapshot(store.root) == before
    # another stream may have its own interval
    store.add(make_file("met.csv", "2025-06-02", 144, freq="10min", stream="met"))
    assert store.streams() == {"main": pd.Timedelta("30min"), "met": pd.Timedelta("10min")}


@pytest.mark.parametrize("bad", ["../x", "a/b", "", "main.parquet"])
def test_unsafe_stream_name_refused(store, bad):
    f = make_file("a.csv", "2025-06-02", 4, stream=bad)
    with pytest.raises(StoreError, match="stream name"):
        store.add(f)


def test_malformed_frames_refused(store):
    f = make_file("a.csv", "2025-06-02", 4)
    dup = ingested("dup.csv", pd.concat([f.raw, f.raw.iloc[:1]]))
    with pytest.raises(StoreError, match="appears twice"):
        store.add(dup)
    naive = f.raw.copy()
    naive.index = naive.index.tz_localize(None)
    with pytest.raises(StoreError, match="time-zone-aware"):
        store.add(ingested("naive.csv", naive))
    assert not store.root.exists() or not (store.root / MANIFEST_NAME).exists()


def test_non_utc_stamps_stored_in_utc(store):
    f = make_file("a.csv", "2025-06-02 01:00", 4, tz="Etc/GMT-1")
    store.add(f)
    got = store.read()["main"]
    assert str(got.index.tz) == "UTC" and got.index[0] == pd.Timestamp("2025-06-02 00:00", tz="UTC")


def test_corrupted_data_file_is_detected(store):
    store.add(make_file("a.csv", "2025-06-02", WEEK))
    (data_file,) = store.root.glob("stream-main.*.parquet")
    blob = bytearray(data_file.read_bytes())
    blob[len(blob) // 2] ^= 0xFF
    data_file.write_bytes(bytes(blob))
    for call in (store.read, store.verify, lambda: store.provenance("main"),
                 lambda: store.add(make_file("b.csv", "2025-06-09", 48))):
        with pytest.raises(StoreError, match="corrupted") as info:
            call()
        assert data_file.name in str(info.value)


def test_corrupted_manifest_is_detected(store):
    store.add(make_file("a.csv", "2025-06-02", 48))
    (store.root / MANIFEST_NAME).write_text('{"format": 1, "streams": ')
    with pytest.raises(StoreError, match="manifest") as info:
        store.read()
    assert MANIFEST_NAME in str(info.value)


def test_manifest_cannot_point_outside_the_store(store):
    store.add(make_file("a.csv", "2025-06-02", 48))
    path = store.root / MANIFEST_NAME
    manifest = json.loads(path.read_text())
    manifest["streams"]["main"]["data"] = "../../secret.parquet"
    path.write_text(json.dumps(manifest))
    with pytest.raises(StoreError, match="corrupted"):
        store.read()


def test_lock_refuses_a_second_run(store):
    other = SiteStore(store.root)
    with store.lock():
        with store.lock():  # re-entrant for the holder
            store.add(make_file("a.csv", "2025-06-02", 48))
        info = json.loads((store.root / LOCK_NAME).read_text())
        assert info["pid"] == os.getpid()
        with pytest.raises(StoreError, match=rf"store is locked by pid {os.getpid()} since") as err:
            other.add(make_file("b.csv", "2025-06-03", 48))
        assert LOCK_NAME in str(err.value)
    assert not (store.root / LOCK_NAME).exists()
    other.add(make_file("b.csv", "2025-06-03", 48))


def test_stale_lock_is_taken_over_with_a_warning(store):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    store.root.mkdir(parents=True)
    import socket
    (store.root / LOCK_NAME).write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(),
                                                    "since": "2025-06-01T00:00:00+00:00", "token": "x"}))
    with pytest.warns(TowerflowWarning, match=f"stale lock of pid {dead.pid}"):
        store.add(make_file("a.csv", "2025-06-02", 48))
    assert not (store.root / LOCK_NAME).exists()


def test_failed_add_many_leaves_store_unchanged(store):
    """A run that fails on its 3rd file leaves the store byte-for-byte unchanged."""
    store.add(make_file("w0.csv", "2025-05-26", WEEK, seed=10))
    before = snapshot(store.root)
    w1 = make_file("w1.csv", "2025-06-02", WEEK, seed=1)
    w2 = make_file("w2.csv", "2025-06-09", WEEK, seed=2)
    bad = ingested("w3.csv", make_file("x", "2025-05-26", WEEK, seed=3).raw)  # conflicts wholesale with w0
    with pytest.raises(StoreError, match="clock reset"):
        store.add_many([w1, w2, bad])
    assert snapshot(store.root) == before
    assert len(store.read()["main"]) == WEEK


@pytest.mark.parametrize("fail_at", [1, 2, 3])
def test_failure_during_rename_leaves_store_unchanged(store, monkeypatch, fail_at):
    """os.replace raising at the data file, the log or the manifest: nothing changes."""
    full = make_file("all.csv", "2025-06-02", 2 * WEEK).raw
    a = ingested("a.csv", full.iloc[:WEEK])
    store.add(a)
    before = snapshot(store.root)
    raw = full.iloc[3 * 48:3 * 48 + WEEK].copy()  # overlaps a by four days
    raw.iloc[:3, 0] = 999.0  # a few conflicts, so the log is written too
    b = ingested("b.csv", raw)
    real_replace = os.replace
    calls = []

    def failing_replace(src, dst):
        calls.append(dst)
        if len(calls) == fail_at:
            raise OSError("disk full (simulated)")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", failing_replace)
    with pytest.raises(OSError, match="simulated"):
        store.add(b)
    monkeypatch.setattr(os, "replace", real_replace)
    assert len(calls) == fail_at
    assert snapshot(store.root) == before
    assert_frame_equal(store.read()["main"], a.raw, check_freq=False)
    assert store.add(b).conflicts == 3  # and the store still works


_CHILD = textwrap.dedent('''
    import os, signal, sys
    import numpy as np, pandas as pd
    from pathlib import Path
    sys.path.insert(0, {tests!r})
    from test_store import make_file
    from towerflow.store import SiteStore
    store = SiteStore({root!r})
    mode = sys.argv[1]
    if mode == "kill-before-commit":
        real = os.replace
        def replace(src, dst):
            if str(dst).endswith("manifest.json"):
                os.kill(os.getpid(), signal.SIGKILL)  # between the write and the rename
            return real(src, dst)
        os.replace = replace
        store.add(make_file("w9.csv", "2025-08-04", 7 * 48, seed=9))
    else:
        i = 0
        while True:  # keep writing a large store until killed
            store.add(make_file(f"y{{i}}.csv", pd.Timestamp("2024-01-01") + pd.Timedelta(days=7 * i),
                                7 * 48, seed=i, columns=tuple(f"C{{k}}" for k in range(30))))
            i += 1
''')


def _run_child(root, mode, *, kill_after=None):
    code = _CHILD.format(tests=str(Path(__file__).parent), root=str(root))
    proc = subprocess.Popen([sys.executable, "-c", code, mode])
    if kill_after is not None:
        deadline = time.monotonic() + 60
        while not (root / MANIFEST_NAME).exists() and time.monotonic() < deadline:
            time.sleep(0.02)
        time.sleep(kill_after)
        proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=60)
    return proc.returncode


def test_sigkill_between_write_and_rename(store):
    a = make_file("a.csv", "2025-06-02", WEEK)
    store.add(a)
    before_manifest = (store.root / MANIFEST_NAME).read_bytes()
    assert _run_child(store.root, "kill-before-commit") == -signal.SIGKILL
    assert (store.root / MANIFEST_NAME).read_bytes() == before_manifest
    assert_frame_equal(store.read()["main"], a.raw, check_freq=False)
    store.verify()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        store.add(make_file("b.csv", "2025-06-09", 48))  # takes the dead run's lock over, cleans up
    assert any("stale lock" in str(w.message) for w in caught)
    names = {p.name for p in store.root.iterdir()}
    assert len([n for n in names if n.startswith("stream-main.")]) == 1  # orphans removed
    assert not any(n.endswith(".tmp") for n in names)


@pytest.mark.parametrize("delay", [0.3, 0.9])
def test_sigkill_of_a_writing_process_leaves_a_readable_store(store, delay):
    assert _run_child(store.root, "loop", kill_after=delay) == -signal.SIGKILL
    reader = SiteStore(store.root)
    reader.verify()
    frames = reader.read()
    files = reader.files()
    assert len(frames["main"]) == int(files["new_rows"].sum())  # manifest and data agree
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TowerflowWarning)
        reader.add(make_file("z.csv", "2030-01-01", 48, columns=("C0",)))
    reader.verify()


# ------------------------------------------------------------------------- atomic writes
def test_atomic_write_replaces_whole_file(tmp_path, monkeypatch):
    target = tmp_path / "summary.json"
    atomic.atomic_write_text(target, "old")
    digest = atomic.atomic_write_bytes(target, b"new contents")
    assert target.read_bytes() == b"new contents"
    assert digest == hashlib.sha256(b"new contents").hexdigest()

    def boom(src, dst):
        raise OSError("simulated")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError):
        atomic.atomic_write_bytes(target, b"half")
    assert target.read_bytes() == b"new contents"
    assert [p.name for p in tmp_path.iterdir()] == ["summary.json"]  # no temporary left


def test_atomic_write_parquet_roundtrip(tmp_path):
    frame = pd.DataFrame({"le": [1.0, 2.0]}, index=pd.date_range("2025-06-02", periods=2, freq="30min",
                                                                    tz="UTC", name="timestamp_start"))
    path = tmp_path / "x.parquet"
    digest = atomic.atomic_write_parquet(path, frame)
    assert digest == hashlib.sha256(path.read_bytes()).hexdigest()
    assert_frame_equal(pd.read_parquet(path), frame, check_freq=False)


def test_staged_folder_commits_all_or_nothing_before_renames(tmp_path):
    out = tmp_path / "invented-meadow"
    out.mkdir()
    (out / "intervals.parquet").write_bytes(b"old intervals")
    (out / "summary.json").write_bytes(b"old summary")
    with pytest.raises(RuntimeError):
        with atomic.StagedFolder(out) as stage:
            stage.write_bytes("intervals.parquet", b"new intervals")
            raise RuntimeError("the run failed before writing the summary")
    assert snapshot(out) == {"intervals.parquet": b"old intervals", "summary.json": b"old summary"}
    with atomic.StagedFolder(out) as stage:
        stage.write_bytes("intervals.parquet", b"new intervals")
        stage.path("summary.json").write_text("new summary")
        with pytest.raises(ValueError):
            stage.path("../escape.txt")
    assert snapshot(out) == {"intervals.parquet": b"new intervals", "summary.json": b"new summary"}


# ------------------------------------------------------------------------- property
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_TRUTH = make_file("truth.csv", "2025-06-02", 4 * 48, seed=42).raw


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(slices=st.lists(st.tuples(st.integers(0, 4 * 48 - 1), st.integers(1, 4 * 48)), min_size=1, max_size=5),
       holes=st.lists(st.tuples(st.integers(0, 4 * 48 - 1), st.integers(0, 2)), max_size=10),
       batch=st.booleans(), text=st.booleans())
def test_overlapping_slices_of_one_truth_rebuild_it(tmp_path_factory, slices, holes, batch, text):
    """Any order of overlapping exports of the same data (with missing cells) rebuilds the
    data: no conflicts, no duplicates, every non-missing value preserved (invariant). With a
    text column (the general merge) and without (numbers only: the float merge)."""
    files = []
    truth = _TRUTH if text else _TRUTH.drop(columns=["AGC"])
    for k, (start, length) in enumerate(slices):
        part = truth.iloc[start:start + length].copy()
        for row, col in holes:  # cells missing in this export only
            if start <= row < start + length and (row + k) % 2:
                part.iat[row - start, col] = np.nan
        files.append(ingested(f"part{k}.csv", part))
    store = SiteStore(tmp_path_factory.mktemp("store") / "store")
    if batch:
        reports = store.add_many(files)
    else:
        reports = [store.add(f) for f in files]
    assert sum(r.conflicts for r in reports) == 0
    got = store.read()["main"]
    assert got.index.is_unique and got.index.is_monotonic_increasing
    covered = sorted({i for s, n in slices for i in range(s, min(s + n, len(truth)))})
    expected = truth.iloc[covered]
    assert got.index.equals(expected.index)
    values = got[["LE", "H", "TA"]].to_numpy()
    truth = expected[["LE", "H", "TA"]].to_numpy()
    present = ~np.isnan(values)
    np.testing.assert_array_equal(values[present], truth[present])
    # a cell is missing only if every export covering it lacked it
    assert present.sum() >= truth.size - len(holes)


# ------------------------------------------------------------------------- staged change
def test_prepare_writes_nothing_until_commit(store):
    from towerflow.store import PendingChange

    store.add(make_file("w1.csv", "2025-06-02", WEEK, seed=1))
    before = snapshot(store.root)
    w2 = make_file("w2.csv", "2025-06-09", WEEK, seed=2)
    pending = store.prepare([w2])
    assert isinstance(pending, PendingChange) and pending.changed
    assert snapshot(store.root) == before
    assert len(pending.frames["main"]) == 2 * WEEK
    report = json.loads(json.dumps(pending.report))  # JSON-ready
    assert report["new_rows"] == {"main": WEEK} and report["conflicts"] == 0
    pending.commit()
    pending.commit()  # idempotent
    assert_frame_equal(store.read()["main"], pending.frames["main"])


def test_commit_refused_when_another_run_committed_first(store):
    store.add(make_file("w1.csv", "2025-06-02", WEEK, seed=1))
    first = store.prepare([make_file("w2.csv", "2025-06-09", WEEK, seed=2)])
    second = SiteStore(store.root).prepare([make_file("w3.csv", "2025-06-16", WEEK, seed=3)])
    first.commit()
    after_first = snapshot(store.root)
    with pytest.raises(StoreError, match="store changed since this run read it"):
        second.commit()
    assert snapshot(store.root) == after_first


def test_pending_change_survives_a_process_hand_over(store, tmp_path):
    from towerflow.store import load_pending

    store.add(make_file("w1.csv", "2025-06-02", WEEK, seed=1))
    raw = make_file("w1.csv", "2025-06-02", WEEK, seed=1).raw.copy()
    raw.iloc[0, 0] = -5.0  # one conflict, so a log part travels too
    pending = store.prepare([ingested("w1b.csv", raw), make_file("w2.csv", "2025-06-09", WEEK, seed=2)],
                            supersede=True)
    folder = pending.save(tmp_path / "pending-store")
    loaded = load_pending(folder)
    assert loaded.store_root == store.root and loaded.report == pending.report
    for name in pending.frames:
        assert_frame_equal(loaded.frames[name], pending.frames[name])
    loaded.commit()
    got = store.read()["main"]
    assert got.iloc[0, 0] == -5.0 and len(got) == 2 * WEEK
    assert len(store.conflicts()) == 1 and store.conflicts().loc[0, "outcome"] == "superseded"


def test_nothing_new_commits_nothing(store):
    f = make_file("w1.csv", "2025-06-02", WEEK)
    store.add(f)
    before = snapshot(store.root)
    pending = store.prepare([f])
    assert not pending.changed and pending.report["already_ingested"] == 1
    pending.commit()
    assert snapshot(store.root) == before


def test_unreadable_lock_file(store):
    """A lock file being written (empty) means locked; an old unreadable one is taken over."""
    store.root.mkdir(parents=True)
    lock = store.root / LOCK_NAME
    lock.write_text("")
    with pytest.raises(StoreError, match="store is locked by another process"):
        store.add(make_file("a.csv", "2025-06-02", 4))
    old = time.time() - 3600
    os.utime(lock, (old, old))
    with pytest.warns(TowerflowWarning, match="unreadable lock file"):
        store.add(make_file("a.csv", "2025-06-02", 4))


def test_positions_match_get_indexer():
    """The binary-search look-up of stamps gives what DatetimeIndex.get_indexer gives, also
    for a stamp the index lacks (the general look-up then; regression)."""
    from towerflow.store import _positions

    index = pd.date_range("2021-01-01", periods=48, freq="30min", tz="UTC")
    want = index[[0, 5, 47]]
    assert np.array_equal(_positions(index, want.asi8), index.get_indexer(want))
    odd = pd.DatetimeIndex([index[3], pd.Timestamp("2021-01-01 00:10", tz="UTC")])
    assert np.array_equal(_positions(index, odd.asi8), index.get_indexer(odd))
    later = pd.DatetimeIndex([pd.Timestamp("2022-01-01", tz="UTC")])
    assert np.array_equal(_positions(index, later.asi8), [-1])


# ------------------------------------------------------------------------- float merge
def _numbers_weeks():
    """Invented weeks of numbers only (the float merge): two-hour overlaps, holes filled by a
    later export, a conflicting value, a column that appears in week 1, a stored store, then
    a gap filled late: a day of week 2 with two columns, then the whole week."""
    truth = make_file("truth.csv", "2025-06-02", 4 * WEEK, seed=7, columns=("LE", "H", "TA", "RH"),
                      passthrough=False).raw
    first = []
    for k in range(4):
        raw = truth.iloc[max(k * WEEK - 4, 0):(k + 1) * WEEK].copy()  # two hours of the week before
        if k == 0:
            raw = raw.drop(columns=["RH"])
        raw.iloc[-3:-1, 0] = np.nan  # holes the next export fills
        if k == 1:
            raw.iloc[2, 1] += 3.0  # conflicts with week 0 in the overlap
        first.append(ingested(f"w{k}.csv", raw))
    week2 = first.pop(2)  # week 2 arrives in the second batch, after week 3 ...
    late = ingested("late.csv", week2.raw.iloc[100:148][["LE", "TA"]])  # ... after a day of it
    return first, [late, week2]


def _merged(root, batches, supersede, monkeypatch, *, general):
    import towerflow.store as store_module

    monkeypatch.setattr(store_module, "_now", lambda: pd.Timestamp("2025-07-01 12:00", tz="UTC"))
    if general:
        monkeypatch.setattr(store_module._FloatStream, "takes_stored", staticmethod(lambda stored, now: False))
    out = []
    for batch in batches:
        pending = SiteStore(root).prepare(batch, supersede=supersede)
        out.append((pending._full, pending._log_parts, pending.report, pending.warnings))
        pending.commit()
    monkeypatch.undo()
    return out


@pytest.mark.parametrize("supersede", [False, True])
def test_float_merge_gives_the_general_merge(tmp_path, monkeypatch, supersede):
    """Files of numbers only merge on numpy arrays; the frames, reports and conflicts logs are
    those of the general (frame by frame) merge, also over a stored store (regression)."""
    first, second = _numbers_weeks()
    fast = _merged(tmp_path / "fast", [first, second], supersede, monkeypatch, general=False)
    slow = _merged(tmp_path / "slow", [first, second], supersede, monkeypatch, general=True)
    for (f_full, f_log, f_report, f_warn), (s_full, s_log, s_report, s_warn) in zip(fast, slow):
        assert f_full.keys() == s_full.keys()
        for stream in f_full:
            assert_frame_equal(f_full[stream], s_full[stream], check_exact=True)
        assert len(f_log) == len(s_log) and f_report == s_report and f_warn == s_warn
        for a, b in zip(f_log, s_log):
            assert_frame_equal(a, b, check_exact=True)
    assert fast[0][2]["conflicts"] >= 1 and fast[0][2]["filled_values"] > 0
    assert [f["new_columns"] for f in fast[0][2]["files"]] == [["LE", "H", "TA"], ["RH"], []]
    assert snapshot(tmp_path / "fast") == snapshot(tmp_path / "slow")


def test_text_file_after_numbers_continues_in_the_general_merge(tmp_path, monkeypatch):
    """A file with a text column after files of numbers: the merge goes on from the same frame."""
    first, _ = _numbers_weeks()
    text = make_file("text.csv", "2025-07-01", 48, seed=5)  # LE, H, TA and the text column AGC
    fast = _merged(tmp_path / "fast", [first + [text]], False, monkeypatch, general=False)
    slow = _merged(tmp_path / "slow", [first + [text]], False, monkeypatch, general=True)
    assert_frame_equal(fast[0][0]["main"], slow[0][0]["main"], check_exact=True)
    assert fast[0][2] == slow[0][2]
    assert fast[0][0]["main"]["AGC"].notna().sum() == 48

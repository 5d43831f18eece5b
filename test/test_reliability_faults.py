"""Store faults: disk full, two writers, readers during writes, damaged files, read-only stores.

Each test builds its store from deterministic chunks (``reliability_support.chunk_arrays``), so
what was appended can be regenerated bit for bit and compared with what the store hands back.
"""

from __future__ import annotations

import contextlib
import json
import multiprocessing
import shutil
import sqlite3
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from reliability_support import (
    CHUNK_SAMPLES,
    JOINTS,
    chunk_arrays,
    demo_seed,
    expected_samples,
    integrity,
    sample_digest,
    write_demo,
)

from compliant_demo.exceptions import (
    CompliantDemoError,
    StoreBusyError,
    StoreCorruptError,
    StoreFullError,
    StoreReadOnlyError,
)
from compliant_demo.store import DemoStore


def _assert_exact(store: DemoStore, demo_id: str, seed: int, n_chunks: int) -> None:
    loaded = store.load_demonstration(demo_id)
    for name, want in expected_samples(seed, n_chunks).items():
        got = getattr(loaded, name)
        assert got is not None and got.shape == want.shape, name
        np.testing.assert_array_equal(got, want, err_msg=name)


def _file_state(path: Path) -> tuple[bytes, int]:
    return path.read_bytes(), path.stat().st_mtime_ns


@contextlib.contextmanager
def _mounted_tmpfs(folder: Path, size_kib: int) -> Iterator[Path]:
    """A tmpfs of ``size_kib`` KiB at ``folder`` (the tests run as root, as CI does)."""
    folder.mkdir()
    subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={size_kib}k,mode=0700", "tmpfs", str(folder)],
        check=True,
        capture_output=True,
    )
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], check=False, capture_output=True)


def _big_chunk(index: int, n: int = 4000) -> dict[str, np.ndarray]:
    rng = np.random.default_rng([77, index])
    shape = (n, len(JOINTS))
    return {
        "t": 1000.0 + (index * n + np.arange(n)) / 1000.0,
        "position": rng.normal(size=shape),
        "velocity": rng.normal(size=shape),
        "torque": rng.normal(size=shape),
        "stiffness": rng.uniform(5.0, 200.0, shape),
    }


# -- disk full -----------------------------------------------------------------------------------


def _fill_up(folder: Path) -> Path:
    """Take every free byte of the file system at ``folder`` with a filler file; return it."""
    filler = folder / "filler"
    with filler.open("wb") as handle:
        try:
            while True:
                handle.write(bytes(65536))
                handle.flush()
        except OSError:
            pass  # ENOSPC: the disk is now full
    return filler


def test_disk_full_stops_with_store_full_error_and_keeps_earlier_demos(tmp_path: Path) -> None:
    with _mounted_tmpfs(tmp_path / "small", 16384) as folder:
        path = folder / "full.sqlite"
        store = DemoStore(str(path))
        earlier = write_demo(store, seed=11, n_chunks=6)
        digest = sample_digest(store.load_demonstration(earlier))
        filling = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        appended = 0
        with pytest.raises(StoreFullError, match=r"full"):
            for index in range(1000):  # 16 MiB hold far fewer than 1000 chunks of 320 kB
                store.append_chunk(filling, **_big_chunk(index))
                appended += 1
        assert appended > 0, "the store was full before the test began filling it"
        assert sample_digest(store.load_demonstration(earlier)) == digest
        partial = store.load_demonstration(filling)
        assert partial.t.shape[0] == appended * 4000, "a failed chunk left samples behind"
        np.testing.assert_array_equal(partial.t[-4000:], _big_chunk(appended - 1)["t"])
        # Closing while not a byte is free (the recorder closes its store after a failed write):
        # no error may escape; the recording is recovered on a later open instead.
        filler = _fill_up(folder)
        try:
            store.close()
        except StoreFullError as exc:
            pytest.fail(f"close() on a full disk raised: {exc}")
        finally:
            filler.unlink()
        assert integrity(path) == "ok"
        with DemoStore(str(path), read_only=True) as reader:
            assert sample_digest(reader.load_demonstration(earlier)) == digest
            _assert_exact(reader, earlier, 11, 6)
            assert reader.load_demonstration(filling).t.shape[0] == appended * 4000


def test_page_limit_reached_mid_statement_is_store_full_error(tmp_path: Path) -> None:
    # SQLite's max_page_count stands in for a full disk without mounting anything. Here SQLITE_FULL
    # comes while a row is inserted, and SQLite then rolls the transaction back by itself.
    path = tmp_path / "limited.sqlite"
    with DemoStore(str(path)) as store:
        earlier = write_demo(store, seed=12, n_chunks=4)
        digest = sample_digest(store.load_demonstration(earlier))
        (pages,) = store.db.execute("PRAGMA page_count").fetchone()
        store.db.execute(f"PRAGMA max_page_count = {pages + 4}")
        filling = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        appended = 0
        with pytest.raises(StoreFullError, match=r"full"):
            for index in range(100):  # 4 pages of 64 KiB hold at most a few 320 kB chunks
                store.append_chunk(filling, **_big_chunk(index))
                appended += 1
        assert sample_digest(store.load_demonstration(earlier)) == digest
        assert store.load_demonstration(filling).t.shape[0] == appended * 4000
        store.db.execute(f"PRAGMA max_page_count = {2**30}")
        store.append_chunk(filling, **_big_chunk(appended))  # room again: recording goes on
        store.finish_demonstration(filling, "complete")
    assert integrity(path) == "ok"


# -- two writers, busy timeout, readers ----------------------------------------------------------


def _writer_process(path: str, seed: int, n_chunks: int, busy_timeout_s: float, out: str) -> None:
    """Writer of the two-writer test: writes ``n_chunks`` and records what happened as JSON."""
    try:
        with DemoStore(path, busy_timeout_s=busy_timeout_s) as store:
            demo_id = write_demo(store, seed, n_chunks, notes=f"seed {seed}")
        outcome = {"ok": True, "id": demo_id}
    except StoreBusyError as exc:
        outcome = {"ok": False, "busy": True, "message": str(exc)}
    except Exception as exc:  # report anything else to the test instead of dying silently
        outcome = {"ok": False, "busy": False, "message": f"{type(exc).__name__}: {exc}"}
    Path(out).write_text(json.dumps(outcome))


@pytest.mark.parametrize("fresh_file", [False, True], ids=["existing_store", "new_store"])
def test_two_writers_succeed_serially_or_are_refused_clearly(
    tmp_path: Path, fresh_file: bool
) -> None:
    path = tmp_path / "shared.sqlite"
    if not fresh_file:
        with DemoStore(str(path)) as store:
            write_demo(store, seed=5, n_chunks=3)
    context = multiprocessing.get_context("forkserver")
    seeds = (21, 22)
    outs = [tmp_path / f"writer_{seed}.json" for seed in seeds]
    writers = [
        context.Process(target=_writer_process, args=(str(path), seed, 40, 5.0, str(out)))
        for seed, out in zip(seeds, outs, strict=True)
    ]
    try:
        for writer in writers:
            writer.start()
        for writer in writers:
            writer.join(120)
            assert writer.exitcode == 0, f"writer ended with {writer.exitcode} (None: still busy)"
    finally:
        for writer in writers:
            if writer.is_alive():
                writer.kill()
                writer.join(30)
    outcomes = [json.loads(out.read_text()) for out in outs]
    for outcome in outcomes:
        assert outcome["ok"] or outcome["busy"], outcome["message"]
    assert integrity(path) == "ok"
    with DemoStore(str(path), read_only=True) as store:
        for seed, outcome in zip(seeds, outcomes, strict=True):
            if outcome["ok"]:
                _assert_exact(store, outcome["id"], seed, 40)
                assert store.load_demonstration(outcome["id"]).info.status == "complete"


def test_writer_blocked_past_busy_timeout_gets_store_busy_error(tmp_path: Path) -> None:
    path = tmp_path / "locked.sqlite"
    with DemoStore(str(path), busy_timeout_s=0.2) as store:
        demo_id = write_demo(store, seed=31, n_chunks=2, finish=None)
        blocker = sqlite3.connect(str(path), isolation_level=None)
        blocker.execute("BEGIN IMMEDIATE")
        try:
            with pytest.raises(StoreBusyError, match=r"busy"):
                store.append_chunk(demo_id, **chunk_arrays(31, 2))
        finally:
            blocker.execute("ROLLBACK")
            blocker.close()
        store.append_chunk(demo_id, **chunk_arrays(31, 2))
        store.finish_demonstration(demo_id, "complete")
        _assert_exact(store, demo_id, 31, 3)
    assert integrity(path) == "ok"


def test_readers_during_writes_see_only_whole_chunks(tmp_path: Path) -> None:
    from reliability_support import _writer_main

    path = tmp_path / "live.sqlite"
    progress = tmp_path / "live.progress"
    seed, n_chunks = 41, 300
    context = multiprocessing.get_context("forkserver")
    writer = context.Process(
        target=_writer_main, args=(str(path), str(progress), seed, n_chunks, 1)
    )
    writer.start()
    deadline = time.monotonic() + 120.0  # generous: only a writer that never ends reaches it
    seen_sizes = set()
    try:
        while not (progress.exists() and progress.stat().st_size > 0):
            assert writer.is_alive(), f"the writer died before it began (exit {writer.exitcode})"
            assert time.monotonic() < deadline, "the writer never began a demonstration"
            time.sleep(0.001)
        demo_id = progress.read_text().split()[2]  # "D 0 <id>": the first demonstration begun
        expected = expected_samples(demo_seed(seed, 0), n_chunks)
        with DemoStore(str(path), read_only=True) as reader:
            while True:
                finished = not writer.is_alive()
                loaded = reader.load_demonstration(demo_id)
                n = loaded.t.shape[0]
                assert n % CHUNK_SAMPLES == 0, f"a reader saw {n} samples: part of a chunk"
                assert loaded.info.n_samples == n, "metadata and samples from different moments"
                for name, want in expected.items():
                    np.testing.assert_array_equal(getattr(loaded, name), want[:n], err_msg=name)
                seen_sizes.add(n)
                if finished:
                    break
                assert time.monotonic() < deadline, f"writer still going; sizes {len(seen_sizes)}"
                time.sleep(0.01)  # a reader polls; it does not hold the file without a pause
    finally:
        if writer.is_alive():
            writer.kill()
        writer.join(30)
    assert writer.exitcode == 0
    assert max(seen_sizes) == n_chunks * CHUNK_SAMPLES
    assert len(seen_sizes) >= 3, f"the reader only ever saw sizes {sorted(seen_sizes)}"


# -- damaged files -------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def finished_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("pristine") / "pristine.sqlite"
    with DemoStore(str(path)) as store:
        for seed in (51, 52, 53):
            write_demo(store, seed, n_chunks=8, notes=f"seed {seed}")
    assert not Path(f"{path}-wal").exists() or Path(f"{path}-wal").stat().st_size == 0
    return path


def _read_everything(path: Path, read_only: bool) -> list[str]:
    """Open ``path`` and load every demonstration; the sorted sample digests."""
    with DemoStore(str(path), read_only=read_only) as store:
        return sorted(
            sample_digest(store.load_demonstration(info.id))
            for info in store.find_demonstrations()
        )


@pytest.fixture(scope="module")
def pristine_digests(finished_store: Path) -> list[str]:
    return _read_everything(finished_store, read_only=True)


def _damage(source: Path, target: Path, seed: int) -> str:
    data = bytearray(source.read_bytes())
    rng = np.random.default_rng(seed)
    # Odd seeds aim at the first page (header and schema) and the table b-trees after it.
    high = 70_000 if seed % 2 else len(data)
    offsets = rng.integers(0, high, size=int(rng.integers(1, 9)))
    for offset in offsets:
        data[offset] ^= int(rng.integers(1, 256))
    target.write_bytes(bytes(data))
    return f"flipped bytes at {sorted(int(o) for o in offsets)}"


def _named_error_or_nothing_lost(
    path: Path, read_only: bool, pristine: list[str], what: str
) -> None:
    """The damaged store raises one of our named errors, or hands back exactly the pristine data."""
    before = _file_state(path)
    try:
        digests = _read_everything(path, read_only)
    except CompliantDemoError:
        digests = None  # a clear, named error is one of the two acceptable outcomes
    except Exception as exc:  # anything else is the failure this test looks for
        pytest.fail(f"{what}: {type(exc).__name__} escaped: {exc}")
    if digests is not None:
        assert digests == pristine, f"{what}: samples changed without an error"
    assert _file_state(path) == before, f"{what}: the damaged file was written to"


@pytest.mark.parametrize("read_only", [True, False], ids=["read_only", "read_write"])
@pytest.mark.parametrize("seed", range(20))
def test_flipped_bytes_give_a_named_error_or_identical_samples_and_no_write(
    tmp_path: Path, finished_store: Path, pristine_digests: list[str], seed: int, read_only: bool
) -> None:
    copy = tmp_path / "flipped.sqlite"
    what = _damage(finished_store, copy, seed)
    _named_error_or_nothing_lost(copy, read_only, pristine_digests, what)


def test_invalid_utf8_in_the_schema_text_is_store_corrupt_error(
    tmp_path: Path, finished_store: Path
) -> None:
    # Found by the flip test: sqlite3 raised UnicodeDecodeError from inside connect().
    data = bytearray(finished_store.read_bytes())
    data[data.find(b"CREATE TABLE writers") + 8] = 0xFF
    copy = tmp_path / "schema_utf8.sqlite"
    copy.write_bytes(bytes(data))
    before = _file_state(copy)
    with pytest.raises(StoreCorruptError, match=r"schema_utf8\.sqlite"):
        _read_everything(copy, read_only=True)
    assert _file_state(copy) == before


@pytest.mark.parametrize("channel_name", ["t", "position", "torque", "stiffness"])
def test_flipped_bit_inside_a_sample_chunk_is_store_corrupt_error(
    tmp_path: Path, finished_store: Path, channel_name: str
) -> None:
    # A damaged sample must not come back as a plausible number: each chunk needs a checksum.
    data = bytearray(finished_store.read_bytes())
    blob = np.ascontiguousarray(chunk_arrays(52, 3)[channel_name], dtype="<f8").tobytes()
    offset = data.find(blob)
    assert offset > 0, "chunk bytes not found in the file: the sample layout changed"
    data[offset + 43] ^= 0x10
    copy = tmp_path / "bitrot.sqlite"
    copy.write_bytes(bytes(data))
    with pytest.raises(StoreCorruptError, match=r"bitrot\.sqlite"):
        _read_everything(copy, read_only=True)


@pytest.mark.parametrize("read_only", [True, False], ids=["read_only", "read_write"])
@pytest.mark.parametrize("keep", [1, 15, 17, 100, 4096, 65536, 0.5, -1])
def test_truncated_file_gives_a_named_error_or_identical_samples_and_no_write(
    tmp_path: Path, finished_store: Path, pristine_digests: list[str], keep: float,
    read_only: bool,
) -> None:
    data = finished_store.read_bytes()
    length = int(len(data) * keep) if isinstance(keep, float) else keep % len(data)
    copy = tmp_path / "truncated.sqlite"
    copy.write_bytes(data[:length])
    _named_error_or_nothing_lost(copy, read_only, pristine_digests, f"kept {length} bytes")


@pytest.mark.parametrize("keep", [1, 15, 100, 0.5])
def test_truncation_that_cuts_content_is_store_corrupt_error(
    tmp_path: Path, finished_store: Path, keep: float
) -> None:
    data = finished_store.read_bytes()
    length = int(len(data) * keep) if isinstance(keep, float) else keep
    copy = tmp_path / "truncated.sqlite"
    copy.write_bytes(data[:length])
    with pytest.raises(StoreCorruptError, match=r"truncated\.sqlite"):
        _read_everything(copy, read_only=True)


# -- read-only stores ----------------------------------------------------------------------------


def test_read_only_store_reads_and_refuses_every_write(
    tmp_path: Path, finished_store: Path
) -> None:
    path = tmp_path / "ro.sqlite"
    shutil.copyfile(finished_store, path)
    before = _file_state(path)
    with DemoStore(str(path), read_only=True) as store:
        infos = list(store.find_demonstrations())
        assert len(infos) == 3
        demo_id = infos[0].id
        store.load_demonstration(demo_id)
        writes = {
            "begin": lambda: store.begin_demonstration(skill="cork_seat", joints=JOINTS),
            "append": lambda: store.append_chunk(demo_id, **chunk_arrays(99, 50)),
            "finish": lambda: store.finish_demonstration(demo_id, "rejected"),
            "flags": lambda: store.update_flags(demo_id, {"drops": 1}),
            "delete": lambda: store.delete_demonstration(demo_id),
        }
        for name, write in writes.items():
            with pytest.raises(StoreReadOnlyError, match=r"read-only"):
                write()
            assert store.load_demonstration(demo_id).info.status == "complete", name
    assert _file_state(path) == before


@contextlib.contextmanager
def _read_only_file_system(tmp_path: Path, source: Path) -> Iterator[Path]:
    """A copy of ``source`` on a file system that refuses every write, even root's."""
    with _mounted_tmpfs(tmp_path / "ro", 8192) as folder:
        shutil.copyfile(source, folder / "store.sqlite")
        subprocess.run(
            ["mount", "-o", "remount,ro", str(folder)], check=True, capture_output=True
        )
        yield folder / "store.sqlite"


@pytest.mark.parametrize("read_only", [True, False], ids=["opened_read_only", "opened_default"])
def test_store_on_read_only_file_system_reads_and_refuses_writes(
    tmp_path: Path, finished_store: Path, read_only: bool
) -> None:
    with _read_only_file_system(tmp_path, finished_store) as path:
        before = _file_state(path)
        try:
            store = DemoStore(str(path), read_only=read_only)
        except StoreReadOnlyError as exc:
            # Refusing a read-write open of a read-only file is clear; a read-only open must work.
            assert not read_only, f"read-only open of a read-only file failed: {exc}"
            assert "store.sqlite" in str(exc)
            return
        with store:
            infos = list(store.find_demonstrations())
            assert len(infos) == 3
            for info in infos:
                _assert_exact(store, info.id, int(info.notes.split()[-1]), 8)
            with pytest.raises(StoreReadOnlyError, match=r"read-only"):
                store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        assert _file_state(path) == before



@pytest.mark.parametrize("seed", range(8))
def test_merge_from_a_damaged_file_never_spreads_silent_damage(
    tmp_path: Path, finished_store: Path, pristine_digests: list[str], seed: int
) -> None:
    source = tmp_path / "damaged_source.sqlite"
    what = _damage(finished_store, source, seed)
    if seed % 4 == 0:  # and one bit inside a sample chunk, where only a checksum can tell
        data = bytearray(source.read_bytes())
        offset = data.find(np.ascontiguousarray(chunk_arrays(53, 5)["torque"]).tobytes())
        data[offset + 17] ^= 0x08
        source.write_bytes(bytes(data))
        what += f" and bit 3 at {offset + 17}"
    target_path = tmp_path / "target.sqlite"
    with DemoStore(str(target_path)) as target:
        own = write_demo(target, 54, 3)
        own_digest = sample_digest(target.load_demonstration(own))
        try:
            target.merge_from(str(source))
        except CompliantDemoError:
            pass  # a named refusal is fine; what was merged before it must still be sound
        except Exception as exc:
            pytest.fail(f"{what}: {type(exc).__name__} escaped from merge_from: {exc}")
        assert sample_digest(target.load_demonstration(own)) == own_digest
        for info in target.find_demonstrations():
            if info.id == own:
                continue
            try:
                digest = sample_digest(target.load_demonstration(info.id))
            except StoreCorruptError:
                continue  # the damage travelled but is still detected: acceptable
            assert digest in pristine_digests, f"{what}: merged samples differ without an error"
    assert integrity(target_path) == "ok"


def _racing_opener(path: str, barrier: object, results: object) -> None:
    """Open (and so create) the store at the same moment as the other openers; report how."""
    barrier.wait()  # type: ignore[attr-defined]
    try:
        with DemoStore(path, busy_timeout_s=5.0) as store:
            store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        outcome = "ok"
    except StoreBusyError:
        outcome = "busy"
    except Exception as exc:  # the failure this test looks for, reported to the parent
        outcome = f"{type(exc).__name__}: {exc}"
    results.put(outcome)  # type: ignore[attr-defined]


def test_writers_creating_a_new_store_at_once_succeed_or_are_refused_clearly(
    tmp_path: Path,
) -> None:
    # Found when two recorders started on a fresh store path: FileExistsError from the one that
    # lost the race to create the file. 15 rounds of 4 openers released by a barrier.
    context = multiprocessing.get_context("forkserver")
    outcomes = []
    for round_index in range(15):
        path = str(tmp_path / f"new_{round_index}.sqlite")
        barrier, results = context.Barrier(4), context.Queue()
        openers = [context.Process(target=_racing_opener, args=(path, barrier, results))
                   for _ in range(4)]  # fmt: skip
        try:
            for opener in openers:
                opener.start()
            for opener in openers:
                opener.join(60)
            outcomes += [results.get(timeout=10) for _ in openers]
        finally:
            for opener in openers:
                if opener.is_alive():
                    opener.kill()
                    opener.join(30)
        assert integrity(path) == "ok"
    unclear = [outcome for outcome in outcomes if outcome not in ("ok", "busy")]
    assert unclear == []
    assert outcomes.count("ok") >= len(outcomes) // 2

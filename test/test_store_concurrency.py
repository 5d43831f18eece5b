"""Readers and writers in separate processes: a reader sees consistent snapshots while a writer
appends, a live writer's recording is left alone, a dead writer's becomes "incomplete"."""

from __future__ import annotations

import signal
import subprocess
import textwrap
from concurrent.futures import ThreadPoolExecutor
from threading import Barrier

import numpy as np
import pytest
from store_support import JOINTS, PYTHON, integrity, subprocess_env

from compliant_demo.exceptions import StoreBusyError
from compliant_demo.store import DemoStore

_WRITER = textwrap.dedent(
    """
    import sys, time
    import numpy as np
    from compliant_demo.store import DemoStore

    path, chunks, pause, finish = sys.argv[1], int(sys.argv[2]), float(sys.argv[3]), sys.argv[4]
    with DemoStore(path) as store:
        demo_id = store.begin_demonstration(skill="cork_seat", joints=["shoulder", "elbow"],
                                            operator="operator_a")
        print(demo_id, flush=True)
        for i in range(chunks):
            t = (i * 100 + np.arange(100)) / 1000.0
            # every channel is a known function of t, so a reader can spot a torn read
            q = np.column_stack([t, -2.0 * t])
            store.append_chunk(demo_id, t, q, 2 * q, 3 * q, 100.0 + q)
            time.sleep(pause)
        print("appended", flush=True)
        if finish == "finish":
            store.finish_demonstration(demo_id, flags={"drops": 0})
        else:
            time.sleep(600)  # hold the recording open until the test kills us
    """
)


def _start_writer(path, chunks: int, pause: float, finish: str) -> tuple[subprocess.Popen, str]:
    process = subprocess.Popen(
        [PYTHON, "-c", _WRITER, str(path), str(chunks), str(pause), finish],
        stdout=subprocess.PIPE,
        text=True,
        env=subprocess_env(),
    )
    assert process.stdout is not None
    demo_id = process.stdout.readline().strip()
    assert demo_id, "writer did not start"
    return process, demo_id


def _check_consistent(demo) -> None:
    n = demo.t.size
    assert demo.info.n_samples == n
    assert np.array_equal(demo.t, np.arange(n) / 1000.0)
    expected = np.column_stack([demo.t, -2.0 * demo.t])
    assert np.array_equal(demo.position, expected)
    assert np.array_equal(demo.torque, 3 * expected)
    assert np.array_equal(demo.stiffness, 100.0 + expected)


def test_reader_sees_consistent_snapshots_while_a_writer_appends(tmp_path):
    path = tmp_path / "store.sqlite"
    DemoStore(path).close()
    writer, demo_id = _start_writer(path, chunks=60, pause=0.01, finish="finish")
    seen = []
    try:
        with DemoStore(path, read_only=True) as reader:
            while True:
                demo = reader.load_demonstration(demo_id)
                _check_consistent(demo)
                seen.append(demo.t.size)
                if demo.info.status == "complete":
                    break
                assert writer.poll() in (None, 0)
    finally:
        assert writer.wait(timeout=60) == 0
    assert seen == sorted(seen)
    assert seen[-1] == 6000
    assert len(set(seen)) > 2, "the reader never saw the recording in progress"
    with DemoStore(path) as store:
        info = store.get_info(demo_id)
    assert (info.status, info.n_samples, info.flags) == ("complete", 6000, {"drops": 0})
    assert integrity(path) == "ok"


def test_live_writer_is_left_alone_and_a_dead_one_is_recovered(tmp_path):
    path = tmp_path / "store.sqlite"
    DemoStore(path).close()
    writer, demo_id = _start_writer(path, chunks=5, pause=0.0, finish="hold")
    try:
        assert writer.stdout.readline().strip() == "appended"
        with DemoStore(path) as store:  # writable open runs recovery; the writer is alive
            assert store.get_info(demo_id).status == "recording"
            (leases,) = store.db.execute("SELECT count(*) FROM writers").fetchone()
            assert leases == 1
    finally:
        writer.send_signal(signal.SIGKILL)
        writer.wait(timeout=30)
    with pytest.warns(UserWarning, match="left recording by a writer that is gone"):
        store = DemoStore(path)
    with store:
        info = store.get_info(demo_id)
        assert info.status == "incomplete"
        assert info.status_reason == f"writer pid {writer.pid} on {_hostname()} is gone"
        assert info.n_samples == 500  # everything flushed before the crash is kept
        assert info.duration_s == pytest.approx(0.499, abs=1e-12)
        _check_consistent(store.load_demonstration(demo_id))
        (leases,) = store.db.execute("SELECT count(*) FROM writers").fetchone()
        assert leases == 0
    assert integrity(path) == "ok"


def _in_another_process(script: str, path) -> str:
    done = subprocess.run([PYTHON, "-c", textwrap.dedent(script), str(path)], capture_output=True,
                          text=True, env=subprocess_env(), timeout=120, check=True)
    return done.stdout.strip()


def test_a_second_store_object_in_the_writers_process_keeps_its_commits_visible(tmp_path):
    # The recorder's writer thread holds the store while its feedback thread opens it read-only
    # at each start; another run on the same file opens and closes it. Once finish_demonstration
    # returns, a new reader elsewhere must see the demonstration complete (it saw it
    # "recording" until the writer closed, and a write from the other run meanwhile damaged the
    # file, when opening a second store object dropped the writer's file locks).
    path = tmp_path / "store.sqlite"
    wal = tmp_path / "store.sqlite-wal"
    t = np.arange(100) / 1000.0
    zeros = np.zeros((100, 2))
    with DemoStore(path) as writer:
        demo_id = writer.begin_demonstration(skill="cork_seat", joints=JOINTS)
        writer.append_chunk(demo_id, t, zeros, zeros, zeros, zeros)
        with DemoStore(path, read_only=True) as feedback_reader:
            assert feedback_reader.get_info(demo_id).status == "recording"
        _in_another_process(
            """
            import sys
            import numpy as np
            from compliant_demo.store import DemoStore

            with DemoStore(sys.argv[1]) as other_run:
                zeros = np.zeros((10, 2))
                other_run.add_demonstration(t=np.arange(10) / 1000.0, position=zeros,
                                            velocity=zeros, torque=zeros, skill="other_skill",
                                            joints=["shoulder", "elbow"])
            """, path)  # fmt: skip
        assert wal.exists(), "the other process checkpointed and deleted the writer's WAL"
        writer.append_chunk(demo_id, t + 0.1, zeros, zeros, zeros, zeros)
        assert writer.finish_demonstration(demo_id).status == "complete"
        seen = _in_another_process(
            """
            import sys
            from compliant_demo.store import DemoStore

            with DemoStore(sys.argv[1], read_only=True) as reader:
                print(sorted((i.skill, i.status, i.n_samples)
                             for i in reader.find_demonstrations()))
            """, path)  # fmt: skip
        assert seen == "[('cork_seat', 'complete', 200), ('other_skill', 'complete', 10)]"
    assert integrity(path) == "ok"
    with DemoStore(path, read_only=True) as store:
        assert sorted(info.skill for info in store.find_demonstrations()) == [
            "cork_seat", "other_skill"]


def test_closing_a_store_ends_its_own_recordings(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        t = np.arange(10) / 1000.0
        store.append_chunk(demo_id, t, np.zeros((10, 2)), np.zeros((10, 2)), np.zeros((10, 2)),
                           np.ones((10, 2)))  # fmt: skip
    with DemoStore(path) as store:
        info = store.get_info(demo_id)
    assert (info.status, info.status_reason) == ("incomplete", "store closed while recording")
    assert info.n_samples == 10


def test_busy_writer_times_out_with_a_named_error(tmp_path):
    from compliant_demo.exceptions import StoreBusyError

    path = tmp_path / "store.sqlite"
    with DemoStore(path) as first, DemoStore(path, busy_timeout_s=0.05) as second:
        first.db.execute("BEGIN IMMEDIATE")  # hold the write lock as a slow writer would
        with pytest.raises(StoreBusyError, match="store busy \\(another writer holds it\\)"):
            second.begin_demonstration(skill="cork_seat", joints=JOINTS)
        first.db.execute("ROLLBACK")
        assert list(second.find_demonstrations()) == []


def _hostname() -> str:
    import socket

    return socket.gethostname()


def test_openers_creating_one_new_store_at_once_all_get_it(tmp_path):
    # Several recorders started on a fresh path: the losers of the race to create the file used
    # to get FileExistsError (O_EXCL), or "database is locked" from the switch to WAL.
    def open_and_record(path, barrier):
        barrier.wait(timeout=30)
        try:
            with DemoStore(path, busy_timeout_s=5.0) as store:
                store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        except StoreBusyError:
            return "busy"
        return "ok"

    outcomes = []
    with ThreadPoolExecutor(4) as pool:
        for round_index in range(12):
            path, barrier = tmp_path / f"new_{round_index}.sqlite", Barrier(4)
            outcomes += list(pool.map(open_and_record, [path] * 4, [barrier] * 4))
            assert integrity(path) == "ok"
            with DemoStore(path, read_only=True) as reader:
                assert reader.count_demonstrations() == outcomes[-4:].count("ok")
    assert outcomes.count("ok") >= len(outcomes) // 2

"""The disk fills up under a recording recorder: it says so, runs on, and loses nothing earlier.

The store lives on a 24 MiB tmpfs (the tests run as root, as CI does). A first recorder run stores
a complete demonstration; then a filler file leaves about 1.5 MB free and a second run records 3 s
of 7-joint JointState at 1 kHz (loopback DDS, ROS_DOMAIN_ID 65) until the disk is full. The
recorder must count the failed write in its diagnostics, keep running, not report the
demonstration as complete, and leave a sound file whose earlier demonstration is unchanged.
"""

from __future__ import annotations

import os
import subprocess
import warnings
from collections.abc import Iterator

import numpy as np
import pytest
from reliability_support import FLOOD_EPOCH_S, integrity, run_flood, sample_digest

from compliant_demo.store import DemoStore

DOMAIN_ID = 65
RATE_HZ = 1000.0


@pytest.fixture(scope="module")
def disk_full(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict]:
    root = tmp_path_factory.mktemp("recorder_disk_full")
    mount = root / "small"
    mount.mkdir()
    subprocess.run(["mount", "-t", "tmpfs", "-o", "size=24m", "tmpfs", str(mount)], check=True,
                   capture_output=True)  # fmt: skip
    try:
        store = mount / "store.sqlite"
        options = dict(rate_hz=RATE_HZ, slow_s=0.0, buffer_capacity=100_000, store_path=store)
        (root / "first").mkdir()
        first = run_flood(root / "first", DOMAIN_ID, flood_s=0.5, **options)
        with DemoStore(str(store), read_only=True) as reader:
            (earlier,) = list(reader.find_demonstrations())
            digest = sample_digest(reader.load_demonstration(earlier.id))
        free = os.statvfs(mount).f_bavail * os.statvfs(mount).f_frsize
        (mount / "filler").write_bytes(bytes(free - 1_500_000))
        (root / "second").mkdir()
        second = run_flood(root / "second", DOMAIN_ID, flood_s=3.0, **options)
        (mount / "filler").unlink()
        yield {"store": store, "first": first, "second": second, "earlier": earlier.id,
               "digest": digest}  # fmt: skip
    finally:
        subprocess.run(["umount", "-l", str(mount)], check=False, capture_output=True)


@pytest.mark.ros
@pytest.mark.slow
def test_recorder_reports_the_full_disk_and_keeps_running(disk_full: dict) -> None:
    first, second = disk_full["first"], disk_full["second"]
    assert first["stop"][0], first["stop"]
    assert second["recorder_alive_after_flood"], second["recorder_log"]
    assert int(second["diag_after_flood"]["store_write_errors"]) > 0
    success, message = second["stop"]
    assert not (success and message.startswith("complete")), f"stop said {message!r}"
    assert "Traceback" not in second["recorder_log"], second["recorder_log"]


@pytest.mark.ros
@pytest.mark.slow
def test_earlier_demonstration_and_the_file_survive_the_full_disk(disk_full: dict) -> None:
    store = disk_full["store"]
    assert integrity(store) == "ok"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # recovery of the interrupted recording
        with DemoStore(str(store)) as reopened:
            infos = {info.id: info for info in reopened.find_demonstrations()}
            earlier = reopened.load_demonstration(disk_full["earlier"])
            (interrupted_id,) = set(infos) - {disk_full["earlier"]}
            interrupted = reopened.load_demonstration(interrupted_id)
    assert earlier.info.status == "complete"
    assert sample_digest(earlier) == disk_full["digest"]
    assert interrupted.info.status == "incomplete"
    ticks = round((interrupted.info.start_time - FLOOD_EPOCH_S) * RATE_HZ) + np.round(
        interrupted.t * RATE_HZ
    ).astype(int)
    np.testing.assert_array_equal(np.diff(ticks), 1)
    np.testing.assert_array_equal(interrupted.position[:, 0], 1e-4 * ticks)

"""Two recorder processes writing one store file at the same time: both succeed, nothing breaks.

Recorders in namespaces ``/left`` and ``/right`` (loopback DDS, ROS_DOMAIN_ID 64) each record 2 s
of 7-joint JointState at 1 kHz from their own publisher into the same SQLite file. Each chunk is
its own short transaction, so within the busy timeout both must finish "complete"; the file must
pass ``PRAGMA integrity_check`` and each demonstration hold exactly its own publisher's samples
(position = 1e-4 x sample tick), with every sample it did not receive counted in its flags.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from reliability_support import FLOOD_EPOCH_S, FLOOD_JOINTS, integrity, run_flood

from compliant_demo.store import DemoStore

DOMAIN_ID = 64
RATE_HZ = 1000.0
SIDES = ("left", "right")


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, dict]]:
    root = tmp_path_factory.mktemp("two_recorders")
    store_path = root / "shared.sqlite"
    folders = {side: root / side for side in SIDES}
    for folder in folders.values():
        folder.mkdir()
    with ThreadPoolExecutor(max_workers=2) as pool:
        futures = {
            side: pool.submit(
                run_flood, folders[side], DOMAIN_ID, flood_s=2.0, rate_hz=RATE_HZ, slow_s=0.0,
                buffer_capacity=100_000, namespace=side, store_path=store_path,
            )  # fmt: skip
            for side in SIDES
        }
        return store_path, {side: future.result() for side, future in futures.items()}


@pytest.mark.ros
@pytest.mark.slow
def test_both_recorders_finish_and_the_file_is_sound(two_runs: tuple[Path, dict]) -> None:
    store_path, runs = two_runs
    for side, run in runs.items():
        assert run["driver_returncode"] == 0, (side, run["driver_stderr"])
        assert run["start"][0] and run["stop"][0], (side, run["start"], run["stop"])
        assert "store busy" not in run["recorder_log"], run["recorder_log"]
    assert integrity(store_path) == "ok"
    with DemoStore(str(store_path), read_only=True) as store:
        infos = list(store.find_demonstrations())
    assert len(infos) == 2 and {info.status for info in infos} == {"complete"}


@pytest.mark.ros
@pytest.mark.slow
def test_each_demonstration_holds_its_own_samples_exactly(two_runs: tuple[Path, dict]) -> None:
    store_path, runs = two_runs
    with DemoStore(str(store_path), read_only=True) as store:
        demos = [store.load_demonstration(info.id) for info in store.find_demonstrations()]
    sent = sorted(run["flood_sent"] for run in runs.values())
    for demo in demos:
        first_tick = round((demo.info.start_time - FLOOD_EPOCH_S) * RATE_HZ)
        ticks = first_tick + np.round(demo.t * RATE_HZ).astype(int)
        expected = np.repeat((1e-4 * ticks)[:, None], len(FLOOD_JOINTS), axis=1)
        np.testing.assert_array_equal(demo.position, expected)
        np.testing.assert_array_equal(demo.torque, expected)
        flags = demo.info.flags
        assert flags["stored_samples"] == demo.t.size
        # Offered = lost before the first stored sample + received + counted missing.
        missing = flags.get("missing_samples_estimate", 0)
        assert first_tick + flags["received"] + missing in sent, flags
        assert demo.t.size + flags.get("dropped_buffer_full", 0) == flags["received"]

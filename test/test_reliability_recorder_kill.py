"""SIGKILL the recorder process while it records: what it stored is sound, exact and recovered.

A publisher process sends 7-joint JointState at 1 kHz (loopback DDS, ROS_DOMAIN_ID 63) with
position = 1e-4 x (sample tick) in every joint; the recorder process is killed with SIGKILL 1.5 s
after publishing began. The store must pass ``PRAGMA integrity_check``, the next writable open
must mark the demonstration "incomplete", and the stored samples must be a gap-free run of the
published ones with exactly the published values.
"""

from __future__ import annotations

import signal
import warnings

import numpy as np
import pytest
from reliability_support import FLOOD_EPOCH_S, FLOOD_JOINTS, integrity, run_flood

from compliant_demo.store import DemoStore

DOMAIN_ID = 63
RATE_HZ = 1000.0


@pytest.fixture(scope="module")
def killed(tmp_path_factory: pytest.TempPathFactory) -> dict:
    return run_flood(
        tmp_path_factory.mktemp("recorder_kill"), DOMAIN_ID, flood_s=3.0, rate_hz=RATE_HZ,
        slow_s=0.0, buffer_capacity=100_000, kill_after_s=1.5,
    )  # fmt: skip


@pytest.mark.ros
@pytest.mark.slow
def test_killed_recorder_leaves_a_sound_store_with_an_incomplete_demo(killed: dict) -> None:
    assert killed["start"][0], (killed["start"], killed["driver_stderr"])
    assert killed["recorder_returncode"] == -signal.SIGKILL, killed["recorder_log"]
    assert integrity(killed["store_path"]) == "ok"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with DemoStore(killed["store_path"]) as store:
            (info,) = list(store.find_demonstrations())
    assert info.status == "incomplete"
    assert any("incomplete" in str(w.message) for w in caught), "recovery was not reported"


@pytest.mark.ros
@pytest.mark.slow
def test_samples_the_killed_recorder_stored_are_exact_and_gap_free(killed: dict) -> None:
    with DemoStore(killed["store_path"], read_only=True) as store:
        (info,) = list(store.find_demonstrations())
        demo = store.load_demonstration(info.id)
    assert demo.t.size > 0, "nothing was stored in 1.5 s of recording"
    assert demo.t.size < killed["flood_sent"], "samples after the kill cannot be stored"
    first_tick = round((info.start_time - FLOOD_EPOCH_S) * RATE_HZ)
    ticks = first_tick + np.round(demo.t * RATE_HZ).astype(int)
    np.testing.assert_array_equal(np.diff(ticks), 1)
    expected = np.repeat((1e-4 * ticks)[:, None], len(FLOOD_JOINTS), axis=1)
    for channel in (demo.position, demo.velocity, demo.torque):
        np.testing.assert_array_equal(channel, expected)

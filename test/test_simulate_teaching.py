"""``compliant-demo simulate-teaching`` as a user runs it: Ctrl-C pressed twice finishes cleanly,
and two runs at once each get a ROS domain, a seed and a truth file of their own."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import psutil
import pytest
from nodes_support import ros_env, wait_for

from compliant_demo.app.report_content import GroundTruth
from compliant_demo.app.supervisor import start_child, stop_children
from compliant_demo.store import DemoStore

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 74  # this file's own ROS domains: 74, and 75 and 76 for the concurrent runs
CLI = [sys.executable, "-c", "import sys; from compliant_demo.cli import main; "
       "sys.exit(main(sys.argv[1:]))"]


def _environment(tmp_path: Path, domain_id: int) -> dict[str, str]:
    """ROS on loopback from ``domain_id`` up, domain locks private to this test."""
    env = ros_env(domain_id)
    env["XDG_RUNTIME_DIR"] = str(tmp_path)
    return env


def _second_recording(store: Path) -> list:
    """The demonstration being recorded once one is complete (the teacher's ground truth holds
    the demonstrations it finished publishing)."""
    if not store.exists():
        return []
    try:
        with DemoStore(store, read_only=True) as db:
            if db.count_demonstrations(status="complete") < 1:
                return []
            return [i for i in db.find_demonstrations(status="recording") if i.n_samples > 500]
    except Exception:  # the recorder may be creating the file
        return []


def test_two_interrupts_in_quick_succession_still_finish_cleanly(tmp_path: Path) -> None:
    store, out = tmp_path / "store.sqlite", tmp_path / "run"
    command = [*CLI, "simulate-teaching", "--store", str(store), "--out", str(out), "--demos",
               "3", "--demo-duration", "2", "--seed", "2", "--domain-id", str(DOMAIN_ID),
               "--tag", "twice", "--quiet"]
    log = tmp_path / "parent.log"
    with log.open("wb") as handle:
        parent = start_child("parent", command, env=_environment(tmp_path, DOMAIN_ID),
                             stdout=handle, stderr=subprocess.STDOUT)
    try:
        (open_demo,) = wait_for(lambda: _second_recording(store), 90.0,
                               "the second demonstration recording")
        nodes = psutil.Process(parent.pid).children()
        (recorder,) = [n for n in nodes if "recorder" in " ".join(n.cmdline())]
        # Ctrl-C twice at the parent, and the recorder interrupted again while it closes.
        parent.process.send_signal(signal.SIGINT)
        recorder.send_signal(signal.SIGINT)
        time.sleep(0.05)
        recorder.send_signal(signal.SIGINT)
        recorder.send_signal(signal.SIGTERM)
        parent.process.send_signal(signal.SIGINT)
        assert parent.process.wait(60) == 130, log.read_text(errors="replace")
    finally:
        stop_children([parent])
    text = log.read_text(errors="replace")
    assert "interrupted; both nodes stopped cleanly" in text, text
    assert all(not n.is_running() or n.status() == psutil.STATUS_ZOMBIE for n in nodes)
    with DemoStore(store, read_only=True) as db:
        info = db.get_info(open_demo.id)
        assert db.count_demonstrations(status="recording") == 0
    assert info.status == "incomplete" and info.flags.get("interrupted") == 1, info
    assert "writer pid gone" not in (info.status_reason or "")
    truth = GroundTruth.from_npz(out / "teacher_truth_twice.npz")
    assert len(truth.series) == 1 and truth.series[0][1].shape[1] == 2
    with np.load(out / "teacher_truth_twice.npz") as counts:
        assert int(counts["count_1"]) > 500  # how far the interrupted one was published


def test_two_runs_at_once_take_their_own_domain_seed_and_truth_file(tmp_path: Path) -> None:
    store = tmp_path / "store.sqlite"
    runs = []
    try:
        for name in ("first", "second"):
            command = [*CLI, "simulate-teaching", "--store", str(store), "--out",
                       str(tmp_path / name), "--demos", "2", "--demo-duration", "1.5",
                       "--quiet", "--json"]
            runs.append(start_child(name, command, env=_environment(tmp_path, DOMAIN_ID + 1),
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True))
        outputs = [run.process.communicate(timeout=150) for run in runs]
    finally:
        stop_children(runs)
    for run, (_stdout, stderr) in zip(runs, outputs, strict=True):
        assert run.returncode == 0, stderr
    results = [json.loads(stdout) for stdout, _ in outputs]
    assert sorted(r["domain_id"] for r in results) == [DOMAIN_ID + 1, DOMAIN_ID + 2]
    for result, (_, stderr) in zip(results, outputs, strict=True):
        assert f"ROS domain {result['domain_id']}" in stderr
        assert f"seed {result['seed']} (drawn; --seed {result['seed']} repeats it)" in stderr
        assert result["seed_drawn"] and len(result["demonstration_ids"]) == 2
    assert results[0]["seed"] != results[1]["seed"]
    assert results[0]["truth"] != results[1]["truth"]
    with DemoStore(store, read_only=True) as db:
        first, second = (db.load_demonstration(r["demonstration_ids"][0]) for r in results)
        assert db.count_demonstrations(status="complete") == 4
    # Different seeds: the simulated teacher gave different demonstrations.
    n = min(len(first.t), len(second.t))
    assert not np.allclose(first.position[:n], second.position[:n])

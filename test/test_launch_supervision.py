"""``compliant-demo launch`` supervises real node processes: it says when the work is done, stops
the nodes that serve until stopped, reaps every child, and leaves nothing running when it dies."""

from __future__ import annotations

import re
import subprocess
import sys
import time
from pathlib import Path

import psutil
import pytest
from nodes_support import LAUNCH, ROOT, ros_env, run_cli, wait_for

from compliant_demo.app.supervisor import start_child, stop_children
from compliant_demo.store import DemoStore

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 71  # this file's own ROS domains, 71 and 72 (tests use 20-99)
CLI = [sys.executable, "-c", "import sys; from compliant_demo.cli import main; "
       "sys.exit(main(sys.argv[1:]))"]


def started_pids(stderr: str) -> dict[str, int]:
    """Node name -> pid from the launch command's ``started NAME (pid N)`` lines."""
    return {name: int(pid) for name, pid in
            re.findall(r"launch: started (\w+) \(pid (\d+)\)", stderr)}


def still_there(pid: int, since: float) -> bool:
    """Whether process ``pid`` that existed before ``since`` (Unix s) still exists, even as a
    zombie (a pid reused by a process started later does not count)."""
    try:
        return psutil.Process(pid).create_time() <= since
    except psutil.NoSuchProcess:
        return False


def test_pipeline_launch_says_the_work_is_done_stops_the_recorder_and_reaps_every_node(
    tmp_path: Path,
) -> None:
    store = tmp_path / "store.sqlite"
    before = time.time()
    result = run_cli(["launch", str(LAUNCH / "pipeline.launch.xml"), f"store:={store}",
                      "demos:=2", "seed:=5", "real_time:=false"], DOMAIN_ID, timeout_s=180)
    assert result.returncode == 0, result.stderr[-3000:]
    pids = started_pids(result.stderr)
    assert sorted(pids) == ["learner", "recorder", "replay", "teacher"]
    assert "launch: work done: teacher, learner, replay ended; stopping recorder" in result.stderr
    for name in pids:
        assert f"launch: node {name} exited with 0" in result.stderr
    assert [name for name, pid in pids.items() if still_there(pid, before)] == []
    with DemoStore(store, read_only=True) as db:
        assert db.count_demonstrations(status="complete") == 2
        (skill,) = db.list_skills()
        (replay,) = db.find_replay_results(skill_id=skill.id)
    assert replay.status == "ok"


def gone(process: psutil.Process) -> bool:
    """The process has ended (a zombie not yet reaped by its new parent counts as ended)."""
    try:
        return process.status() == psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return True


@pytest.mark.parametrize("arguments", [
    ["launch", str(LAUNCH / "record.launch.xml"), "demos:=3"],
    ["tour", "--demos", "2", "--scenarios", "7", "--quiet"],
], ids=["launch", "tour"])
def test_node_processes_die_with_a_parent_killed_by_sigkill(tmp_path: Path, arguments) -> None:
    store = tmp_path / "store.sqlite"
    if arguments[0] == "launch":
        arguments = [*arguments, f"store:={store}"]
    else:
        arguments = [*arguments, "--store", str(store), "--out", str(tmp_path / "out"),
                     "--domain-id", str(DOMAIN_ID + 1)]
    with (tmp_path / "parent.log").open("wb") as log:
        parent = start_child("parent", [*CLI, *arguments], env=ros_env(DOMAIN_ID + 1),
                             stdout=log, stderr=subprocess.STDOUT)
    try:
        watched = psutil.Process(parent.pid)
        nodes = wait_for(lambda: len(watched.children()) >= 2 and watched.children(), 60.0,
                         "two node processes under the parent")
        assert all(not gone(node) for node in nodes)
        parent.process.kill()
        assert parent.process.wait(10) == -9
        # The kernel sends each node SIGTERM when its parent dies; the nodes end by themselves.
        wait_for(lambda: all(gone(node) for node in nodes), 30.0, "the orphaned nodes to end")
    finally:
        stop_children([parent])


def test_sigterm_ends_the_benchmark_flood_publisher_at_once(tmp_path: Path) -> None:
    """The publisher role of bench/bench_recorder.py, asked to run for ten minutes, waiting for a
    subscriber that never comes: SIGTERM ends it (rclpy's own handler used to swallow it)."""
    command = [sys.executable, str(ROOT / "bench" / "bench_recorder.py"), "--role", "publisher",
               "--rate", "1000", "--seconds", "600"]
    with (tmp_path / "publisher.log").open("wb") as log:
        publisher = start_child("publisher", command, env=ros_env(DOMAIN_ID + 1), stdout=log,
                                stderr=subprocess.STDOUT)
    try:
        watched = psutil.Process(publisher.pid)
        # Up and spinning: rclpy imported and its node created (a few threads of its own).
        wait_for(lambda: watched.num_threads() > 2, 30.0, "the publisher to start rclpy")
        time.sleep(1.0)
        publisher.process.terminate()
        assert publisher.process.wait(10) == -15
    finally:
        stop_children([publisher])

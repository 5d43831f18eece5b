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
from nodes_support import LAUNCH, ROOT, ros_env

from compliant_demo.store import DemoStore

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 71  # this file's own ROS domain (tests use 20-99)
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
    command = [*CLI, "launch", str(LAUNCH / "pipeline.launch.xml"), f"store:={store}",
               "demos:=2", "seed:=5", "real_time:=false"]
    before = time.time()
    result = subprocess.run(command, env=ros_env(DOMAIN_ID), capture_output=True, text=True,
                            timeout=180, cwd=ROOT)
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

"""Campaign parent memory and worker lifetime, measured the same way by the tests and the bench.

* :func:`rss_growth_kib_per_scenario` runs a campaign of the short cork_seat skill on one pool
  worker in a fresh interpreter and fits the parent's resident memory against the number of
  stored scenarios after a warm-up (least-squares slope, KiB per scenario).
* :func:`sigkill_orphans` starts ``compliant-demo campaign`` on one pool worker, SIGKILLs the
  command's process alone (not its group) once scenarios are being stored, and counts the pool
  workers still alive after a bounded wait (:func:`sigkill_mid_run`, any command). Survivors are
  killed by pid afterwards.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import psutil
from campaign_support import store_with_demos_and_skill

from compliant_demo.store import DemoStore

__all__ = ["template_store", "rss_growth_kib_per_scenario", "sigkill_orphans",
           "sigkill_mid_run"]

ROOT = Path(__file__).resolve().parents[1]
TEST_DIR = Path(__file__).resolve().parent
WORKER_GONE_WITHIN_S = 10.0
_START_TIMEOUT_S = 120.0

_RSS_CHILD = """
import json, sys
import numpy as np, psutil
from campaign_support import campaign_job
from compliant_demo.campaign import run_campaign
from compliant_demo.store import DemoStore

path, skill_id, n, warmup, batch = sys.argv[1], sys.argv[2], *map(int, sys.argv[3:6])
me, stored, samples = psutil.Process(), [0], []

def sample(outcomes):
    stored[0] += len(outcomes)
    samples.append((stored[0], me.memory_info().rss))

with DemoStore(path, durable=False) as store:
    run_campaign(store, campaign_job(n_scenarios=n), skill_id=skill_id, workers=1,
                 batch_size=batch, on_batch=sample)
count, rss = np.array([s for s in samples if s[0] >= warmup], dtype=float).T
slope = np.polyfit(count, rss, 1)[0] / 1024.0
print(json.dumps({"kib_per_scenario": slope, "rss_mb_after_warmup": rss[0] / 2**20,
                  "rss_mb_end": rss[-1] / 2**20, "stored": stored[0]}))
"""


def _env() -> dict[str, str]:
    path = os.pathsep.join([str(ROOT), str(TEST_DIR), os.environ.get("PYTHONPATH", "")])
    return dict(os.environ, PYTHONPATH=path)


def template_store(folder: Path) -> tuple[Path, str]:
    """A store holding the cork_seat demonstrations and skill; returns its path and skill id."""
    path = Path(folder) / "template.sqlite"
    skill_id = store_with_demos_and_skill(path)
    assert skill_id is not None
    return path, skill_id


def rss_growth_kib_per_scenario(
    folder: Path, n_scenarios: int, warmup: int, batch_size: int = 10
) -> dict[str, float]:
    """Parent RSS growth per stored scenario after ``warmup`` scenarios, KiB, and the RSS, MB."""
    template, skill_id = template_store(folder)
    path = Path(folder) / "rss.sqlite"
    shutil.copy(template, path)
    args = [str(path), skill_id, str(n_scenarios), str(warmup), str(batch_size)]
    result = subprocess.run([sys.executable, "-c", _RSS_CHILD, *args], env=_env(), cwd=folder,
                            capture_output=True, text=True, timeout=3600)
    if result.returncode != 0:
        raise RuntimeError(f"campaign child failed: {result.stderr[-2000:]}")
    return json.loads(result.stdout.strip().splitlines()[-1])


def _stored(path: Path) -> int:
    with DemoStore(path, read_only=True) as store:
        return len(list(store.find_replay_results()))


def _alive(pid: int) -> bool:
    try:
        return psutil.Process(pid).status() != psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return False


def sigkill_mid_run(argv: list[str], path: Path, min_children: int = 1,
                    env: dict[str, str] | None = None,
                    ready: Callable[[Path], bool] = lambda path: _stored(path) > 0,
                    ) -> tuple[list[int], list[int]]:
    """Run ``compliant-demo ARGV`` on the store at ``path``, SIGKILL its process alone (not its
    group) once it has ``min_children`` descendants and ``ready(path)`` (default: a replay result
    is stored), and wait at most :data:`WORKER_GONE_WITHIN_S` for them to end; returns
    (descendants, those still alive). Survivors are killed by pid afterwards."""
    entry = "import sys; from compliant_demo.cli import main; sys.exit(main(sys.argv[1:]))"
    process = subprocess.Popen([sys.executable, "-c", entry, *argv], env=env or _env(),
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    children: list[int] = []
    try:
        deadline = time.monotonic() + _START_TIMEOUT_S
        while time.monotonic() < deadline and process.poll() is None:
            time.sleep(0.1)
            try:
                children = [c.pid for c in psutil.Process(process.pid).children(recursive=True)]
            except psutil.NoSuchProcess:
                continue
            if len(children) >= min_children and path.exists() and ready(path):
                break
        else:
            raise RuntimeError(f"{argv[0]} never stored a scenario (exit {process.poll()})")
        # Every descendant at the moment of the kill, pool workers started since included.
        children = sorted({*children, *(c.pid for c in
                                        psutil.Process(process.pid).children(recursive=True))})
        os.kill(process.pid, signal.SIGKILL)
        process.wait(timeout=30)
        deadline = time.monotonic() + WORKER_GONE_WITHIN_S
        while time.monotonic() < deadline and any(_alive(pid) for pid in children):
            time.sleep(0.05)
        return children, [pid for pid in children if _alive(pid)]
    finally:
        for pid in [process.pid, *children]:
            if _alive(pid):
                os.kill(pid, signal.SIGKILL)
        process.wait(timeout=30)


def _one_kill(template: Path, path: Path) -> int:
    shutil.copy(template, path)
    argv = ["campaign", "--store", str(path), "--scenarios", "2000", "--seed", "9",
            "--batch-size", "2", "--workers", "1", "--duration", "1.5", "--settle", "0.3",
            "--quiet"]
    return len(sigkill_mid_run(argv, path)[1])


def sigkill_orphans(folder: Path, trials: int) -> list[int]:
    """Workers left alive after each of ``trials`` SIGKILLs of a campaign command's process."""
    template, _ = template_store(folder)
    return [_one_kill(template, Path(folder) / f"kill-{i}.sqlite") for i in range(trials)]

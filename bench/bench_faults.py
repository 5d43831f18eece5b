"""Benchmark of reliability under faults, load and hostile input: the figures for the README.

Runs, with the machinery of the reliability tests (``test/reliability_support.py``):

* the fuzz tests (``test/test_fuzz_*.py``, hypothesis functions only) in-process with more examples
  per parser, counting every case and every failing test;
* SIGKILL trials against a writer appending through the store API, each checked for integrity,
  exact committed chunks and an "incomplete" demonstration on the next open;
* a flood of a real recorder process with 7-joint JointState at 20 kHz, then 100 Hz (loopback DDS,
  ROS_DOMAIN_ID 101), sampling its resident memory. Baseline from the same run: the recorder's
  idle RSS before the flood (``peak_over_idle``);
* a campaign of 5,000 scenarios of the short cork_seat skill on one pool worker (the machinery of
  ``test/campaign_lifetime_support.py``): the parent's RSS growth per stored scenario after a
  1,000-scenario warm-up (least-squares slope; target at most 1 KiB);
* 20 SIGKILLs of a ``compliant-demo campaign`` process (the process alone, not its group) while
  it stores scenarios: pool workers still alive 10 s later (target 0).

Prints one JSON object per line; the last line is
``{"bench": "faults", "kill_trials": N, "kill_trials_intact": N, "flood_peak_rss_mb": X,
"fuzz_cases": N, "fuzz_failures": N, "campaign_rss_growth_kib_per_scenario": X,
"orphans_after_sigkill": N}``.

Run: ``python bench/bench_faults.py [--quick]``
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

from _timing import emit

TEST_DIR = Path(__file__).resolve().parent.parent / "test"
FLOOD_DOMAIN_ID = 101


class _FuzzOnly:
    """pytest plugin: keep only the hypothesis fuzz functions; record the ones that fail."""

    def __init__(self) -> None:
        self.failed: list[str] = []

    def pytest_collection_modifyitems(self, config, items) -> None:  # noqa: ANN001 (pytest hook)
        items[:] = [item for item in items if item.originalname.startswith("test_fuzz_")]

    def pytest_runtest_logreport(self, report) -> None:  # noqa: ANN001 (pytest hook)
        if report.when == "call" and report.failed:
            self.failed.append(report.nodeid)


def _fuzz(examples: int) -> tuple[int, int]:
    os.environ["COMPLIANT_DEMO_FUZZ_EXAMPLES"] = str(examples)
    import pytest
    import reliability_support

    counter = _FuzzOnly()
    files = sorted(str(path) for path in TEST_DIR.glob("test_fuzz_*.py"))
    start = time.perf_counter()
    pytest.main(["-q", "-p", "no:cacheprovider", *files], plugins=[counter])
    cases = dict(reliability_support.FUZZ_COUNTER)
    # A failing hypothesis test stops at its first failing case, which the counter did not see.
    total = sum(cases.values()) + len(counter.failed)
    emit({"bench": "faults_fuzz", "examples_per_test": examples, "cases_by_parser": cases,
          "failing_tests": counter.failed, "wall_s": round(time.perf_counter() - start, 1)})
    return total, len(counter.failed)


def _kill_trials(n_trials: int) -> tuple[int, int]:
    from reliability_support import run_kill_trials

    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as folder, warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # the recovery warning of every next open
        trials = run_kill_trials(folder, n_trials, parallel=6)
    intact = sum(trial.intact for trial in trials)
    emit({"bench": "faults_kill", "trials": n_trials, "intact": intact,
          "chunks_committed_total": sum(t.stored_chunks for t in trials),
          "committed_but_unreported": sum(t.stored_chunks - t.reported_chunks for t in trials),
          "problems": [t.problem for t in trials if not t.intact][:5],
          "wall_s": round(time.perf_counter() - start, 1)})  # fmt: skip
    return n_trials, intact


def _flood(flood_s: float) -> float:
    from reliability_support import run_flood

    with tempfile.TemporaryDirectory() as folder:
        result = run_flood(folder, FLOOD_DOMAIN_ID, flood_s=flood_s)
    after = result.get("diag_after_flood") or {}
    lost = int(after.get("dropped_buffer_full", 0)) + int(after.get("missing_samples_estimate", 0))
    idle, peak = result["idle_rss_mb"], result["peak_rss_mb"]
    emit({"bench": "faults_flood", "offered": result.get("flood_sent"),
          "received": int(after.get("received", 0)), "lost_counted": lost,
          "slow_sent": result.get("slow_sent"), "idle_rss_mb": round(idle, 1),
          "peak_rss_mb": round(peak, 1), "peak_over_idle": round(peak / idle, 3),
          "recorder_alive": result["recorder_alive_after_flood"]})  # fmt: skip
    return peak


def _campaign_memory(n_scenarios: int, warmup: int) -> float:
    from campaign_lifetime_support import rss_growth_kib_per_scenario

    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as folder:
        figures = rss_growth_kib_per_scenario(Path(folder), n_scenarios, warmup)
    emit({"bench": "faults_campaign_memory", "scenarios": n_scenarios, "warmup": warmup,
          "kib_per_scenario": round(figures["kib_per_scenario"], 3),
          "rss_mb_after_warmup": round(figures["rss_mb_after_warmup"], 1),
          "rss_mb_end": round(figures["rss_mb_end"], 1),
          "wall_s": round(time.perf_counter() - start, 1)})  # fmt: skip
    return figures["kib_per_scenario"]


def _campaign_orphans(trials: int) -> int:
    from campaign_lifetime_support import WORKER_GONE_WITHIN_S, sigkill_orphans

    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as folder:
        orphans = sigkill_orphans(Path(folder), trials)
    emit({"bench": "faults_campaign_sigkill", "trials": trials, "orphans_by_trial": orphans,
          "wait_s": WORKER_GONE_WITHIN_S, "wall_s": round(time.perf_counter() - start, 1)})
    return sum(orphans)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="fewer trials and examples")
    args = parser.parse_args()
    sys.path.insert(0, str(TEST_DIR))
    fuzz_cases, fuzz_failures = _fuzz(40 if args.quick else 200)
    kill_trials, intact = _kill_trials(40 if args.quick else 200)
    peak = _flood(2.0 if args.quick else 4.0)
    growth = _campaign_memory(*((1000, 300) if args.quick else (5000, 1000)))
    orphans = _campaign_orphans(5 if args.quick else 20)
    emit({"bench": "faults", "kill_trials": kill_trials, "kill_trials_intact": intact,
          "flood_peak_rss_mb": round(peak, 1), "fuzz_cases": fuzz_cases,
          "fuzz_failures": fuzz_failures,
          "campaign_rss_growth_kib_per_scenario": round(growth, 3),
          "orphans_after_sigkill": orphans})  # fmt: skip


if __name__ == "__main__":
    main()

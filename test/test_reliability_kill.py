"""SIGKILL the writer at random moments: nothing it reported committed may be lost.

Each of the 200 trials forks a writer (from a forkserver that imported the store once) that
appends deterministic chunks through ``DemoStore.append_chunk`` and reports each chunk after the
call returned; the test kills it with SIGKILL after a seeded random delay and then checks the file:
``PRAGMA integrity_check`` is ``ok``, every reported chunk is read back bit for bit (at most one
more, committed but not yet reported), and the next writable open marks the demonstration
"incomplete".
"""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest
from reliability_support import run_kill_trials

N_TRIALS = 200


@pytest.mark.slow
def test_sigkill_trials_lose_nothing_that_was_committed(tmp_path: Path) -> None:
    with warnings.catch_warnings():
        # The next open warns about the demonstration it recovers; that warning is expected.
        warnings.simplefilter("ignore", UserWarning)
        trials = run_kill_trials(tmp_path, N_TRIALS, parallel=6)
    assert len(trials) == N_TRIALS
    problems = [f"seed {t.seed} (delay {t.delay_s:.4f} s): {t.problem}" for t in trials]
    problems = [p for p, t in zip(problems, trials, strict=True) if not t.intact]
    assert problems == []
    # The kills must have landed in different phases, or the test proves little.
    begun = [t for t in trials if t.demo_id is not None]
    assert len(begun) >= N_TRIALS * 0.8
    assert all(t.status == "incomplete" for t in begun)
    assert len({t.stored_chunks for t in begun}) >= 5, "kills all landed at the same moment"
    assert sum(t.stored_chunks > 0 for t in begun) >= N_TRIALS // 4


@pytest.mark.slow
def test_sigkill_during_begin_and_finish_loses_nothing(tmp_path: Path) -> None:
    # Short demonstrations of 2 chunks one after another: kills also land in begin and finish.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        trials = run_kill_trials(tmp_path, 60, parallel=6, first_seed=5000, chunks_per_demo=2)
    problems = [f"seed {t.seed}: {t.problem}" for t in trials if not t.intact]
    assert problems == []
    assert sum(t.demos_finished for t in trials) >= 20, "too few demonstrations were finished"
    assert {t.status for t in trials if t.demo_id is not None} >= {"incomplete"}

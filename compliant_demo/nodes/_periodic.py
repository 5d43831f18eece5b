"""A thread that does one piece of work per period on absolute deadlines.

rclpy timers run in the executor's thread, between whatever other callbacks it serves, and each
period is measured from the last callback, so their error accumulates and their jitter is that of
the busiest callback. A command stream at 500 Hz instead runs in a thread of its own that sleeps
until absolute deadlines t0 + k * period (a late period does not shift the later ones; whole
periods missed are skipped and counted). The node process also lowers Python's thread switch
interval, so the executor thread holds the interpreter lock for at most that long when the
deadline comes (the default 5 ms would be longer than two periods).
"""

from __future__ import annotations

import os
import sys
import threading
import time
from collections import deque
from collections.abc import Callable

import numpy as np

__all__ = ["SWITCH_INTERVAL_S", "PeriodicThread", "use_realtime_priority"]

#: Python's thread switch interval in a node that runs a periodic thread, s.
SWITCH_INTERVAL_S = 2e-4


def use_realtime_priority(priority: int) -> str | None:
    """Put every thread of this process (DDS's own included; threads started later inherit it)
    on the SCHED_FIFO policy at ``priority`` (1-98; 0: leave all as they are).

    On a shared or non-real-time machine the normal scheduler can leave a thread waiting longer
    than a command period; a fixed real-time priority (with the kernel's real-time throttling as
    the backstop) is common practice for control loops. Returns None, or why it failed (no
    permission: CAP_SYS_NICE or an rtprio limit is needed).
    """
    if priority <= 0:
        return None
    for thread_id in os.listdir("/proc/self/task"):
        failure = _fifo(int(thread_id), priority)
        if failure is not None:
            return failure
    return None


def _fifo(thread_id: int, priority: int) -> str | None:
    """SCHED_FIFO at ``priority`` for ``thread_id`` (0: the calling thread); None or why not."""
    try:
        os.sched_setscheduler(thread_id, os.SCHED_FIFO, os.sched_param(priority))
    except (OSError, AttributeError) as exc:
        return f"{type(exc).__name__}: {exc}"
    return None


class PeriodicThread:
    """Call ``work(now)`` (``now``: time.monotonic(), s) once per ``period_s`` until it returns
    False or :meth:`stop` is called; ``tick_times`` keeps the last ``keep`` wake-up times.

    With ``priority`` above 0 the thread runs on SCHED_FIFO one level above it, so it preempts
    the process's other threads (set to ``priority`` by :func:`use_realtime_priority`) when its
    deadline comes; ``priority_failure`` says why that was refused, if it was.
    """

    def __init__(self, period_s: float, work: Callable[[float], bool], name: str,
                 keep: int = 100_000, priority: int = 0) -> None:
        self.period_s = float(period_s)
        self._work = work
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name=name, daemon=True)
        self.missed = 0
        self.error: BaseException | None = None
        self.priority_failure: str | None = None
        self._priority = int(priority)
        self.tick_times: deque[float] = deque(maxlen=keep)
        sys.setswitchinterval(min(sys.getswitchinterval(), SWITCH_INTERVAL_S))

    def start(self) -> None:
        """Start the thread; the first period begins one period from now."""
        self._thread.start()

    def stop(self, timeout_s: float = 2.0) -> None:
        """Ask the thread to end and wait for it (at most ``timeout_s``)."""
        self._stop.set()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(timeout_s)

    def stop_when_done(self, timeout_s: float) -> None:
        """Wait (at most ``timeout_s``) for the work to end by itself, then stop the thread."""
        self._thread.join(timeout_s)
        self.stop()

    @property
    def running(self) -> bool:
        """True while the thread runs."""
        return self._thread.is_alive()

    def jitter_ms(self, quantile: float = 0.99) -> float:
        """The ``quantile`` of |period - period_s| over the kept wake-ups, ms (0 before two)."""
        times = np.asarray(self.tick_times)
        if times.size < 2:
            return 0.0
        return float(np.quantile(np.abs(np.diff(times) - self.period_s), quantile) * 1e3)

    def _loop(self) -> None:
        period = self.period_s
        if self._priority > 0:
            self.priority_failure = _fifo(0, self._priority + 1)
        deadline = time.monotonic() + period
        try:
            while not self._stop.is_set():
                remaining = deadline - time.monotonic()
                if remaining > 0:
                    time.sleep(remaining)
                now = time.monotonic()
                late = int((now - deadline) // period)
                if late > 0:  # whole periods missed: skip them, keep the grid
                    self.missed += late
                    deadline += late * period
                self.tick_times.append(now)
                if not self._work(now):
                    return
                deadline += period
        except Exception as exc:  # reported by the owner, which stops the run
            self.error = exc

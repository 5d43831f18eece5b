"""The one process supervisor: start children that die with us, stop them in steps, reap them.

Every child the workflow layer starts (node processes of the tour, of ``compliant-demo launch``,
of the benchmarks and test helpers) goes through :func:`start_child`: it runs in its own process
group (so a signal meant for it reaches whatever it starts, and a Ctrl-C on the terminal reaches
only the parent, which decides), and on Linux the kernel sends it SIGTERM when its parent dies
(``prctl(PR_SET_PDEATHSIG)`` set in the child before ``exec``), so a parent killed by SIGKILL or
a timeout leaves nothing running. :func:`stop_children` ends children the way a ROS 2 node expects
it: SIGINT, then SIGTERM, then SIGKILL, each after its grace period, and reaps every one.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import IO

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "Child",
    "StopGrace",
    "node_environment",
    "start_child",
    "run_child",
    "stop_children",
    "deferred_signals",
    "reap",
    "describe_exit",
]

_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>
_LIBC = ctypes.CDLL(ctypes.util.find_library("c"), use_errno=True) if sys.platform == "linux" \
    else None


@dataclass(frozen=True)
class StopGrace:
    """How long a child may take to end after each signal, s."""

    after_sigint_s: float = 10.0
    after_sigterm_s: float = 5.0
    after_sigkill_s: float = 5.0

    def __post_init__(self) -> None:
        for name in ("after_sigint_s", "after_sigterm_s", "after_sigkill_s"):
            value = getattr(self, name)
            if not value >= 0.0:
                raise InvalidInputError(f"{name} = {value}: must be >= 0 s")


@dataclass
class Child:
    """One started process and the name it is reported under."""

    name: str
    process: subprocess.Popen
    signals_sent: list[str] = field(default_factory=list)

    @property
    def pid(self) -> int:
        """Process id."""
        return self.process.pid

    @property
    def returncode(self) -> int | None:
        """Exit status once reaped (negative: ended by that signal), else None."""
        return self.process.returncode

    def running(self) -> bool:
        """Whether the child still runs; reaps it when it has ended."""
        return self.process.poll() is None

    def signal(self, signum: int) -> None:
        """Send ``signum`` to the child's process group (the child and what it started)."""
        if not self.running():
            return
        try:
            os.killpg(self.process.pid, signum)
        except (ProcessLookupError, PermissionError):
            self.process.send_signal(signum)
        self.signals_sent.append(signal.Signals(signum).name)


def node_environment(domain_id: int, base: Mapping[str, str] | None = None) -> dict[str, str]:
    """``base`` (default: this process's environment) with DDS confined to loopback and the
    given ROS domain, and unbuffered Python output (a log tail in an error message is current)."""
    env = dict(os.environ if base is None else base)
    env["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
    env["ROS_DOMAIN_ID"] = str(domain_id)
    env["PYTHONUNBUFFERED"] = "1"
    return env


def _die_with_parent(parent_pid: int) -> None:
    """Runs in the child between fork and exec: ask for SIGTERM when the parent dies."""
    if _LIBC is not None:
        _LIBC.prctl(_PR_SET_PDEATHSIG, signal.SIGTERM, 0, 0, 0)
    # The parent may have died before prctl took effect: then we are already orphaned.
    if os.getppid() != parent_pid:
        os.kill(os.getpid(), signal.SIGTERM)


def start_child(
    name: str,
    command: Sequence[str],
    *,
    env: Mapping[str, str] | None = None,
    stdout: int | IO | None = None,
    stderr: int | IO | None = None,
    cwd: str | os.PathLike | None = None,
    text: bool = False,
) -> Child:
    """Start ``command`` in its own process group; it gets SIGTERM when this process dies.

    The kernel ties the signal to the thread that starts the child: start children from a
    thread that lives as long as they should (the main thread, as the command line does).

    Parameters
    ----------
    name : what reports call the child
    command : program and arguments
    env : its environment (default: ours)
    stdout, stderr : as for :class:`subprocess.Popen` (default: inherit ours)
    cwd : working directory (default: ours)
    text : decode pipes as text

    Raises
    ------
    OSError
        The program cannot be started.
    """
    parent_pid = os.getpid()
    process = subprocess.Popen(
        list(command), env=dict(env) if env is not None else None, stdout=stdout, stderr=stderr,
        cwd=cwd, text=text, process_group=0,
        preexec_fn=lambda: _die_with_parent(parent_pid),
    )
    return Child(name, process)


def run_child(
    name: str,
    command: Sequence[str],
    *,
    timeout_s: float,
    env: Mapping[str, str] | None = None,
    cwd: str | os.PathLike | None = None,
    grace: StopGrace | None = None,
) -> subprocess.CompletedProcess:
    """Run ``command`` as a child (see :func:`start_child`) to its end, with its output captured
    as text; a child still running after ``timeout_s`` is stopped (:func:`stop_children`) and
    :class:`subprocess.TimeoutExpired` raised."""
    child = start_child(name, command, env=env, cwd=cwd, stdout=subprocess.PIPE,
                        stderr=subprocess.PIPE, text=True)
    try:
        stdout, stderr = child.process.communicate(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        stop_children([child], grace)
        stdout, stderr = child.process.communicate()
        raise subprocess.TimeoutExpired(list(command), timeout_s, stdout, stderr) from None
    return subprocess.CompletedProcess(list(command), child.process.returncode, stdout, stderr)


def reap(children: Iterable[Child]) -> list[Child]:
    """Collect the exit status of every child that ended; returns those still running."""
    return [child for child in children if child.running()]


def _wait_all(children: Sequence[Child], timeout_s: float) -> list[Child]:
    deadline = time.monotonic() + timeout_s
    running = reap(children)
    while running and time.monotonic() < deadline:
        time.sleep(0.05)
        running = reap(running)
    return running


def stop_children(
    children: Sequence[Child], grace: StopGrace | None = None
) -> dict[str, int | None]:
    """Stop every running child: SIGINT, then SIGTERM, then SIGKILL after the grace periods.

    Every child is reaped. Returns each child's exit status by name (None only if even SIGKILL
    did not end it within its grace period, which needs an uninterruptible kernel wait).
    """
    grace = grace or StopGrace()
    running = reap(children)
    for signum, wait_s in ((signal.SIGINT, grace.after_sigint_s),
                           (signal.SIGTERM, grace.after_sigterm_s),
                           (signal.SIGKILL, grace.after_sigkill_s)):
        if not running:
            break
        for child in running:
            child.signal(signum)
        running = _wait_all(running, wait_s)
    return {child.name: child.returncode for child in children}


@contextmanager
def deferred_signals() -> Iterator[list[int]]:
    """While the block runs, SIGINT and SIGTERM are noted (in the yielded list) instead of
    interrupting it, so a second Ctrl-C cannot undo a clean shutdown half-way. Outside the main
    thread, where handlers cannot be set, signals stay as they are."""
    received: list[int] = []
    if threading.current_thread() is not threading.main_thread():
        yield received
        return

    def note(signum: int, _frame: object) -> None:
        received.append(signum)

    previous = {s: signal.signal(s, note) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield received
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)


def describe_exit(code: int | None) -> str:
    """``exited with 1``, ``ended by SIGKILL`` or ``still running``."""
    if code is None:
        return "still running"
    if code < 0:
        try:
            return f"ended by {signal.Signals(-code).name}"
        except ValueError:
            return f"ended by signal {-code}"
    return f"exited with {code}"

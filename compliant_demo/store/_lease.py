"""Writer leases: how a store tells a live recorder from a dead one.

A store object that begins a demonstration registers a lease row (pid, host name, the process's
start time, a heartbeat refreshed by every appended chunk). When a store is opened for writing,
every demonstration still "recording" whose lease belongs to a process that no longer exists
becomes "incomplete". On the same host the check is exact: the pid must exist, must not be a
zombie, and must have the same start time (so a recycled pid is not mistaken for the writer). A
lease from another host (a store on a shared disk) counts as dead once its heartbeat is older than
``stale_after_s``.
"""

from __future__ import annotations

import os
import socket
import time
from dataclasses import dataclass

import psutil

__all__ = ["Lease", "own_lease", "lease_alive", "STALE_AFTER_S", "ABANDONED_TOKENS"]

STALE_AFTER_S = 600.0

# Leases this process gave up without releasing them (a close() on a full disk): its pid is alive,
# so without this set its own next writable open would keep their recordings "recording".
ABANDONED_TOKENS: set[str] = set()


@dataclass(frozen=True, slots=True)
class Lease:
    """Identity of a writing process."""

    pid: int
    hostname: str
    process_start: float | None


def _process_start(pid: int) -> float | None:
    try:
        return psutil.Process(pid).create_time()
    except (psutil.NoSuchProcess, psutil.AccessDenied):
        return None


def own_lease() -> Lease:
    """The lease identity of this process."""
    pid = os.getpid()
    return Lease(pid=pid, hostname=socket.gethostname(), process_start=_process_start(pid))


def lease_alive(
    lease: Lease,
    heartbeat_at: float,
    *,
    now: float | None = None,
    stale_after_s: float = STALE_AFTER_S,
) -> bool:
    """Whether the process holding ``lease`` may still be writing."""
    if lease.hostname != socket.gethostname():
        return (time.time() if now is None else now) - heartbeat_at < stale_after_s
    try:
        process = psutil.Process(lease.pid)
        if process.status() == psutil.STATUS_ZOMBIE:
            return False
        started = process.create_time()
    except psutil.NoSuchProcess:
        return False
    except psutil.AccessDenied:
        return True  # exists, owned by someone we cannot inspect: assume it is the writer
    return lease.process_start is None or abs(started - lease.process_start) < 0.05

"""One ROS domain per run: an exclusive lock file per ROS_DOMAIN_ID, held while the run lasts.

Two runs of the tour or of ``simulate-teaching`` on the same ROS domain would talk to each
other's nodes (one teacher starting the other's recorder). :func:`lease_domain` takes the first
domain id, from the preferred one upward (wrapping to 0 after 101), whose lock file in the
per-user runtime folder no other run holds; an id the user asked for explicitly is taken or
refused with the holder's process id. The lock is an advisory ``flock`` on an open file, so it
goes away with the process, however the process ends.
"""

from __future__ import annotations

import fcntl
import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from compliant_demo.exceptions import InvalidInputError

__all__ = ["MAX_DOMAIN_ID", "DomainInUseError", "domain_lock_folder", "lease_domain"]

#: Largest ROS_DOMAIN_ID that is safe on every platform (ROS 2 documentation on domain ids).
MAX_DOMAIN_ID = 101


class DomainInUseError(InvalidInputError):
    """The ROS domain asked for is held by another run."""


def domain_lock_folder() -> Path:
    """``$XDG_RUNTIME_DIR/compliant_demo/ros_domains``, else the same under
    ``$XDG_CACHE_HOME`` (default ``~/.cache``): one lock file per domain id, per user."""
    runtime = os.environ.get("XDG_RUNTIME_DIR")
    if runtime and Path(runtime).is_dir():
        base = Path(runtime)
    else:
        base = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache")
    return base / "compliant_demo" / "ros_domains"


def _try_lock(folder: Path, domain_id: int) -> int | None:
    """An open descriptor holding the lock of ``domain_id``, or None if another run holds it."""
    descriptor = os.open(folder / f"{domain_id}.lock", os.O_RDWR | os.O_CREAT, 0o600)
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(descriptor)
        return None
    os.ftruncate(descriptor, 0)
    os.write(descriptor, f"{os.getpid()}\n".encode())
    return descriptor


def _holder(folder: Path, domain_id: int) -> str:
    try:
        text = (folder / f"{domain_id}.lock").read_text(encoding="utf-8").strip()
    except OSError:
        return "another run"
    return f"the run with pid {text}" if text.isdigit() else "another run"


@contextmanager
def lease_domain(
    preferred: int, *, explicit: bool = False, folder: Path | None = None
) -> Iterator[int]:
    """Hold a ROS domain id for the duration of the block.

    Parameters
    ----------
    preferred : the id to try first, 0 to :data:`MAX_DOMAIN_ID`
    explicit : the user asked for exactly this id: refuse it if held instead of moving on
    folder : lock folder (default: :func:`domain_lock_folder`)

    Yields
    ------
    int
        The domain id held.

    Raises
    ------
    DomainInUseError
        ``explicit`` and the id is held, or every id is held.
    """
    if not 0 <= preferred <= MAX_DOMAIN_ID:
        raise InvalidInputError(f"domain_id = {preferred}: must be 0 to {MAX_DOMAIN_ID}")
    folder = folder or domain_lock_folder()
    try:
        folder.mkdir(parents=True, exist_ok=True, mode=0o700)
    except OSError as exc:
        raise InvalidInputError(f"domain lock folder {str(folder)!r}: cannot create "
                                f"({exc.strerror})") from None
    candidates = [preferred] if explicit else [
        (preferred + step) % (MAX_DOMAIN_ID + 1) for step in range(MAX_DOMAIN_ID + 1)]
    for domain_id in candidates:  # bounded: at most 102 tries, none of them waits
        descriptor = _try_lock(folder, domain_id)
        if descriptor is not None:
            break
    else:
        if explicit:
            raise DomainInUseError(
                f"--domain-id {preferred}: ROS domain {preferred} is in use by "
                f"{_holder(folder, preferred)}; leave --domain-id out to take a free one")
        raise DomainInUseError(f"every ROS domain 0 to {MAX_DOMAIN_ID} is in use by other runs "
                               f"(lock files in {folder})")
    try:
        yield domain_id
    finally:
        os.close(descriptor)

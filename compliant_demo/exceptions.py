"""Named errors of compliant_demo; each subclasses the built-in a caller would expect to catch."""

__all__ = [
    "CompliantDemoError",
    "InvalidInputError",
    "NotFoundError",
    "StoreError",
    "SchemaVersionError",
    "StoreCorruptError",
    "StoreReadOnlyError",
    "StoreBusyError",
    "StoreFullError",
    "UnstableStepError",
    "LaunchFileError",
    "one_line",
]


class CompliantDemoError(Exception):
    """Base of every error this package raises on purpose."""


class InvalidInputError(CompliantDemoError, ValueError):
    """An argument, file or message field has a value we cannot accept; the message names both."""


class NotFoundError(CompliantDemoError, LookupError):
    """A demonstration, skill, result or topic that was asked for does not exist."""


class StoreError(CompliantDemoError, RuntimeError):
    """The demonstration store cannot do what was asked; stored data is left as it was."""


class SchemaVersionError(StoreError):
    """The store file was written by a newer schema than this code knows."""


class StoreCorruptError(StoreError):
    """The file is not an SQLite database or fails its integrity check."""


class StoreReadOnlyError(StoreError, PermissionError):
    """A write was attempted on a store opened read-only or on a read-only file."""


class StoreBusyError(StoreError):
    """Another writer held the store longer than the busy timeout."""


class StoreFullError(StoreError, OSError):
    """The disk (or the store's page limit) is full; the chunk being written was not stored."""


class UnstableStepError(InvalidInputError):
    """The integration step is too large for the stiffest setting; the message gives the bound."""


class LaunchFileError(InvalidInputError):
    """A launch file uses something our reader does not support or names a missing file."""


def one_line(exc: BaseException) -> str:
    """An exception's text on one line (a library's message may span several)."""
    return " ".join(str(exc).split())

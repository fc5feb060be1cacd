"""Exception hierarchy.

One base class, :class:`SketchmergeError`; every subclass also inherits the
matching built-in exception so callers can catch either.  Messages say what
was expected and what was found, and name the file, partition or column.
"""

from __future__ import annotations

__all__ = [
    "FormatError",
    "InputError",
    "NoInputError",
    "PublishRaceError",
    "SchedulerUnavailableError",
    "SketchmergeError",
    "StorageError",
]


class SketchmergeError(Exception):
    """Base class of every error raised by sketchmerge."""

    #: process exit code used by the command line for this kind of error
    exit_code = 1


class InputError(SketchmergeError, ValueError):
    """Bad input data or arguments: a value, weight, column or file that cannot be used."""

    exit_code = 3


class NoInputError(SketchmergeError, FileNotFoundError):
    """Nothing to read: the source matched no data files, or a table or version does not exist."""

    exit_code = 4


class FormatError(SketchmergeError, ValueError):
    """Bytes that are not a valid sketchmerge artifact (malformed, truncated,
    unknown version, failed checksum)."""

    exit_code = 6


class StorageError(SketchmergeError, OSError):
    """Object storage could not be reached or refused an operation (transient; retry)."""

    exit_code = 5


class SchedulerUnavailableError(SketchmergeError, ConnectionError):
    """The Dask scheduler could not be reached."""

    exit_code = 7


class PublishRaceError(SketchmergeError, FileExistsError):
    """Another builder published a version of the same table first (retry)."""

    exit_code = 8

"""sketchmerge: shared, certified weighted bin edges for gradient-boosted tree training.

The public API is what this module re-exports (``__all__``).  Importing it, or
loading and binning with a cut table, never imports dask or distributed: the
distributed build is imported only when :func:`build` is called.
"""

from __future__ import annotations

from ._version import __version__
from .errors import (
    FormatError,
    InputError,
    NoInputError,
    PublishRaceError,
    SchedulerUnavailableError,
    SketchmergeError,
    StorageError,
)
from .summary import Summary

__all__ = sorted([
    "FormatError",
    "InputError",
    "NoInputError",
    "PublishRaceError",
    "SchedulerUnavailableError",
    "SketchmergeError",
    "StorageError",
    "Summary",
    "__version__",
])

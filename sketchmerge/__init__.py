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
from .cuts import CutTable, load
from .summary import Summary


def build(source: str, out: str, **options) -> dict:
    """Build (or refresh) the cut table of ``source`` at ``out``; return the report.

    The options are those of ``sketchmerge build`` with underscores (``bins``,
    ``rank_error``, ``weight_column``, ``hessian``, ``prediction_column``,
    ``client``...); see :func:`sketchmerge.job.build`.  Imports dask only when called.
    """
    from .job import build as _build

    return _build(source, out, **options)

__all__ = sorted([
    "CutTable",
    "FormatError",
    "InputError",
    "NoInputError",
    "PublishRaceError",
    "SchedulerUnavailableError",
    "SketchmergeError",
    "StorageError",
    "Summary",
    "__version__",
    "build",
    "load",
])

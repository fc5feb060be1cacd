"""Test helpers shipped with sketchmerge.

* :mod:`sketchmerge.testing.faults`: :class:`FaultyFileSystem`, an fsspec
  filesystem wrapper that injects transient errors, timeouts, short reads and
  truncated objects, deterministically from a seed.  Importing this package
  registers it with fsspec under the protocol ``faulty``.

Nothing here is imported by ``import sketchmerge``.
"""

from __future__ import annotations

from .faults import ERROR_KINDS, OPERATIONS, PROTOCOL, FaultyFile, FaultyFileSystem, register

__all__ = ["ERROR_KINDS", "FaultyFile", "FaultyFileSystem", "OPERATIONS", "PROTOCOL", "register"]

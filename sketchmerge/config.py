"""The one defaults table.

Every tunable has its default here.  An environment variable
``SKETCHMERGE_<NAME>`` (upper case) overrides a default; an explicit argument
or command-line option always wins over both.
"""

from __future__ import annotations

import os

__all__ = ["DEFAULTS", "get"]

DEFAULTS: dict[str, object] = {
    "bins": 256,                      # most bins per feature
    "fan_in": 16,                     # expected children per merge node
    "byte_budget": 64 << 20,          # group small Parquet row groups up to this many bytes
    "keep": 10,                       # versions kept by gc (the current one always)
    "gc_grace_seconds": 6 * 3600.0,   # never delete a cached blob younger than this
    "retries": 3,                     # retries of a read after a transient storage error
    "publish_attempts": 3,            # republish-on-top attempts after a lost race
    "missing_weight": "error",        # rows with a missing weight/prediction: error | zero
    "progress_seconds": 10.0,         # period of "n/total units" log lines off a terminal
    "cache_dir": "",                  # local cache of downloaded tables for load() ("" = off)
}


def get(name: str, explicit=None):
    """The value of a setting: explicit argument, else environment, else default."""
    if explicit is not None:
        return explicit
    default = DEFAULTS[name]
    env = os.environ.get("SKETCHMERGE_" + name.upper())
    if env is None:
        return default
    try:
        return type(default)(env)
    except ValueError as e:
        raise ValueError(f"environment SKETCHMERGE_{name.upper()}: expected {type(default).__name__}, got {env!r}") from e

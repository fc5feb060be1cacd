"""Golden cut-table file of format version 1: it must keep decoding, with these values."""

from __future__ import annotations

import hashlib
import os
import zlib

import msgpack
import numpy as np
import pytest

from sketchmerge.cuts import decode_table
from sketchmerge.errors import FormatError

GOLDEN = os.path.join(os.path.dirname(__file__), "data", "cut-table-v1.cuts")


def test_golden_table_decodes():
    cuts = decode_table(open(GOLDEN, "rb").read())
    assert cuts.version == 1 and cuts.features == ("spread", "levels")
    assert cuts.record["created"] == "2026-12-01T00:00:00Z"
    assert cuts.content["units"]["address"] == ["day=1/a.parquet#rg=0-0"]
    spread = cuts.feature("spread")
    assert spread.mode == "quantile" and spread.bins == 4
    np.testing.assert_array_equal(spread.edges, [58.5, 94.5, 124.5, 148.5])
    assert spread.rank_error <= spread.target_rank_error == 1 / 32
    assert spread.missing_count == 10
    levels = cuts.feature("levels")
    assert levels.mode == "distinct" and levels.edges.tolist() == [1.0, 2.0, 3.0] and levels.dtype == "int16"
    assert cuts.bin({"spread": np.array([0.0, 58.5, 58.6, 1e9, np.nan]),
                     "levels": np.array([1, 2, 3, 4, 2])}).tolist() == \
        [[0, 0], [0, 1], [1, 2], [3, 2], [4, 1]]


def test_golden_table_reads_with_plain_msgpack():
    """A reader in another language needs only msgpack, CRC-32 and SHA-256 (docs/FORMAT.md)."""
    raw = open(GOLDEN, "rb").read()
    env = msgpack.unpackb(raw, raw=False)
    assert env["kind"] == "sketchmerge.cut-table" and env["format"] == 1
    assert zlib.crc32(env["payload"]) == env["crc32"]
    body = msgpack.unpackb(env["payload"], raw=False)
    assert hashlib.sha256(body["content"]).hexdigest() == body["content_sha256"]
    content = msgpack.unpackb(body["content"], raw=False)
    edges = np.frombuffer(content["features"][0]["edges"], "<f8")
    assert edges.tolist() == [58.5, 94.5, 124.5, 148.5]


def test_golden_table_tampering_is_caught():
    raw = bytearray(open(GOLDEN, "rb").read())
    raw[len(raw) // 2] ^= 0x40
    with pytest.raises(FormatError):
        decode_table(bytes(raw))

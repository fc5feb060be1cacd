"""Plan reuse: a refresh reads the metadata of new or changed files only.

The reference for every planning here is a planning from scratch of the same files
(``open_dataset`` without ``previous``, or ``build(full=True)`` into a fresh table):
the refreshed table's content must equal that one byte for byte.  Footer reads are
counted by wrapping ``sources._plan_file``, the one function that opens a data file's
metadata on the driver.
"""

from __future__ import annotations

import os
import time

import msgpack
import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge import sources as S
from sketchmerge.cuts import decode_table, encode_table
from sketchmerge.errors import InputError
from sketchmerge.store import TableStore

BUDGET = 20_000   # bytes: a few row groups of the files below per unit


def frame(n, seed, extra=None):
    rng = np.random.default_rng(seed)
    cols = {"x": rng.normal(0, 1, n), "k": rng.integers(0, 50, n).astype(np.int32),
            "w": rng.uniform(0.1, 1, n)}
    cols.update(extra or {})
    return pa.table(cols)


def write_parquet(root, rel, table, row_group_size=500):
    path = os.path.join(root, rel)
    os.makedirs(os.path.dirname(path), exist_ok=True)
    pq.write_table(table, path, row_group_size=row_group_size)
    return path


def make_days(root, days=(1, 2, 3), n=2000):
    for d in days:
        write_parquet(root, f"day={d:02d}/part-0.parquet", frame(n, d))


@pytest.fixture
def footers(monkeypatch):
    """Relative paths of the data files whose metadata planning opened, in call order."""
    seen: list[str] = []
    real = S._plan_file

    def counting(fs, protocol, fi, secrets):
        if fi.size > 0:   # a zero-byte file is planned without opening it
            seen.append(fi.rel)
        return real(fs, protocol, fi, secrets)

    monkeypatch.setattr(S, "_plan_file", counting)
    return seen


def content_bytes(table, storage_options=None) -> bytes:
    """The deterministic content section of a table's current version, as stored."""
    raw = TableStore(table, storage_options=storage_options).read_version()[1]
    env = msgpack.unpackb(raw, raw=False)
    return msgpack.unpackb(env["payload"], raw=False)["content"]


def build(src, table, client, **kw):
    return sketchmerge.build(src, table, client=client, weight_column="w", bins=16,
                             byte_budget=BUDGET, **kw)


def check_equals_full(src, table, client, tmp_path, name, **kw):
    """The refreshed table's content equals a cold full build's, byte for byte."""
    full = str(tmp_path / name)
    r = build(src, full, client, full=True, **kw)
    assert r["files"]["planned_from_previous"] == 0
    assert content_bytes(table, kw.get("storage_options")) == \
        content_bytes(full, kw.get("storage_options"))


def test_append_reads_only_the_new_footer(tmp_path, client, footers):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    r1 = build(src, table, client)
    assert sorted(footers) == [f"day={d:02d}/part-0.parquet" for d in (1, 2, 3)]
    assert r1["files"] == {"total": 3, "metadata_read": 3, "planned_from_previous": 0}
    footers.clear()
    write_parquet(src, "day=04/part-0.parquet", frame(2000, 4))
    r2 = build(src, table, client)
    assert footers == ["day=04/part-0.parquet"]
    assert r2["files"] == {"total": 4, "metadata_read": 1, "planned_from_previous": 3}
    assert r2["changed"] and r2["version"] == 2
    assert r2["partitions_sketched"] == sum(1 for u in S.open_dataset(src, byte_budget=BUDGET).units
                                            if u.address.startswith("day=04/"))
    check_equals_full(src, table, client, tmp_path, "full")
    # the planning itself equals a cold one: units (fingerprints, parts, rows), columns
    prev = sketchmerge.load(table).content
    footers.clear()
    warm = S.open_dataset(src, byte_budget=BUDGET, previous=prev)
    assert footers == [] and warm.plan_reused == 4 and warm.metadata_reads == 0
    cold = S.open_dataset(src, byte_budget=BUDGET)
    assert warm == cold and warm.units == cold.units and warm.columns == cold.columns
    assert [(u.parts, u.rows, u.nbytes, u.fingerprint) for u in warm.units] == \
        [(u.parts, u.rows, u.nbytes, u.fingerprint) for u in cold.units]
    # compact: 16 + 4 bytes per file and one schema for all four
    plan = prev["plan"]
    assert len(plan["files"]) == 16 * 4 and len(plan["schema"]) == 4 * 4
    assert plan["schemas"] == [[["x", "float64"], ["k", "int32"], ["w", "float64"]]]
    # nothing changed: nothing published, and no footer read either
    footers.clear()
    r3 = build(src, table, client)
    assert r3["changed"] is False and footers == []


def test_plan_entries_follow_the_format(tmp_path, client):
    """Each file's key and check, recomputed here from docs/FORMAT.md ("plan") with
    hashlib and json alone, equal the stored ones."""
    import hashlib
    import json

    import fsspec

    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src, days=(1, 2))
    build(src, table, client)
    con = sketchmerge.load(table).content
    plan = con["plan"]

    def j(x):
        return json.dumps(x, separators=(",", ":"), ensure_ascii=True).encode("utf-8")

    def h8(x):
        return hashlib.sha256(j(x)).digest()[:8]

    assert plan["tag"] == "sketchmerge.plan/1" and plan["byte_budget"] == BUDGET
    idx = np.frombuffer(plan["schema"], "<u4")
    for i, d in enumerate((1, 2)):
        rel = f"day={d:02d}/part-0.parquet"
        path = os.path.join(src, rel)
        token = S.version_token(fsspec.filesystem("file").info(path))   # tested in test_sources
        entry = ["sketchmerge.plan/1", rel, "parquet", os.path.getsize(path), token]
        units = [[a, r, n] for a, r, n in zip(con["units"]["address"], con["units"]["rows"],
                                              con["units"]["nbytes"]) if a.startswith(rel + "#")]
        schema = plan["schemas"][int(idx[i])]
        assert schema == [[f.name, str(f.type).replace("double", "float64")]
                          for f in pq.read_schema(path)]   # pyarrow's own reader
        check = h8(entry + [hashlib.sha256(j(schema)).hexdigest(), units])
        assert plan["files"][16 * i:16 * i + 16] == h8(entry) + check


def test_rewritten_file_is_replanned(tmp_path, client, footers):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    build(src, table, client)
    before = {u.address for u in S.open_dataset(src, byte_budget=BUDGET).units}
    footers.clear()
    time.sleep(0.01)
    # same name, new content and size, another row-group layout
    write_parquet(src, "day=02/part-0.parquet", frame(3500, 22), row_group_size=300)
    r = build(src, table, client)
    assert footers == ["day=02/part-0.parquet"]
    cold = S.open_dataset(src, byte_budget=BUDGET)
    mine = [u for u in cold.units if u.address.startswith("day=02/")]
    assert sum(u.rows for u in mine) == 3500   # the new file's rows, from its own footer
    assert {u.address for u in cold.units} != before
    assert r["partitions_sketched"] == len(mine)
    check_equals_full(src, table, client, tmp_path, "full")


def test_touched_file_same_size_is_replanned(tmp_path, client, footers):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    build(src, table, client)
    footers.clear()
    p = os.path.join(src, "day=01", "part-0.parquet")
    st = os.stat(p)
    os.utime(p, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))   # new mtime, same bytes
    r = build(src, table, client)
    assert footers == ["day=01/part-0.parquet"]
    assert r["changed"] and r["files"]["planned_from_previous"] == 2
    check_equals_full(src, table, client, tmp_path, "full")


def test_deleted_file_drops_out(tmp_path, client, footers):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    build(src, table, client)
    gone = [u.address for u in S.open_dataset(src, byte_budget=BUDGET).units
            if u.address.startswith("day=03/")]
    footers.clear()
    os.remove(os.path.join(src, "day=03", "part-0.parquet"))
    r = build(src, table, client)
    assert footers == [] and r["files"] == {"total": 2, "metadata_read": 0,
                                            "planned_from_previous": 2}
    cuts = sketchmerge.load(table)
    assert not set(gone) & set(cuts.content["units"]["address"])
    assert cuts.record["changes"] == {"units_added": 0, "units_removed": len(gone),
                                      "units_changed": 0}
    assert cuts.rows == 4000
    check_equals_full(src, table, client, tmp_path, "full")


def test_schema_change_in_one_file_is_honoured(tmp_path, client, footers):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    build(src, table, client)
    footers.clear()
    time.sleep(0.01)
    # day 2 now stores k as float64 and has a new column
    t = frame(2000, 2)
    t = t.set_column(1, "k", pa.array(t.column("k").to_numpy().astype(np.float64) + 0.5))
    t = t.append_column("brix", pa.array(np.linspace(10, 20, 2000)))
    write_parquet(src, "day=02/part-0.parquet", t)
    r = build(src, table, client)
    assert footers == ["day=02/part-0.parquet"]
    cold = S.open_dataset(src, byte_budget=BUDGET)
    assert cold.columns == {"x": "float64", "k": "float64", "w": "float64", "brix": "float64"}
    assert [f["name"] for f in r["features"]] == ["x", "k", "brix"]
    cuts = sketchmerge.load(table)
    assert cuts.feature("k").dtype == "float64"   # widened, as the cold plan unifies it
    assert len(cuts.content["plan"]["schemas"]) == 2
    check_equals_full(src, table, client, tmp_path, "full")
    # a conflicting type in a rewritten file is refused, naming that file
    footers.clear()
    time.sleep(0.01)
    write_parquet(src, "day=03/part-0.parquet",
                  frame(2000, 3).set_column(1, "k", pa.array(["a", "b"] * 1000)))
    with pytest.raises(InputError, match=r"column 'k'.*day=03"):
        build(src, table, client)
    assert footers == ["day=03/part-0.parquet"]
    assert sketchmerge.load(table).version == 2   # nothing published is lost


def test_full_reads_every_footer(tmp_path, client, footers):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    build(src, table, client)
    footers.clear()
    r = build(src, table, client, full=True)
    assert sorted(footers) == [f"day={d:02d}/part-0.parquet" for d in (1, 2, 3)]
    assert r["files"] == {"total": 3, "metadata_read": 3, "planned_from_previous": 0}


def test_other_byte_budget_replans_every_file(tmp_path, client, footers):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    build(src, table, client)
    footers.clear()
    r = sketchmerge.build(src, table, client=client, weight_column="w", bins=16,
                          byte_budget=BUDGET * 3)
    assert len(footers) == 3 and r["files"]["planned_from_previous"] == 0
    assert r["partitions_total"] == len(S.open_dataset(src, byte_budget=BUDGET * 3).units)


def test_mixed_formats_and_files_without_units(tmp_path, client, footers):
    """IPC record batches, CSV files, a zero-byte file and a Parquet file without row
    groups (a schema, no units) are rebuilt from the stored plan like Parquet units."""
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src, days=(1,))
    os.makedirs(os.path.join(src, "day=02"))
    feather.write_feather(frame(1500, 5), os.path.join(src, "day=02", "b.arrow"),
                          chunksize=400, compression="uncompressed")
    with pa.OSFile(os.path.join(src, "day=02", "c.arrows"), "wb") as f:
        with pa.ipc.new_stream(f, frame(900, 6).schema) as w:
            for b in frame(900, 6).to_batches(max_chunksize=300):
                w.write_batch(b)
    pcsv.write_csv(frame(700, 7), os.path.join(src, "day=02", "d.csv"))
    open(os.path.join(src, "day=02", "e.csv"), "wb").close()
    pq.ParquetWriter(os.path.join(src, "day=02", "f.parquet"),
                     frame(1, 8).append_column("late", pa.array([1.0])).schema).close()
    build(src, table, client)
    footers.clear()
    write_parquet(src, "day=03/part-0.parquet", frame(1000, 9))
    r = build(src, table, client)
    assert footers == ["day=03/part-0.parquet"]
    assert r["files"] == {"total": 7, "metadata_read": 1, "planned_from_previous": 5}
    cold = S.open_dataset(src, byte_budget=BUDGET)
    assert "late" in cold.columns   # known from f.parquet's schema alone
    check_equals_full(src, table, client, tmp_path, "full")


def _republish(table, content):
    """Publish ``content`` as the next version of ``table``, with valid checksums."""
    st = TableStore(table)
    old = decode_table(st.read_version()[1])
    feats = [old._features[n] for n in old.features]
    v = st.current() + 1
    data = encode_table(feats, version=v, content_extra=content,
                        record={"created": "2026-12-01T00:00:00Z", "tool": "test",
                                "previous_version": v - 1, "changes": {}})
    st.publish(v, data, st.manifest(v - 1))


def _tampered(content, how):
    c = {k: v for k, v in content.items()}
    plan = dict(c["plan"])
    units = {k: list(v) for k, v in c["units"].items()}
    c["plan"], c["units"] = plan, units
    if how == "schema index":      # file 1 points at the other schema
        s = bytearray(plan["schema"])
        s[4:8] = (1 - s[4]).to_bytes(4, "little")
        plan["schema"] = bytes(s)
    elif how == "schema type":     # every file's schema claims another type
        plan["schemas"] = [[[n, "int8" if n == "x" else t] for n, t in sch]
                           for sch in plan["schemas"]]
    elif how == "unit rows":       # one unit's row count is off
        units["rows"][0] += 1
    elif how == "unit dropped":    # one unit of a file vanished from the lineage
        for k in units:
            del units[k][1]
    elif how == "file entry":      # a check that matches nothing
        f = bytearray(plan["files"])
        f[8] ^= 0xFF
        plan["files"] = bytes(f)
    elif how == "truncated files":
        plan["files"] = plan["files"][:-3]
    elif how == "index range":
        plan["schema"] = b"\xff" * len(plan["schema"])
    elif how == "budget":
        plan["byte_budget"] = BUDGET + 1
    elif how == "source":
        c["source"] = c["source"] + "-elsewhere"
    elif how == "tag":
        plan["tag"] = "sketchmerge.plan/0"
    elif how == "wrong types":
        plan["schemas"] = "x:float64"
    elif how == "missing":
        del c["plan"]
    return c


# how -> files planned from their metadata again (3 files: days 1 and 3 share a schema)
TAMPER = {"schema index": 1, "schema type": 3, "unit rows": 1, "unit dropped": 1,
          "file entry": 1, "truncated files": 3, "index range": 3, "budget": 3,
          "source": 3, "tag": 3, "wrong types": 3, "missing": 3}


@pytest.mark.parametrize("how", sorted(TAMPER))
def test_tampered_plan_falls_back_to_footers(tmp_path, client, footers, how):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    make_days(src)
    write_parquet(src, "day=02/part-0.parquet", frame(2000, 2).append_column(
        "brix", pa.array(np.arange(2000.0))))
    build(src, table, client)
    content = sketchmerge.load(table).content
    assert len(content["plan"]["schemas"]) == 2
    bad = _tampered(content, how)
    footers.clear()
    warm = S.open_dataset(src, byte_budget=BUDGET, previous=bad)
    assert len(footers) == TAMPER[how], footers
    cold = S.open_dataset(src, byte_budget=BUDGET)
    assert warm == cold and warm.plan_record() == cold.plan_record()
    # end to end: a tampered current version, then a new file; the published table
    # equals a cold full build's, and the plan is whole again
    _republish(table, bad)
    write_parquet(src, "day=04/part-0.parquet", frame(1000, 4))
    footers.clear()
    r = build(src, table, client)
    assert r["changed"] and len(footers) == TAMPER[how] + 1
    check_equals_full(src, table, client, tmp_path, "full")


def test_plan_of_a_table_that_predates_plans(tmp_path, client, footers):
    """The golden table of format version 1 stores no plan: it decodes, and planning
    against its content reads every footer."""
    golden = os.path.join(os.path.dirname(__file__), "data", "cut-table-v1.cuts")
    old = decode_table(open(golden, "rb").read())
    assert "plan" not in old.content
    src = str(tmp_path / "src")
    make_days(src)
    ds = S.open_dataset(src, byte_budget=BUDGET, previous=old.content)
    assert ds.metadata_reads == 3 and ds.plan_reused == 0 and len(footers) == 3
    assert ds == S.open_dataset(src, byte_budget=BUDGET)


def test_lost_race_counts_changes_against_the_winner(tmp_path, client, monkeypatch):
    """A builder that loses the publish race publishes on top of the winner's version and
    counts its changes against that version's units, not against the one it started from."""
    a, b = str(tmp_path / "a"), str(tmp_path / "b")
    table = str(tmp_path / "table")
    make_days(a, days=(1, 2))
    # b: the same two files (hard links: same size and mtime, so same fingerprints) + day 9
    for d in (1, 2):
        os.makedirs(os.path.join(b, f"day={d:02d}"))
        os.link(os.path.join(a, f"day={d:02d}", "part-0.parquet"),
                os.path.join(b, f"day={d:02d}", "part-0.parquet"))
    write_parquet(b, "day=09/part-0.parquet", frame(2000, 9))
    build(a, table, client)                                   # version 1: days 1, 2
    write_parquet(a, "day=03/part-0.parquet", frame(2000, 3))  # our build adds day 3

    real = TableStore.publish
    state = {"rival": None, "attempts": []}

    def racing_publish(self, version, data, keys):
        if state["rival"] == "running":
            return real(self, version, data, keys)
        if state["rival"] is None:
            state["rival"] = "running"
            build(b, table, client)                           # the rival wins version 2
            state["rival"] = "done"
        state["attempts"].append(version)
        return real(self, version, data, keys)

    monkeypatch.setattr(TableStore, "publish", racing_publish)
    r = build(a, table, client)
    assert r["version"] == 3 and state["attempts"] == [2, 3]  # the race was lost once
    st = TableStore(table)
    rival = decode_table(st.read_version(2)[1])
    ours = decode_table(st.read_version(3)[1])
    assert ours.record["previous_version"] == 2
    old = dict(zip(rival.content["units"]["address"], rival.content["units"]["fingerprint"]))
    new = dict(zip(ours.content["units"]["address"], ours.content["units"]["fingerprint"]))
    expect = {"units_added": len(new.keys() - old.keys()),
              "units_removed": len(old.keys() - new.keys()),
              "units_changed": sum(1 for k in new.keys() & old.keys() if new[k] != old[k])}
    assert expect["units_added"] > 0 and expect["units_removed"] > 0   # day 3 in, day 9 out
    assert expect["units_changed"] == 0
    assert ours.record["changes"] == expect


def test_s3_refresh_reads_only_the_new_footer(s3_options, s3_bucket, client, footers, tmp_path):
    import s3fs

    fs = s3fs.S3FileSystem(**s3_options)

    def put(rel, t):
        with fs.open(f"{s3_bucket}/src/{rel}", "wb") as f:
            pq.write_table(t, f, row_group_size=500)

    for d in (1, 2):
        put(f"day={d:02d}/part-0.parquet", frame(2000, d))
    src, table = f"s3://{s3_bucket}/src", f"s3://{s3_bucket}/tables/t"
    r1 = build(src, table, client, storage_options=s3_options)
    assert r1["files"]["metadata_read"] == 2
    footers.clear()
    put("day=03/part-0.parquet", frame(2000, 3))
    r2 = build(src, table, client, storage_options=s3_options)
    assert footers == ["day=03/part-0.parquet"]
    assert r2["files"] == {"total": 3, "metadata_read": 1, "planned_from_previous": 2}
    # the ETag is the token: rewriting a file with other bytes re-plans it
    footers.clear()
    put("day=01/part-0.parquet", frame(2500, 11))
    r3 = build(src, table, client, storage_options=s3_options)
    assert footers == ["day=01/part-0.parquet"] and r3["changed"]
    full = f"s3://{s3_bucket}/tables/full"
    build(src, full, client, storage_options=s3_options, full=True)
    assert content_bytes(table, s3_options) == content_bytes(full, s3_options)

"""The wire codec: round trips, a table of bad entries with their reasons, and a fuzz."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from alerter.constants import Encoding
from alerter.errors import BadEntryError
from alerter.timeaxis import parse_hour
from alerter.wire import (
    CountBatch,
    EdgeChange,
    decode_entry,
    encode_batch,
    encode_count,
    encode_edge,
    pack_ids,
    pack_table,
    partition_of,
    table_ids,
    unpack_ids,
    unpack_table,
)

H = parse_hour("2026-11-02T07:00:00Z")


def _bytes(fields: dict[str, str | bytes]) -> dict[bytes, bytes]:
    """As redis-py hands them back (decode_responses off)."""
    return {k.encode(): v if isinstance(v, bytes) else v.encode() for k, v in fields.items()}


@pytest.mark.parametrize("count", [0, 1, 880, 12.5, 1e6])
def test_count_round_trip(count: float) -> None:
    got = decode_entry(_bytes(encode_count("/news", H, count)))
    assert isinstance(got, CountBatch)
    assert got.hour == H and got.nodes == ["/news"] and got.values.tolist() == [float(count)]


@pytest.mark.parametrize("enc", [Encoding.F64, Encoding.JSON])
@pytest.mark.parametrize("values", [[], [3.0], [1.0, float("nan"), 0.0, 1e6], [2.5, 7.0]])
def test_batch_round_trip(enc: Encoding, values: list[float]) -> None:
    nodes = [f"/n{i}/é" for i in range(len(values))]
    got = decode_entry(_bytes(encode_batch(H, nodes, np.array(values), enc)))
    assert isinstance(got, CountBatch) and got.nodes == nodes and got.hour == H
    assert np.array_equal(got.values, np.array(values, dtype=float), equal_nan=True)


def test_f64_falls_back_to_json_for_ids_with_newlines() -> None:
    fields = encode_batch(H, ["/a\nb"], np.array([1.0]), Encoding.F64)
    assert fields["enc"] == "json"
    assert decode_entry(_bytes(fields)).nodes == ["/a\nb"]  # type: ignore[union-attr]


@pytest.mark.parametrize("op", ["add", "remove"])
def test_edge_round_trip(op: str) -> None:
    got = decode_entry(_bytes(encode_edge(op, "/", "/news", H)))
    assert got == EdgeChange(op, "/", "/news", H)


def test_hand_typed_entry_without_version() -> None:
    """What `redis-cli XADD alerter:{p0}:in '*' type count node /news hour ... count 880` sends."""
    got = decode_entry({b"type": b"count", b"node": b"/news", b"hour": b"2026-11-02T07:00:00Z", b"count": b"880"})
    assert isinstance(got, CountBatch) and got.values.tolist() == [880.0]


BAD = [
    ({"node": "/", "hour": "2026-11-02T07:00:00Z", "count": "1"}, "missing field 'type'"),
    ({"type": "count", "hour": "2026-11-02T07:00:00Z", "count": "1"}, "missing field 'node'"),
    ({"type": "count", "node": "/", "count": "1"}, "missing field 'hour'"),
    ({"type": "count", "node": "/", "hour": "2026-11-02T07:00:00Z"}, "missing field 'count'"),
    ({"type": "count", "node": "", "hour": "2026-11-02T07:00:00Z", "count": "1"}, "'node' is empty"),
    ({"type": "count", "node": "/", "hour": "2026-11-02T07:00:00Z", "count": "-3"}, "finite number >= 0"),
    ({"type": "count", "node": "/", "hour": "2026-11-02T07:00:00Z", "count": "many"}, "is not a number"),
    ({"type": "count", "node": "/", "hour": "2026-11-02T07:00:00Z", "count": "inf"}, "finite number >= 0"),
    ({"type": "count", "node": "/", "hour": "yesterday", "count": "1"}, "not an ISO 8601 time"),
    ({"type": "count", "node": "/", "hour": "2026-11-02T07:30:00Z", "count": "1"}, "not on a whole hour"),
    ({"type": "count", "node": "/", "hour": "2026-11-02T07:00:00", "count": "1"}, "no offset"),
    ({"type": "gauge", "node": "/"}, "unknown entry type='gauge'"),
    ({"v": "9", "type": "count"}, "unknown wire version"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "xml", "nodes": "", "counts": ""}, "unknown batch encoding"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "json", "nodes": "[\"/\"]", "counts": "[1, 2]"}, "1 node ids but 2 counts"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "json", "nodes": "[\"/\"]", "counts": "[\"5\"]"}, "not a number or null"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "json", "nodes": "[\"/\"]", "counts": "[-1]"}, "finite number >= 0"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "json", "nodes": "[\"/\"", "counts": "[1]"}, "not valid JSON"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "json", "nodes": "[1]", "counts": "[1]"}, "non-empty strings"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "f64", "nodes": "/", "counts": b"\x00" * 7}, "not a multiple of 8"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "f64", "nodes": "/a\n\n/b", "counts": b"\x00" * 24}, "empty id"),
    ({"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "f64", "nodes": "/a"}, "missing field 'counts'"),
    ({"type": "edge_add", "src": "/"}, "missing field 'dst'"),
    ({"type": "edge_remove", "src": "/", "dst": "/b", "ts": "soon"}, "field 'ts'"),
    ({"type": "count", "node": "/", "hour": "2026-11-02T07:00:00Z", "count": "1", "pad": "x" * 5000}, "over the limit"),
]


@pytest.mark.parametrize(("fields", "reason"), BAD)
def test_bad_entries_say_why(fields: dict[str, str | bytes], reason: str) -> None:
    with pytest.raises(BadEntryError) as info:
        decode_entry(_bytes(fields), max_bytes=4096)
    assert reason in info.value.reason


def test_f64_negative_and_infinite_counts_are_refused() -> None:
    for bad in (-1.0, math.inf):
        fields = encode_batch(H, ["/a", "/b"], np.array([1.0, bad]))
        with pytest.raises(BadEntryError, match="count #1"):
            decode_entry(_bytes(fields))


def test_json_batch_null_is_missing() -> None:
    fields = {"type": "batch", "hour": "2026-11-02T07:00:00Z", "enc": "json", "nodes": json.dumps(["/a", "/b"]),
              "counts": "[null, 4]"}
    got = decode_entry(_bytes(fields))
    assert isinstance(got, CountBatch) and math.isnan(got.values[0]) and got.values[1] == 4.0


def test_partition_hash_is_stable_and_spread() -> None:
    assert [partition_of(n, 4) for n in ("/", "/news", "/sports")] == [partition_of(n, 4) for n in ("/", "/news", "/sports")]
    owners = {partition_of(f"/n{i}", 4) for i in range(200)}
    assert owners == {0, 1, 2, 3}


@given(st.lists(st.text(min_size=1, max_size=8), max_size=20, unique=True), st.integers(1, 3))
def test_exchange_table_round_trip_keeps_ids_and_nan(ids: list[str], k: int) -> None:
    """Ids with newlines or any unicode survive; NaN (a missing count) stays NaN, bit for bit."""
    cols = np.random.default_rng(len(ids)).normal(size=(k, len(ids)))
    cols[0, ::3] = np.nan
    blob = pack_table(pack_ids(ids), cols)
    got_ids, got = unpack_table(blob)
    assert got_ids == ids and unpack_ids(table_ids(blob)) == ids
    assert got.tobytes() == cols.tobytes()


def test_exchange_table_refuses_a_foreign_blob() -> None:
    with pytest.raises(ValueError, match="not an exchange table"):
        unpack_table(b"/a\n/b\0" + np.zeros(2).tobytes())


field_names = st.sampled_from(["v", "type", "node", "hour", "count", "enc", "nodes", "counts", "src", "dst", "ts", "x"])
field_values = st.one_of(
    st.binary(max_size=40),
    st.sampled_from([b"count", b"batch", b"edge_add", b"edge_remove", b"json", b"f64", b"1", b"-1", b"nan",
                     b"2026-11-02T07:00:00Z", b"[]", b"[null]", b"[\"/\"]", b"/"]),
)


@settings(max_examples=3000, deadline=None)
@given(st.dictionaries(field_names, field_values, max_size=8))
def test_decoder_never_crashes(fields: dict[str, bytes]) -> None:
    """Whatever arrives, the decoder returns an entry or raises BadEntryError with a reason."""
    raw = {k.encode(): v for k, v in fields.items()}
    try:
        got = decode_entry(raw)
    except BadEntryError as exc:
        assert exc.reason
    else:
        assert isinstance(got, (CountBatch, EdgeChange))
        if isinstance(got, CountBatch):
            assert not (got.values[~np.isnan(got.values)] < 0).any()

"""Reading recordings: strict by default, line numbers in every error, opt-in skipping."""

from __future__ import annotations

import gzip
from pathlib import Path

import pytest

from alerter.errors import RecordingError
from alerter.recording import CountsEvent, EdgeEvent, Header, read_recording

GOOD = [
    '{"type":"header","format":"alerter-recording/1","tz":"UTC","start":"2026-11-02T07:00:00Z","hours":2}',
    '{"type":"edge_add","ts":"2026-11-02T07:00:00Z","src":"/","dst":"/a"}',
    '{"type":"counts","hour":"2026-11-02T07:00:00Z","counts":{"/":10,"/a":null}}',
    '{"type":"edge_remove","ts":"2026-11-02T07:30:00Z","src":"/","dst":"/a"}',
    '{"type":"counts","hour":"2026-11-02T08:00:00Z","counts":{"/":12.5}}',
]


def _write(tmp_path: Path, lines: list[str], gz: bool = False) -> Path:
    path = tmp_path / ("rec.jsonl.gz" if gz else "rec.jsonl")
    data = "\n".join(lines) + "\n"
    if gz:
        path.write_bytes(gzip.compress(data.encode()))
    else:
        path.write_text(data)
    return path


@pytest.mark.parametrize("gz", [False, True])
def test_reads_every_kind_in_order(tmp_path: Path, gz: bool) -> None:
    events = list(read_recording(_write(tmp_path, GOOD, gz)))
    assert [type(e) for e in events] == [Header, EdgeEvent, CountsEvent, EdgeEvent, CountsEvent]
    assert events[2].counts == {"/": 10.0, "/a": None}
    assert events[3].op == "remove" and events[3].src == "/"


BAD = [
    ("{not json", "not valid JSON"),
    ('["a"]', "JSON object"),
    ('{"type":"countz","hour":"2026-11-02T09:00:00Z","counts":{}}', "unknown line type 'countz'; allowed: header, counts"),
    ('{"type":"counts","counts":{"/":1}}', "no 'hour'"),
    ('{"type":"counts","hour":"yesterday","counts":{"/":1}}', "not an ISO 8601 time"),
    ('{"type":"counts","hour":"2026-11-02T09:30:00Z","counts":{"/":1}}', "not on a whole hour"),
    ('{"type":"counts","hour":"2026-11-02T09:00:00","counts":{"/":1}}', "no offset"),
    ('{"type":"counts","hour":"2026-11-02T09:00:00Z","counts":{"/":-3}}', "finite number >= 0"),
    ('{"type":"counts","hour":"2026-11-02T09:00:00Z","counts":{"/":"many"}}', "number or null"),
    ('{"type":"counts","hour":"2026-11-02T09:00:00Z","counts":[1]}', "mapping node id to count"),
    ('{"type":"counts","hour":"2026-11-02T07:00:00Z","counts":{"/":1}}', "is not after the previous"),
    ('{"type":"edge_add","ts":"2026-11-02T09:00:00Z","src":"","dst":"/a"}', "'src' must be a non-empty"),
    ('{"type":"header","format":"other/9"}', "header may only be the first line"),
]


@pytest.mark.parametrize(("line", "reason"), BAD)
def test_bad_line_names_file_line_and_reason(tmp_path: Path, line: str, reason: str) -> None:
    path = _write(tmp_path, GOOD + [line])
    with pytest.raises(RecordingError) as info:
        list(read_recording(path))
    assert info.value.line == len(GOOD) + 1
    assert str(info.value).startswith(f"{path}:{len(GOOD) + 1}: ")
    assert reason in str(info.value)


def test_skip_bad_reports_each_and_keeps_the_rest(tmp_path: Path) -> None:
    lines = GOOD[:3] + [BAD[0][0], BAD[7][0]] + GOOD[3:]
    seen: list[RecordingError] = []
    events = list(read_recording(_write(tmp_path, lines), skip_bad=True, on_bad=seen.append))
    assert [e.line for e in seen] == [4, 5]
    assert len(events) == len(GOOD)


def test_unsupported_header_format(tmp_path: Path) -> None:
    with pytest.raises(RecordingError, match="unsupported recording format 'v0'"):
        list(read_recording(_write(tmp_path, ['{"type":"header","format":"v0"}'])))


def test_missing_and_corrupt_files(tmp_path: Path) -> None:
    with pytest.raises(RecordingError, match="no such file"):
        list(read_recording(tmp_path / "absent.jsonl"))
    broken = tmp_path / "broken.jsonl.gz"
    broken.write_bytes(b"not gzip at all")
    with pytest.raises(RecordingError, match="cannot read"):
        list(read_recording(broken))

"""Recorded files: trend export CSV and JSON Lines captures, read line by line."""

import gzip
import json
from pathlib import Path

import pytest

from arxwatch.daemon.history import CaptureWriter, HistoryError, HistoryReader, Recorded

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def test_csv_cells_become_bare_values_at_the_row_time(tmp_path: Path) -> None:
    path = write(
        tmp_path / "trend.csv",
        "time,larkspur/a/vav/v1/zone-temp,larkspur/a/vav/v1/valve\n"
        "2026-01-01T00:00:00Z,21.5,40\n"
        "2026-01-01 00:01:00,21.6,\n"  # no zone: UTC by default; an empty cell is no value
        "1767225720,,42.5\n",
    )
    reader = HistoryReader(path)
    assert reader.kind == "csv"
    values = list(reader)
    assert values == [
        Recorded(T0, "larkspur/a/vav/v1/zone-temp", b"21.5", True, 2),
        Recorded(T0, "larkspur/a/vav/v1/valve", b"40", True, 2),
        Recorded(T0 + 60, "larkspur/a/vav/v1/zone-temp", b"21.6", True, 3),
        Recorded(T0 + 120, "larkspur/a/vav/v1/valve", b"42.5", True, 4),
    ]
    assert (reader.first_time_s, reader.last_time_s, reader.lines) == (T0, T0 + 120, 4)


def test_csv_times_without_a_zone_are_read_in_the_zone_given(tmp_path: Path) -> None:
    # Europe/Dublin is UTC+0 in January and UTC+1 (IST) in July (IANA tz database).
    path = write(tmp_path / "t.csv", "t,x/y\n2026-07-01 13:00:00,1\n2026-01-01 13:00,2\n")
    times = [v.time_s for v in HistoryReader(path, zone="Europe/Dublin")]
    assert times == [1_782_907_200.0, T0 + 13 * 3600]  # 2026-07-01T12:00Z, 2026-01-01T13:00Z
    with pytest.raises(ValueError, match="unknown time zone 'Mars/Olympus'"):
        HistoryReader(path, zone="Mars/Olympus")


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("", r"t.csv:1: empty file"),
        ("time\n1,2\n", r"t.csv:1: header: expected a time column and at least one point"),
        ("time,a/+/b\n", r"t.csv:1: header column 2: not an MQTT topic name"),
        ("time,a/b,a/b\n", r"t.csv:1: header column 3: topic 'a/b' appears twice"),
        ("time,a/b\n1767225600,1\n1767225660,1,2\n", r"t.csv:3: 3 fields, the header has 2"),
        ("time,a/b\nyesterday,1\n", r"t.csv:2: first column: time 'yesterday' is neither"),
        ('time,a/b\n1767225600,"open\n', r"t.csv:\d+: not CSV"),
    ],
)
def test_bad_csv_names_file_and_line(tmp_path: Path, text: str, message: str) -> None:
    path = write(tmp_path / "t.csv", text)
    with pytest.raises(HistoryError, match=message):
        list(HistoryReader(path))


def test_skip_counts_bad_lines_and_goes_on(tmp_path: Path) -> None:
    text = "time,a/b\n1767225600,1\nnoon,2\n1767225720,3,4\n1767225780,5\n"
    path = write(tmp_path / "t.csv", text)
    reader = HistoryReader(path, on_bad_line="skip")
    assert [v.payload for v in reader] == [b"1", b"5"]
    assert reader.bad_lines == 2
    assert reader.first_problem is not None and "t.csv:3: first column" in reader.first_problem


def test_capture_lines_and_their_errors(tmp_path: Path) -> None:
    path = tmp_path / "site.jsonl"
    with CaptureWriter(path) as writer:
        writer.write(T0 + 3.25, "larkspur/a/vav/v1/zone-temp", b'{"value": 21.5, "ts": 1767225600}')
        writer.write(T0 + 4.0, "larkspur/a/vav/v1/raw", b"\xff\x00")  # not UTF-8: base64
    lines = path.read_text().splitlines()
    assert json.loads(lines[1]) == {"ts": T0 + 4.0, "topic": "larkspur/a/vav/v1/raw",
                                    "payload_b64": "/wA="}  # fmt: skip
    values = list(HistoryReader(path))
    assert values[0] == Recorded(
        T0 + 3.25, "larkspur/a/vav/v1/zone-temp", b'{"value": 21.5, "ts": 1767225600}', False, 1
    )
    assert values[1].payload == b"\xff\x00"

    bad = write(
        tmp_path / "bad.jsonl",
        lines[0] + "\n"
        + '{"ts": "noon", "topic": "a/b", "payload": "1"}\n'
        + '{"ts": 1, "topic": "a/#", "payload": "1"}\n'
        + '{"ts": 1, "topic": "a/b"}\n'
        + "[1, 2]\n"
        + '{"ts": 1, "topic": "a/b", "payload_b64": "***"}\n',
    )  # fmt: skip
    with pytest.raises(HistoryError, match=r'bad.jsonl:2: "ts" must be epoch seconds'):
        list(HistoryReader(bad))
    reader = HistoryReader(bad, on_bad_line="skip")
    assert len(list(reader)) == 1 and reader.bad_lines == 5


def test_kind_by_extension_or_content_and_gzip(tmp_path: Path) -> None:
    text = '{"ts": 1767225600, "topic": "a/b", "payload": "1"}\n'
    plain = write(tmp_path / "capture.log", text)
    assert HistoryReader(plain).kind == "capture"
    packed = tmp_path / "capture.jsonl.gz"
    with gzip.open(packed, "wt", encoding="utf-8") as handle:
        handle.write(text)
    assert [v.topic for v in HistoryReader(packed)] == ["a/b"]
    csv_gz = tmp_path / "trend.csv.gz"
    with gzip.open(csv_gz, "wt", encoding="utf-8") as handle:
        handle.write("time,a/b\n1767225600,1\n")
    assert HistoryReader(csv_gz).kind == "csv"
    with pytest.raises(ValueError, match="on_bad_line must be one of"):
        HistoryReader(plain, on_bad_line="ignore")  # type: ignore[arg-type]
    with pytest.raises(FileNotFoundError):
        HistoryReader(tmp_path / "missing.csv")

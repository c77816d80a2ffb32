"""Trend exports read in blocks (HistoryReader.blocks): the rows, values and errors of rows()."""

import gzip
import math
import subprocess
from pathlib import Path

import pytest

from arxwatch.daemon import history
from arxwatch.daemon.history import HistoryError, HistoryReader

HEADER = "time,a/v/1/t,a/v/1/u,a/v/2/t\n"
UNTIDY = [
    "1767225600,21.5,40,19\n",
    "1767225660, 21.6 ,\t41,\n",  # blanks around cells, an empty cell
    "\n",  # a blank line
    "   \n",  # another
    "1767225720,warm,nan,1e999\n",  # a word, nan, a number too big
    "1767225780,1_0,١٢,+.5\n",  # float() reads these two, the decoder does not
    "2026-01-01T00:05:00Z,-3e2,.5e-1,7.\n",  # an ISO time
    "1767225840,1,2\n",  # a field short
    "yesterday,1,2,3\n",  # a bad time
    "1767225900,1,2,3,4\n",  # a field too many
    "inf,1,2,3\n",  # a time that is not finite
    "1767225960,5,6,7\r\n",  # CRLF
    "1767226020,8,,9",  # no line end
]


def blocks_as_rows(reader: HistoryReader, rows: list[tuple], **kwargs: bool) -> None:
    """Append the rows of the reader's blocks to ``rows``, checking each cell's value."""
    for block in reader.blocks(**kwargs):
        assert block.values.shape == (len(block), len(reader.topics))
        for i in range(len(block)):
            cells = block.cells(i)
            for j, cell in enumerate(cells):
                value = float(block.values[i, j])
                assert (block.empty is not None and bool(block.empty[i, j])) == (cell == "")
                if cell and not cell.strip("0123456789+-.eE") and math.isfinite(_float(cell)):
                    assert value == float(cell)
                else:
                    assert math.isnan(value)
            rows.append((float(block.time_s[i]), int(block.line[i]), cells))


def _float(cell: str) -> float:
    try:
        return float(cell)
    except ValueError:
        return math.nan


def read(path: Path, policy: str, blocks: bool, **kwargs: bool) -> tuple:
    reader = HistoryReader(path, on_bad_line=policy)  # type: ignore[arg-type]
    rows: list[tuple] = []
    error = None
    try:
        if blocks:
            blocks_as_rows(reader, rows, **kwargs)
        else:
            for row in reader.rows():
                rows.append((row.time_s, row.line, row.cells))
    except HistoryError as err:
        error = str(err)
    tallies = (reader.lines, reader.bad_lines, reader.first_problem, reader.backwards)
    return rows, error, tallies, (reader.first_time_s, reader.last_time_s, reader.topics)


@pytest.mark.parametrize("policy", ["stop", "skip"])
@pytest.mark.parametrize("block_lines", [1, 3, 512])
@pytest.mark.parametrize("quoted", [False, True])
def test_blocks_agree_with_rows(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, policy: str, block_lines: int, quoted: bool
) -> None:
    lines = list(UNTIDY)
    if quoted:  # from here on the csv module reads: a quoted cell with a line break in it
        lines.insert(7, '1767225810,"2\n2",3,4\n')
    path = tmp_path / "t.csv"
    path.write_text(HEADER + "".join(lines), encoding="utf-8")
    monkeypatch.setattr(history, "BLOCK_LINES", block_lines)
    by_block = read(path, policy, blocks=True)
    assert by_block == read(path, policy, blocks=False)
    rows, error, tallies, _ = by_block
    if policy == "stop":  # the first bad line, named; the rows before it all given
        bad = 9 + 2 * quoted
        assert error is not None and error.startswith(f"{path}:{bad}: 3 fields, the header has 4")
        assert [line for _, line, _ in rows] == [2, 3, 6, 7, 8] + [10] * quoted  # its last line
    else:
        assert tallies[1] == 4 and len(rows) == 7 + quoted
        assert rows[-1] == (1767226020.0, 14 + 2 * quoted, ["8", "", "9"])


@pytest.mark.parametrize("policy", ["stop", "skip"])
def test_blocks_read_ahead_by_a_child_agree_with_rows(tmp_path: Path, policy: str) -> None:
    path = tmp_path / "t.csv"
    path.write_text(HEADER + "".join(UNTIDY * 300), encoding="utf-8")  # blocks of 512 lines
    ahead = read(path, policy, blocks=True, ahead=True)
    assert ahead == read(path, policy, blocks=False)
    assert (ahead[1] is None) == (policy == "skip")


@pytest.mark.parametrize("quoted", [False, True])
@pytest.mark.parametrize("policy", ["stop", "skip"])
def test_blocks_of_a_broken_gzip_file(tmp_path: Path, policy: str, quoted: bool) -> None:
    lines = [f"{1767225600 + 60 * k},{k},{k},{k}\n" for k in range(3000)]
    lines[1200] = "1767297600,1,2\n"  # a field short, in the block where the data breaks off
    if quoted:
        lines[1100] = '1767291600,"1",2,3\n'
    packed = gzip.compress((HEADER + "".join(lines)).encode())
    path = tmp_path / "t.csv.gz"
    path.write_bytes(packed[: len(packed) // 2])  # cut short: breaks off near line 1,500
    by_block = read(path, policy, blocks=True)
    assert by_block == read(path, policy, blocks=False)
    rows, error, (lines_read, bad, first, _), _ = by_block
    if policy == "stop":
        assert error is not None and ":1202: 3 fields" in error
    else:
        assert bad == 2 and first is not None and ":1202: 3 fields" in first
        assert len(rows) > 1300


def test_blocks_header_errors_and_captures(tmp_path: Path) -> None:
    path = tmp_path / "t.csv"
    path.write_text("time,a/b,a/b\n1,2,3\n", encoding="utf-8")
    for ahead in (False, True):
        with pytest.raises(HistoryError, match=r"t.csv:1: header column 3: topic 'a/b' appears"):
            list(HistoryReader(path).blocks(ahead=ahead))
    capture = tmp_path / "c.jsonl"
    capture.write_text('{"ts": 1, "topic": "a/b", "payload": "1"}\n', encoding="utf-8")
    with pytest.raises(ValueError, match="is a capture"):
        list(HistoryReader(capture).blocks())


def test_a_reader_left_early_ends_its_child(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "t.csv"
    path.write_text(HEADER + "".join(UNTIDY[:2] * 5000), encoding="utf-8")
    started: list[subprocess.Popen] = []
    popen = subprocess.Popen

    def recorded(*args: object, **kwargs: object) -> subprocess.Popen:
        started.append(popen(*args, **kwargs))  # type: ignore[call-overload]
        return started[-1]

    monkeypatch.setattr(subprocess, "Popen", recorded)
    blocks = HistoryReader(path).blocks(ahead=True)
    first = next(blocks)
    assert len(first) == history.BLOCK_LINES
    blocks.close()
    assert len(started) == 1 and started[0].returncode is not None

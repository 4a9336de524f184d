"""Recordings: everything complete is read back, a cut or corrupt tail is reported with its offset."""

from __future__ import annotations

from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from watchtower.recording import PREAMBLE, Recorder, RecordingError, RecordingReader, encode_record

FRAMES = [[b"header-%d" % i, b"x" * (i * 37 % 200), b""] for i in range(40)]


def write(path: Path) -> list[int]:
    """Write FRAMES; return the byte offset where each record ends."""
    ends = []
    with Recorder(path, {"note": "test"}) as recorder:
        for i, frames in enumerate(FRAMES):
            recorder.write(1000 + i, frames)
            ends.append(path.stat().st_size)
    return ends


def read_all(path: Path) -> tuple[list[tuple[int, list[bytes]]], RecordingReader]:
    with RecordingReader(path) as reader:
        records = [(t, [bytes(f) for f in frames]) for t, frames in reader]
    return records, reader


def test_round_trip_and_metadata(tmp_path: Path) -> None:
    path = tmp_path / "run.wtrace"
    write(path)
    records, reader = read_all(path)
    assert reader.meta == {"note": "test"}
    assert records == [(1000 + i, frames) for i, frames in enumerate(FRAMES)]
    assert reader.tail.clean and reader.tail.records == len(FRAMES)


def test_appending_to_an_existing_recording_keeps_one_preamble(tmp_path: Path) -> None:
    path = tmp_path / "run.wtrace"
    write(path)
    with Recorder(path, {"note": "ignored, the file has its metadata"}) as recorder:
        recorder.write_many([(5, [b"a"]), (6, [b"b"])])
    records, reader = read_all(path)
    assert reader.meta == {"note": "test"} and len(records) == len(FRAMES) + 2


def test_cut_at_every_byte_reports_every_complete_record(tmp_path: Path) -> None:
    path = tmp_path / "run.wtrace"
    ends = write(path)
    blob = path.read_bytes()
    header_end = ends[0] - len(encode_record(1000, FRAMES[0]))
    cut_path = tmp_path / "cut.wtrace"
    for cut in range(header_end, len(blob) + 1):
        cut_path.write_bytes(blob[:cut])
        records, reader = read_all(cut_path)
        complete = sum(end <= cut for end in ends)
        assert len(records) == complete, cut
        if cut in ends or cut == header_end:
            assert reader.tail.clean
        else:
            last_end = ends[complete - 1] if complete else header_end
            assert reader.tail.offset == last_end and "torn" in reader.tail.reason


@settings(max_examples=300, deadline=None)
@given(st.data())
def test_corruption_anywhere_costs_exactly_the_damaged_record(data: st.DataObject) -> None:
    """A flipped byte inside record k loses record k only: the reader steps to record k + 1 (whose length,
    frame layout and CRC-32 check out) and reports the bytes it stepped over."""
    import tempfile

    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "run.wtrace"
        ends = write(path)
        blob = bytearray(path.read_bytes())
        header_end = ends[0] - len(encode_record(1000, FRAMES[0]))
        position = data.draw(st.integers(header_end, len(blob) - 1))
        blob[position] ^= data.draw(st.integers(1, 255))
        path.write_bytes(bytes(blob))
        records, reader = read_all(path)
        damaged = sum(end <= position for end in ends)
        assert records == [(1000 + i, FRAMES[i]) for i in range(len(FRAMES)) if i != damaged]
        start = ends[damaged - 1] if damaged else header_end
        if damaged == len(FRAMES) - 1:  # nothing intact follows: reading stops where the damage starts
            assert reader.tail.offset == start and not reader.tail.skipped
        else:
            (skip,) = reader.tail.skipped
            assert (skip.start, skip.end) == (start, ends[damaged]) and reader.tail.offset is None


@pytest.mark.parametrize("content", [b"", b"hello world", PREAMBLE, PREAMBLE + b"\xff\xff\xff\xff"])
def test_not_a_recording_is_a_clear_error(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "bad.wtrace"
    path.write_bytes(content)
    with pytest.raises(RecordingError):
        RecordingReader(path)


def test_missing_file_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(RecordingError, match="cannot open"):
        RecordingReader(tmp_path / "nope.wtrace")

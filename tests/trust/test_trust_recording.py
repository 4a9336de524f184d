"""Crash-safe recordings: a collector killed in the middle of a record and restarted on the same file
leaves a torn record in the middle; the reader steps over it to the restart's marker and loses nothing
complete. Random truncation and corruption never crash the reader nor hand out a damaged record."""

from __future__ import annotations

import io
from pathlib import Path

from hypothesis import given, settings
from hypothesis import strategies as st

from agent.records import encode_record
from watchtower.recording import Recorder, RecordingReader, Tail, iter_records, read_meta, resume_records

FUZZ = settings(max_examples=1500, deadline=None, derandomize=True, database=None)


def session_records(session: int, n: int) -> list[tuple[int, list[bytes]]]:
    return [(session * 1000 + i, [b"h%d.%d" % (session, i), b"x" * ((i * 53 + session) % 300)]) for i in range(n)]


def build(sessions: list[tuple[int, int]]) -> tuple[bytes, list[tuple[int, list[bytes]]], list[int]]:
    """A recording written by successive writers: (records, bytes of a torn record left at the end) each.
    Returns the bytes, every complete record in order, and the byte offset where each one ends."""
    stream = io.BytesIO()
    written, ends = [], []
    for session, (n, torn) in enumerate(sessions):
        writer = Recorder(stream, {"note": "fuzz"})
        for t, frames in session_records(session, n):
            writer.write(t, frames)
            written.append((t, frames))
            ends.append(stream.tell())
        stream.write(encode_record(-1, [b"the record a kill cut short"])[:torn])
    return stream.getvalue(), written, ends


def read(blob: bytes) -> tuple[list[tuple[int, list[bytes]]], Tail]:
    stream = io.BytesIO(blob)
    read_meta(stream)
    tail = Tail()
    return [(t, [bytes(f) for f in frames]) for t, frames in iter_records(stream, tail)], tail


def test_a_torn_record_of_any_length_is_stepped_over_after_a_restart() -> None:
    torn_max = len(encode_record(-1, [b"the record a kill cut short"]))
    for torn in range(1, torn_max):
        blob, written, ends = build([(5, torn), (4, 0)])
        records, tail = read(blob)
        assert records == written, torn
        assert tail.offset is None and tail.resumes == 1 and not tail.clean
        (skip,) = tail.skipped
        assert skip.start == ends[4] and skip.end == ends[4] + torn


def test_a_clean_restart_is_not_damage_and_many_restarts_add_up() -> None:
    blob, written, _ = build([(3, 0), (0, 0), (2, 9), (1, 30), (2, 0)])
    records, tail = read(blob)
    assert records == written and tail.resumes == 4 and len(tail.skipped) == 2 and tail.offset is None


def test_a_tear_without_a_restart_still_stops_and_reports_where() -> None:
    blob, written, ends = build([(6, 11)])
    records, tail = read(blob)
    assert records == written and tail.offset == ends[-1] and "torn" in tail.reason


def test_following_a_file_as_it_grows_across_a_crash(tmp_path: Path) -> None:
    """What an attached console does: read what is there, come back later; a half-written record or
    marker is read whole next time, and a torn record is stepped over once the restart's marker is there."""
    blob, written, _ = build([(4, 20), (3, 0)])
    path = tmp_path / "run.wtrace"
    path.write_bytes(blob[:30])  # the preamble and a little
    with open(path, "rb") as stream:
        read_meta(stream)
        tail = Tail(consumed=stream.tell())
    seen = []
    for size in range(30, len(blob) + 1, 7):
        path.write_bytes(blob[:size])
        seen += [(t, [bytes(f) for f in frames]) for t, frames in resume_records(path, tail)]
    path.write_bytes(blob)
    seen += [(t, [bytes(f) for f in frames]) for t, frames in resume_records(path, tail)]
    assert seen == written and tail.consumed == len(blob)


def test_the_reader_on_disk_matches_and_reports(tmp_path: Path) -> None:
    blob, written, _ = build([(2, 13), (2, 0)])
    path = tmp_path / "run.wtrace"
    path.write_bytes(blob)
    with RecordingReader(path) as reader:
        assert [(t, [bytes(f) for f in fr]) for t, fr in reader] == written
    assert "skipped bytes" in reader.tail.describe() and reader.meta == {"note": "fuzz"}


PREAMBLE_BYTES = len(build([(0, 0)])[0])
sessions = st.lists(st.tuples(st.integers(0, 6), st.sampled_from([0, 0, 1, 7, 8, 19, 40])), min_size=1, max_size=4)


@FUZZ
@given(sessions, st.data())
def test_truncated_anywhere_every_complete_record_before_the_cut_is_read(layout: list[tuple[int, int]],
                                                                          data: st.DataObject) -> None:
    blob, written, ends = build(layout)
    cut = data.draw(st.integers(PREAMBLE_BYTES, len(blob)))
    records, tail = read(blob[:cut])
    assert records == [w for w, end in zip(written, ends, strict=True) if end <= cut]
    assert tail.offset is None or tail.offset <= cut


@FUZZ
@given(sessions, st.data())
def test_corrupted_anywhere_nothing_damaged_is_read_and_nothing_before_is_lost(layout: list[tuple[int, int]],
                                                                                data: st.DataObject) -> None:
    blob, written, ends = build(layout)
    if len(blob) == PREAMBLE_BYTES:
        return
    position = data.draw(st.integers(PREAMBLE_BYTES, len(blob) - 1))
    damaged = bytearray(blob)
    damaged[position] ^= data.draw(st.integers(1, 255))
    records, tail = read(bytes(damaged))
    before = [w for w, end in zip(written, ends, strict=True) if end <= position]
    assert records[: len(before)] == before
    it = iter(written)  # the rest is an in-order subsequence of what was written: never a damaged record
    assert all(any(r == w for w in it) for r in records[len(before):])
    assert not tail.clean

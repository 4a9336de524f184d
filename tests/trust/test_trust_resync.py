"""Recordings that lose at most the bad record.

Two failures reproduced first: a message of two 40 MiB frames made the recording unreadable after it
("implausible record length"), and 64 flipped bytes in the middle of the demo recording stopped every
reader at the checksum mismatch although every later record was intact. Now the writer never writes a
record a reader would reject, and the reader steps over damage to the next intact record.
"""

from __future__ import annotations

import gzip
import io
import itertools
from pathlib import Path

import pytest
import zmq
from hypothesis import given, settings
from hypothesis import strategies as st
from trust_helpers import wait_for

from agent import Probe
from agent.records import MAX_MESSAGE_BYTES, MAX_PARTS, encode_record
from watchtower.collector import Collector
from watchtower.demo import DEMO_RECORDING
from watchtower.ingest import Ingest
from watchtower.recording import Recorder, RecordingReader, Tail, iter_records, read_meta

MIB = 1 << 20


def demo_bytes() -> bytes:
    with gzip.open(DEMO_RECORDING, "rb") as stream:
        return stream.read()


def records_of(blob: bytes) -> tuple[list[tuple[int, list[bytes]]], Tail]:
    stream = io.BytesIO(blob)
    read_meta(stream)
    tail = Tail()
    return [(t, [bytes(f) for f in frames]) for t, frames in iter_records(stream, tail)], tail


def test_two_40_mib_frames_are_counted_bad_and_the_recording_stays_readable(
        running: tuple[Collector, Path], zmq_context: zmq.Context) -> None:
    collector, path = running
    sender = zmq_context.socket(zmq.DEALER)
    sender.setsockopt(zmq.LINGER, 0)
    sender.connect(collector.bound)
    sender.send_multipart([b"", b"\x01" * (40 * MIB), b"\x02" * (40 * MIB)])
    wait_for(lambda: collector.ingest.ledger.bad["oversize-message"] == 1, "the big message counted bad")
    probe = Probe(0, 1, "n0", collector.bound, layers=["a"], job="after", context=zmq_context)
    for _ in range(5):
        with probe.compute("a"):
            pass
        probe.end_step()
    wait_for(lambda: collector.ingest.steps == 5, "the job after it")
    probe.close()
    sender.close()
    with RecordingReader(path) as reader:
        replayed = Ingest()
        replayed.feed_all(reader)
    assert reader.tail.clean and replayed.steps == 5 and replayed.store.job == "after"
    assert replayed.ledger.bad_total == 0  # the oversize message was not recorded


def test_the_writer_never_writes_what_a_reader_rejects() -> None:
    stream = io.BytesIO()
    writer = Recorder(stream, {})
    writer.write_many([(1, [b"a"]), (2, [b"x" * (MAX_MESSAGE_BYTES + 1)]), (3, [b""] * (MAX_PARTS + 1)),
                       (4, [b"x" * (MAX_MESSAGE_BYTES // 2)] * 2), (5, [b"b"])])
    records, tail = records_of(stream.getvalue())
    assert [t for t, _ in records] == [1, 4, 5] and tail.clean and writer.refused == 2


def test_the_largest_valid_message_fits() -> None:
    """The cap is the wire's own: a STEP at 4096 layers and 65536 exchanges (docs/wire.md) is recorded."""
    from agent import wire

    step = 40 + wire.STEP_META.size + 2 * 4096 * 8 + 8 * 65536 * 8
    assert step == MAX_MESSAGE_BYTES and MAX_MESSAGE_BYTES >= 40 + wire.MAX_SCHEMA_BYTES


def test_64_flipped_bytes_in_the_demo_cost_only_the_records_they_touch() -> None:
    blob = bytearray(demo_bytes())
    records, _ = records_of(bytes(blob))
    sizes = [len(encode_record(t, frames)) for t, frames in records]
    first = len(blob) - sum(sizes)
    ends = list(itertools.accumulate(sizes, initial=first))[1:]
    middle = len(blob) // 2
    for i in range(middle, middle + 64):
        blob[i] ^= 0xA5
    damaged = {i for i, end in enumerate(ends) if end > middle and end - sizes[i] < middle + 64}
    read, tail = records_of(bytes(blob))
    assert read == [r for i, r in enumerate(records) if i not in damaged]
    assert len(damaged) <= 2 and tail.offset is None and tail.skipped_bytes == sum(sizes[i] for i in damaged)


DEMO_PREFIX_RECORDS = 400


@pytest.fixture(scope="module")
def demo_prefix() -> tuple[bytes, list[tuple[int, list[bytes]]], list[int]]:
    """The demo's metadata and first records, byte for byte as in the file, and where each record ends."""
    blob = demo_bytes()
    stream = io.BytesIO(blob)
    read_meta(stream)
    start = stream.tell()
    records, ends, at = [], [], start
    for t, frames in iter_records(stream, Tail()):
        records.append((t, [bytes(f) for f in frames]))
        at += len(encode_record(t, records[-1][1]))
        ends.append(at)
        if len(records) == DEMO_PREFIX_RECORDS:
            break
    return blob[:at], records, [start, *ends]


@settings(max_examples=200, deadline=None, derandomize=True, database=None)
@given(st.data())
def test_random_damage_to_a_real_recording_loses_only_the_records_it_touches(
        demo_prefix: tuple[bytes, list[tuple[int, list[bytes]]], list[int]], data: st.DataObject) -> None:
    blob, records, bounds = demo_prefix
    damaged = bytearray(blob)
    length = data.draw(st.integers(1, 64), label="damaged bytes")
    position = data.draw(st.integers(bounds[0], len(blob) - length), label="at")
    for i in range(position, position + length):
        damaged[i] ^= data.draw(st.integers(1, 255))
    read, tail = records_of(bytes(damaged))
    touched = {i for i in range(len(records)) if bounds[i + 1] > position and bounds[i] < position + length}
    assert read == [r for i, r in enumerate(records) if i not in touched]
    lost = sum(bounds[i + 1] - bounds[i] for i in touched)
    if max(touched) == len(records) - 1:  # the damage reaches the last record: nothing to go on with
        assert tail.offset == bounds[min(touched)]
    else:
        assert tail.offset is None and tail.skipped_bytes == lost


def test_report_of_a_damaged_recording_says_what_it_stepped_over(tmp_path: Path,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    import json

    from watchtower.cli import main

    blob = bytearray(demo_bytes())
    for i in range(len(blob) // 2, len(blob) // 2 + 64):
        blob[i] ^= 0xA5
    path = tmp_path / "damaged.wtrace"
    path.write_bytes(bytes(blob))
    assert main(["report", str(path), "--json"]) == 0
    captured = capsys.readouterr()
    report = json.loads(captured.out)["recording"]
    assert report["torn_at"] is None and report["skipped_bytes"] >= 64 and len(report["skipped"]) == 1
    assert "stepped over" in captured.err and len(captured.err.strip().splitlines()) == 1


def test_an_empty_message_is_counted_bad_and_never_read_back_as_a_clock_tick(
        endpoint: str, tmp_path: Path, zmq_context: zmq.Context) -> None:
    path = tmp_path / "run.wtrace"
    collector = Collector(endpoint, Ingest(), Recorder(path), context=zmq_context)  # drained here: no ticks
    sender = zmq_context.socket(zmq.DEALER)
    sender.setsockopt(zmq.LINGER, 0)
    sender.connect(collector.bound)
    sender.send_multipart([b""])
    wait_for(lambda: collector.drain(10) >= 0 and collector.ingest.ledger.bad["empty"] == 1, "counted bad")
    sender.close()
    collector.close()
    with RecordingReader(path) as reader:
        assert list(reader) == [] and reader.tail.clean

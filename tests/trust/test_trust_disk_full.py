"""A full disk is a state, not a crash.

Reproduced first: with the recording on a 2 MB filesystem, ``collect`` died with ``OSError: [Errno 28]``
from the recorder's write. Now recording stops (where and why is shown), the collector goes on receiving,
ingesting and serving, the messages not recorded are counted, and recording resumes after a resume
marker once space is back; a reader steps over the torn record the failure left.
"""

from __future__ import annotations

import errno
import io
import os
import subprocess
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest
import zmq
from trust_helpers import wait_for

from agent import Probe
from agent.records import is_note
from watchtower.collector import Collector
from watchtower.console import ConsoleApp, StaticFeed
from watchtower.ingest import Ingest
from watchtower.recording import Recorder, RecordingReader, Tail, iter_records, read_meta
from watchtower.snapshot import build_snapshot, cluster_for


class FillingDisk(io.RawIOBase):
    """An unbuffered file on a disk with ``room`` bytes left: a write takes what fits (a short write), and
    a write with no room raises ENOSPC, as os.write does on a full filesystem."""

    def __init__(self, room: int) -> None:
        self.data = bytearray()
        self.room = room

    def writable(self) -> bool:
        return True

    def tell(self) -> int:
        return len(self.data)

    def write(self, blob: bytes) -> int:  # type: ignore[override]
        if self.room <= 0:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        taken = bytes(blob[: self.room])
        self.data += taken
        self.room -= len(taken)
        return len(taken)


class Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def read_back(blob: bytes) -> tuple[list[int], Tail, Ingest]:
    """Times of the records that are messages, how reading ended, and the recording through the ingest."""
    stream = io.BytesIO(blob)
    read_meta(stream)
    tail, ingest, times = Tail(), Ingest(), []
    for t, frames in iter_records(stream, tail):
        ingest.feed(t, frames)
        if not is_note(frames):
            times.append(t)
    return times, tail, ingest


def test_a_full_disk_stops_recording_counts_what_is_not_recorded_and_resumes() -> None:
    disk, clock = FillingDisk(room=1000), Clock()
    recorder = Recorder(disk, {"note": "disk"}, retry_s=1.0, clock=clock)
    t = 0
    while recorder.stopped_at is None:  # each record is 18 + 100 bytes: the disk fills mid-record
        recorder.write(t, [b"x" * 100])
        t += 1
    status = recorder.status()
    assert status["state"] == "stopped" and status["reason"] == "disk full"
    assert status["message"] == f"recording stopped: disk full at byte {len(disk.data)}" and len(disk.data) == 1000
    written = recorder.records
    for _ in range(5):  # arrive while the disk is full, before and after a retry that fails
        recorder.write(t, [b"y"])
        t += 1
        clock.now += 0.6
    assert recorder.unrecorded == 1 + 5 and recorder.stopped_at == 1000
    disk.room = 10_000  # space comes back
    clock.now += 1.0
    recorder.write_many([(t, [b"after"]), (t + 1, [b"after"])])
    assert recorder.status()["state"] == "recording" and recorder.stops == 1
    times, tail, replayed = read_back(bytes(disk.data))
    assert times == [*range(written), t, t + 1]
    assert replayed.recording_gaps == [{"stopped_at": 1000, "reason": "disk full", "resumed_at": 1000,
                                        "unrecorded": 6}]
    from watchtower.tables import format_snapshot

    text = format_snapshot(build_snapshot(replayed, cluster_for({}, None), source={"kind": "recording", "where": "x"}))
    assert "recording stopped: disk full at byte 1000; 6 messages not recorded; resumed at byte 1000" in text
    assert tail.resumes == 1 and tail.offset is None and tail.skipped[0].start < 1000 == tail.skipped[0].end


@pytest.fixture
def on_a_full_disk(endpoint: str, zmq_context: zmq.Context) -> Iterator[tuple[Collector, FillingDisk]]:
    disk = FillingDisk(room=600)
    collector = Collector(endpoint, Ingest(), Recorder(disk, {}, retry_s=0.0), context=zmq_context)
    stop = threading.Event()
    thread = threading.Thread(target=collector.run, args=(stop,))
    thread.start()
    yield collector, disk
    stop.set()
    thread.join()
    collector.close()


def test_the_collector_goes_on_ingesting_on_a_full_disk_and_says_so(
        on_a_full_disk: tuple[Collector, FillingDisk], zmq_context: zmq.Context) -> None:
    collector, disk = on_a_full_disk
    probe = Probe(0, 1, "n0", collector.bound, layers=["a"], job="full", context=zmq_context)
    for step in range(30):
        with probe.compute("a"):
            pass
        probe.end_step()
        wait_for(lambda step=step: collector.ingest.steps == step + 1, "each step ingested")  # type: ignore[misc]
    recorder = collector.recorder
    assert recorder is not None and recorder.status()["state"] == "stopped" and recorder.unrecorded > 0
    snapshot = build_snapshot(collector.ingest, cluster_for({}, None), source={"kind": "live", "where": "x"},
                              recorder=recorder.status())
    assert snapshot["recorder"]["message"] == "recording stopped: disk full at byte 600"
    disk.room = 1 << 20
    for _ in range(3):
        with probe.compute("a"):
            pass
        probe.end_step()
    wait_for(lambda: collector.ingest.steps == 33, "steps after space came back")
    wait_for(lambda: recorder.status()["state"] == "recording", "recording resumed")
    probe.close()
    replayed = Ingest()
    stream = io.BytesIO(bytes(disk.data))
    read_meta(stream)
    tail = Tail()
    replayed.feed_all(iter_records(stream, tail))
    assert tail.resumes == 1 and replayed.steps + recorder.unrecorded >= 30
    assert replayed.ledger.missing >= 1  # what was not recorded shows as a gap in the senders' numbers


async def test_the_console_header_says_recording_stopped() -> None:
    from watchtower.ingest import Ingest as _Ingest

    stopped = {"state": "stopped", "stopped_at": 2_000_000, "reason": "disk full", "unrecorded": 42, "stops": 1,
               "message": "recording stopped: disk full at byte 2000000"}
    snapshot = build_snapshot(_Ingest(), cluster_for({}, None), source={"kind": "live", "where": "x"},
                              recorder=stopped)
    app = ConsoleApp(StaticFeed([snapshot]))
    async with app.run_test(size=(120, 30)) as pilot:
        await pilot.pause()
        await pilot.pause()
        from watchtower.console.header import JobHeader

        text = app.query_one(JobHeader).render().plain
    assert "recording stopped: disk full at byte 2000000 · 42 messages not recorded" in text


@pytest.mark.skipif(os.geteuid() != 0, reason="mounting a small tmpfs needs root")
def test_on_a_real_small_filesystem(tmp_path: Path, endpoint: str, zmq_context: zmq.Context) -> None:
    mount = tmp_path / "small"
    mount.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=256k", "tmpfs", str(mount)],
                      capture_output=True, check=False).returncode:
        pytest.skip("cannot mount a tmpfs here")
    try:
        filler = mount / "filler"
        filler.write_bytes(b"\0" * (200 << 10))
        path = mount / "run.wtrace"
        collector = Collector(endpoint, Ingest(), Recorder(path, {}, retry_s=0.0), context=zmq_context)
        stop = threading.Event()
        thread = threading.Thread(target=collector.run, args=(stop,))
        thread.start()
        probe = Probe(0, 1, "n0", collector.bound, layers=[f"layer{i}" for i in range(64)], job="tmpfs",
                      context=zmq_context)
        recorder = collector.recorder
        assert recorder is not None
        steps = 0
        while recorder.stops == 0:
            for i in range(64):
                with probe.exchange(f"layer{i}", peer=0, nbytes=1):
                    pass
            probe.end_step()
            steps += 1
            wait_for(lambda steps=steps: collector.ingest.steps == steps, "each step ingested")  # type: ignore[misc]
        assert recorder.status()["message"] == f"recording stopped: disk full at byte {path.stat().st_size}"
        filler.unlink()
        for _ in range(3):
            probe.end_step()
        wait_for(lambda: collector.ingest.steps == steps + 3, "steps after space came back")
        wait_for(lambda: recorder.status()["state"] == "recording", "recording resumed")
        probe.close()
        stop.set()
        thread.join()
        collector.close()
        with RecordingReader(path) as reader:
            assert sum(1 for _ in reader) > 0 and reader.tail.resumes == 1 and reader.tail.offset is None
    finally:
        subprocess.run(["umount", str(mount)], check=False)

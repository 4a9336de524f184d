"""Never block training: with the collector away a step's publish stays quick and memory bounded, drops
are counted and reported when it returns; a spool keeps every frame and ``merge`` joins it back in."""

from __future__ import annotations

import gzip
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest
import zmq
from trust_helpers import ingest, recorded, run_steps, wait_for

from agent import Probe, wire
from agent.records import RecordWriter
from watchtower import cli
from watchtower.collector import Collector
from watchtower.ingest import Ingest
from watchtower.merge import merge
from watchtower.recording import Recorder, RecordingReader

QUEUE = 16


@pytest.fixture
def later_collector(endpoint: str, tmp_path: Path, zmq_context: zmq.Context) -> Iterator[callable]:
    """Starts a collector on ``endpoint`` when called (the head node coming back)."""
    running: list[tuple[Collector, threading.Event, threading.Thread]] = []

    def start() -> Collector:
        collector = Collector(endpoint, Ingest(), Recorder(tmp_path / "head.wtrace"), context=zmq_context)
        stop = threading.Event()
        thread = threading.Thread(target=collector.run, args=(stop,))
        thread.start()
        running.append((collector, stop, thread))
        return collector

    yield start
    for collector, stop, thread in running:
        stop.set()
        thread.join()
        collector.close()


def test_collector_down_then_back(endpoint: str, later_collector: callable, zmq_context: zmq.Context,
                                  tmp_path: Path) -> None:
    probe = Probe(0, 1, "node0", endpoint, context=zmq_context, queue_frames=QUEUE, spool=tmp_path / "r0.spool")
    slowest = run_steps(probe, 2000)
    held = probe.seq - probe.dropped
    assert slowest < 0.5 and held <= 2 * QUEUE  # nothing listens: the bounded queue, then counted drops
    collector = later_collector()
    wait_for(lambda: collector.ingest.ledger.frames == held, "the queued frames")
    run_steps(probe, 3)
    wait_for(lambda: collector.ingest.ledger.frames == probe.seq - probe.dropped, "the steps after the return")
    last = [m for _, m in ((t, wire.decode(f)) for t, f in _frames(tmp_path / "head.wtrace"))
            if isinstance(m, wire.Step)][-1]
    assert last.dropped_total == probe.dropped  # the next frames say how many were dropped
    ledger = collector.ingest.ledger
    assert ledger.missing == ledger.dropped_at_senders == probe.dropped  # the same figure, not a sum
    probe.close()
    spooled = recorded(tmp_path / "r0.spool")[probe.sender]
    assert spooled == set(range(probe.seq))  # every frame numbered, sent or dropped


def _frames(path: Path) -> list[tuple[int, list[bytes]]]:
    with RecordingReader(path) as reader:
        return [(t, [bytes(f) for f in frames]) for t, frames in reader]


def test_a_failing_spool_stops_spooling_not_training(tmp_path: Path) -> None:
    probe = Probe(0, 1, "node0", None, spool=tmp_path / "r0.spool")
    run_steps(probe, 2)
    probe._spool._file = open("/dev/full", "wb", buffering=0)  # type: ignore[union-attr]  # noqa: SIM115
    run_steps(probe, 2)
    assert probe.spool_error is not None and "spool stopped" in probe.spool_error
    assert len(probe.sent_frames) == probe.seq  # the frames still went out
    probe.close()


def test_spool_opening_an_existing_spool_appends_after_a_marker(tmp_path: Path) -> None:
    spool = tmp_path / "r0.spool"
    for _ in range(2):  # a rank restarted with the same --spool
        probe = Probe(0, 1, "node0", None, spool=spool)
        run_steps(probe, 3)
        probe.close()
    with RecordingReader(spool) as reader:
        # per run: its schema, three steps and the sign-off of a loop that ended as it should
        assert sum(1 for _ in reader) == 2 * 5 and reader.tail.resumes == 1 and reader.tail.clean
        assert reader.meta["tool"] == "watchtower-agent spool"


# ------------------------------------------------------------------------------------------ merge

def _write(path: Path, records: list[tuple[int, list[bytes]]], meta: dict | None = None) -> None:
    with RecordWriter(path, meta or {}) as writer:
        for t, frames in records:
            writer.write(t, frames)


def _ping(sender: int, seq: int) -> list[bytes]:
    return wire.encode_ping(sender, seq, 1000 + seq)


def test_merge_orders_by_time_and_keeps_each_frame_once(tmp_path: Path) -> None:
    head = [(100 + 10 * s, _ping(1, s)) for s in (0, 1, 4, 5)] + [(170, [b"junk"])]
    spool = [(95 + 10 * s, _ping(1, s)) for s in range(7)]
    other = [(101, _ping(2, 0)), (161, _ping(2, 1))]
    _write(tmp_path / "head.wtrace", head, {"cluster": {"name": "x"}})
    _write(tmp_path / "r1.spool", spool)
    with gzip.open(tmp_path / "r2.spool.gz", "wb") as stream:  # compressed inputs stream the same way
        writer = RecordWriter(stream, {})
        for t, frames in other:
            writer.write(t, frames)
    out = tmp_path / "merged.wtrace"
    result = merge(out, [tmp_path / "head.wtrace", tmp_path / "r1.spool", tmp_path / "r2.spool.gz"])
    assert result.written == 7 + 2 + 1 and result.duplicates == 4
    merged = _frames(out)
    times = [t for t, _ in merged]
    assert times == sorted(times)
    keys = [(h.sender, h.seq) for h in (wire.decode_header(f[0]) for _, f in merged if len(f[0]) == 40)]
    assert sorted(keys) == [(1, s) for s in range(7)] + [(2, 0), (2, 1)] and len(set(keys)) == len(keys)
    assert [b"junk"] in [f for _, f in merged]  # a frame that could not be matched is kept, not guessed at
    with RecordingReader(out) as reader:
        assert reader.meta["cluster"] == {"name": "x"} and len(reader.meta["merged_from"]) == 3
    ledger = ingest(out).ledger
    assert ledger.missing == 0 and ledger.duplicates == 0 and ledger.bad == {"bad-header-size": 1}


def test_merge_command(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _write(tmp_path / "a.wtrace", [(1, _ping(1, 0)), (3, _ping(1, 2))])
    _write(tmp_path / "b.spool", [(2, _ping(1, 1)), (3, _ping(1, 2))])
    with open(tmp_path / "b.spool", "ab") as stream:
        stream.write(b"\x10\x00")  # a torn tail: reported, not fatal
    assert cli.main(["merge", str(tmp_path / "m.wtrace"), str(tmp_path / "a.wtrace"), str(tmp_path / "b.spool")]) == 0
    out = capsys.readouterr().out.splitlines()
    assert "stopped at byte" in out[1] and out[-1].endswith("3 records written, 1 duplicates left out")
    assert cli.main(["merge", str(tmp_path / "m.wtrace"), str(tmp_path / "a.wtrace")]) == 2  # never overwrites
    assert not list(tmp_path.glob("*.partial"))

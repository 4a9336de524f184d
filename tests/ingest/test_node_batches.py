"""Node-level batching: a node daemon sends its probes' messages as BATCH messages, and the collector
accounts every sender inside as if its messages had come alone; a malformed batch is refused whole."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pytest
import zmq

from agent import Probe, wire
from agent.clock import ManualClock
from agent.daemon import NodeDaemon
from watchtower.collector import Collector
from watchtower.ingest import Ingest
from watchtower.recording import Recorder, Tail, iter_records, read_meta

DEADLINE_S = 20.0


def drain_until(collector: Collector, done: Callable[[], bool], what: str) -> None:
    """Drive the collector from the test's thread until ``done`` holds; fail at the deadline."""
    end = time.monotonic() + DEADLINE_S
    while not done():
        assert time.monotonic() < end, f"timed out waiting for {what}"
        collector.drain(50)


@pytest.fixture
def collector(endpoint: str, tmp_path: Path, zmq_context: zmq.Context) -> Iterator[Collector]:
    collector = Collector(endpoint, Ingest(), Recorder(tmp_path / "run.wtrace"), context=zmq_context)
    yield collector
    collector.close()


def read_back(path: Path) -> list[tuple[int, list[bytes]]]:
    with open(path, "rb") as stream:
        read_meta(stream)
        return [(t, [bytes(f) for f in frames]) for t, frames in iter_records(stream, Tail())]


def test_a_daemon_with_four_probes_sends_batches_and_every_sender_is_accounted_exactly(
        collector: Collector, tmp_path: Path, zmq_context: zmq.Context) -> None:
    daemon = NodeDaemon(collector.bound, "node-a", f"ipc://{tmp_path}/d.ipc", interval_s=60, context=zmq_context)
    daemon.flush_s = 0.2  # long enough that a round of four steps always shares one batch
    stop = threading.Event()
    serving = threading.Thread(target=daemon.serve, args=(stop,))
    serving.start()
    clock = ManualClock()
    probes = [Probe(rank, 4, "node-a", daemon.local_endpoint, layers=["a", "b"], clock=clock,
                    context=zmq_context) for rank in range(4)]
    try:
        rounds = 12
        for step in range(rounds):
            for probe in probes:
                with probe.compute("a"):
                    clock.advance(1000 + probe.rank)
                if step == 5 and probe.rank == 2:  # probe 2 loses three frames (numbered, never sent)
                    probe.seq += 3
                probe.end_step()
        ledger = collector.ingest.ledger
        drain_until(collector, lambda: collector.ingest.steps == 4 * rounds, "every step")
        for probe in probes:
            account = ledger.senders[probe.sender]
            assert account.next_seq == probe.seq  # every frame numbered arrived or is counted missing
            assert account.missing == (3 if probe.rank == 2 else 0) and account.duplicates == 0
        assert ledger.bad_total == 0
        step_frames = sum(1 for _, frames in read_back(tmp_path / "run.wtrace")
                          if frames and wire.peek_kind(frames[0]) == wire.Kind.STEP)
        assert step_frames == 4 * rounds  # one record per frame on disk, never a batch
    finally:
        for probe in probes:
            probe.close()
        stop.set()
        serving.join(DEADLINE_S)
        daemon.close()
    assert not serving.is_alive()
    assert daemon.relay is not None and 0 < daemon.relay.batches <= rounds + 4  # ~one per round, not four
    np.testing.assert_array_equal(collector.ingest.store.totals_ns()[0][:, 0], 12 * (1000 + np.arange(4)))


def _message(sender: int, seq: int, step: int) -> list[bytes]:
    if step < 0:
        return wire.encode_schema(sender, seq, 10**18, schema_id=1, rank=sender - 1, world=3, node="n",
                                  layers=["l"])
    return wire.encode_step(sender, seq, 10**18, step=step, duration_ns=10, dropped_total=0, schema_id=1,
                            layer_ns=np.ones((2, 1), np.int64), exchanges=np.zeros((8, 0), np.int64))


def _spoilt(how: str) -> list[bytes]:
    messages = [_message(3, 3, 1), _message(3, 4, 2)]
    batch = wire.encode_batch(9, 1, 10**18, messages)
    head = list(wire.HEADER.unpack(batch[0]))
    if how == "truncated":
        return batch[:-1]
    if how == "lying counts":
        return [batch[0], bytes([4, 5]), *batch[2:]]
    if how == "lying lengths":
        lengths = np.frombuffer(batch[2], "<u4").copy()
        lengths[0] += 1
        return [batch[0], batch[1], lengths.tobytes(), batch[3]]
    if how == "lying bytes":
        head[7] += 1
    elif how == "too many messages":
        head[6] = wire.MAX_BATCH_MESSAGES + 1
    elif how == "too many bytes":
        head[7] = wire.MAX_BATCH_BYTES + 1
    elif how == "no messages":
        head[6] = 0
        return [wire.HEADER.pack(*head), b""]
    return [wire.HEADER.pack(*head), *batch[1:]]


REFUSALS = {"truncated": "bad-batch", "lying counts": "bad-batch", "lying bytes": "bad-batch",
            "lying lengths": "bad-batch",
            "too many messages": "oversize-batch", "too many bytes": "oversize-batch", "no messages": "bad-batch"}


@pytest.mark.parametrize("how", sorted(REFUSALS))
def test_a_malformed_batch_is_refused_whole_and_costs_nothing_already_received(
        how: str, collector: Collector, tmp_path: Path, zmq_context: zmq.Context) -> None:
    sock = zmq_context.socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(collector.bound)
    first = [_message(s, 0, -1) for s in (1, 2, 3)] + [_message(s, 1, 0) for s in (1, 2, 3)]
    sock.send_multipart([b"", *wire.encode_batch(9, 0, 10**18, first)])
    drain_until(collector, lambda: collector.ingest.steps == 3, "the first batch")
    sock.send_multipart([b"", *_spoilt(how)])  # sender 3's seq 3 and 4 inside: refused with the batch
    drain_until(collector, lambda: collector.ingest.ledger.bad_total == 1, "the refusal")
    later = [_message(1, 2, 1), _message(2, 2, 1), _message(3, 5, 3)]
    sock.send_multipart([b"", *wire.encode_batch(9, 2, 10**18, later)])
    drain_until(collector, lambda: collector.ingest.steps == 6, "the batch after it")
    sock.close()
    ledger = collector.ingest.ledger
    assert dict(ledger.bad) == {REFUSALS[how]: 1}
    assert [ledger.senders[s].missing for s in (1, 2, 3)] == [0, 0, 3]  # seq 2, 3, 4 of sender 3 never came whole
    collector.recorder.close()
    kept = read_back(tmp_path / "run.wtrace")
    assert [b"".join(frames) for _, frames in kept if frames] == [b"".join(m) for m in first + later]


def test_a_batch_inside_a_batch_is_refused_as_a_message() -> None:
    inner = wire.encode_batch(9, 0, 0, [_message(1, 0, -1)])
    assert len(wire.unpack_batch(wire.encode_batch(9, 1, 0, [inner]))) == 1
    ingest = Ingest()
    ingest.feed_many([(0, inner)])
    assert dict(ingest.ledger.bad) == {"nested-batch": 1}
    assert wire.unpack_batch(wire.encode_batch(9, 2, 0, [_message(1, 0, -1), _message(1, 1, 0)])) == \
        [_message(1, 0, -1), _message(1, 1, 0)]

"""The collector over real loopback sockets: probes' steps arrive exactly, bad frames are counted."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest
import zmq

from agent import Op, Probe, wire
from agent.clock import ManualClock
from watchtower.collector import Collector, EndpointError, parse_endpoint, split_envelope
from watchtower.ingest import Ingest
from watchtower.recording import RecordingReader


def wait_for(condition: object, timeout_s: float = 10.0) -> None:
    """Poll a condition until it holds; the deadline only bounds a broken test."""
    deadline = time.monotonic() + timeout_s
    while not condition():  # type: ignore[operator]
        if time.monotonic() > deadline:
            raise AssertionError("condition not met before the deadline")
        time.sleep(0.005)


def drive(probe: Probe, clock: ManualClock, steps: int) -> dict[str, int]:
    """Time a fixed pattern; return the nanoseconds each layer was given."""
    truth = {"embed": 0, "attn": 0}
    for step in range(steps):
        for layer, work in (("embed", 1000 + step), ("attn", 7919 * (step + 1))):
            with probe.compute(layer):
                clock.advance(work)
            truth[layer] += work
        with probe.exchange("attn", peer=(probe.rank + 1) % probe.world, nbytes=1 << 16, op=Op.RECV) as ex:
            clock.advance(333)
            ex.peer_ready_at(clock.now)
            clock.advance(4444)
        probe.end_step()
    return truth


def test_probes_to_collector_exact_to_the_nanosecond(running: tuple[Collector, Path],
                                                     zmq_context: zmq.Context) -> None:
    collector, path = running
    clocks = [ManualClock(), ManualClock()]
    probes = [Probe(r, 2, f"node{r}", collector.bound, clock=clocks[r], context=zmq_context) for r in range(2)]
    truths = [drive(p, c, 20) for p, c in zip(probes, clocks, strict=True)]
    wait_for(lambda: collector.ingest.steps == 40)
    store = collector.ingest.store
    compute_ns, exchange_ns = store.totals_ns()
    for rank, truth in enumerate(truths):
        assert compute_ns[rank].tolist() == [truth["embed"], truth["attn"]]
        assert exchange_ns[rank].tolist() == [0, 20 * (333 + 4444)]
    window = store.window()
    assert window.shape == (20, 2, 2) and len(window.transfers) == 40
    assert np.allclose(window.transfers.wait_s, 333e-9) and np.allclose(window.transfers.transfer_s, 4444e-9)
    assert collector.ingest.ledger.missing == 0 and collector.ingest.ledger.bad_total == 0
    for probe in probes:
        probe.close()
    collector_records = collector.recorder.records  # type: ignore[union-attr]
    with RecordingReader(path) as reader:
        assert sum(1 for _ in reader) == collector_records


def test_clock_ping_is_answered(running: tuple[Collector, Path], zmq_context: zmq.Context) -> None:
    collector, _ = running
    probe = Probe(0, 1, "n0", collector.bound, context=zmq_context)
    probe.end_step()  # sends the schema, the first ping and the step
    wait_for(lambda: collector.ingest.steps == 1)

    def offset_known() -> bool:
        probe.end_step()
        return probe.offset_ns is not None

    wait_for(offset_known)
    wait_for(lambda: collector.ingest.store.ranks[0].round_trip_ns is not None)
    assert abs(probe.offset_ns) < 50_000_000  # same host, same clock
    probe.close()


def test_bad_frames_are_counted_and_the_collector_keeps_going(running: tuple[Collector, Path],
                                                              zmq_context: zmq.Context) -> None:
    collector, path = running
    rogue = zmq_context.socket(zmq.DEALER)
    rogue.setsockopt(zmq.LINGER, 0)
    rogue.connect(collector.bound)
    rogue.send_multipart([b"", b"garbage"])
    rogue.send_multipart([b"", b"x" * 40])
    rogue.send_multipart([b"", *wire.encode_pong(1, 0, 1, 2, 3)])
    probe = Probe(0, 1, "n0", collector.bound, context=zmq_context)
    probe.end_step()
    wait_for(lambda: collector.ingest.steps == 1)
    wait_for(lambda: collector.ingest.ledger.bad_total == 3)
    assert dict(collector.ingest.ledger.bad) == {"bad-header-size": 1, "bad-magic": 1, "unexpected-kind": 1}
    rogue.close()
    probe.close()
    replayed = Ingest()
    with RecordingReader(path) as reader:  # the recording keeps what was rejected, so replay counts it too
        replayed.feed_all(reader)
    assert replayed.ledger.bad == collector.ingest.ledger.bad and replayed.steps == 1


def test_split_envelope_handles_relays() -> None:
    assert split_envelope([b"id", b"", b"h", b"m"]) == ([b"id", b""], [b"h", b"m"])
    assert split_envelope([b"relay", b"agent", b"", b"h"]) == ([b"relay", b"agent", b""], [b"h"])


@pytest.mark.parametrize(("url", "loopback"), [("tcp://127.0.0.1:5555", True), ("tcp://localhost:1", True),
                                               ("tcp://*:5555", False), ("tcp://10.1.2.3:9", False),
                                               ("tcp://[::1]:5555", True), ("ipc:///tmp/x.sock", True)])
def test_endpoint_parsing(url: str, loopback: bool) -> None:
    assert parse_endpoint(url, binding=True).loopback is loopback


@pytest.mark.parametrize("url", ["tcp://127.0.0.1", "http://x:1", "tcp://127.0.0.1:70000", "tcp://host name:1",
                                 "tcp://example.org:5555"])
def test_bad_endpoints_are_refused(url: str) -> None:
    with pytest.raises(EndpointError):
        parse_endpoint(url, binding=True)


def test_the_newest_steps_of_a_window_keep_only_their_transfers() -> None:
    from watchtower.store import Store

    store = Store()
    probe = Probe(0, 2, "a", None, clock=ManualClock())
    drive(probe, probe.clock, 6)  # type: ignore[arg-type]
    ingest = Ingest(store)
    for frames in probe.sent_frames:
        ingest.feed(0, frames)
    whole = store.window()
    newest = whole.last(2)
    assert newest.steps.tolist() == [4, 5] and newest.compute_s.shape == (2, 1, 2)
    assert np.array_equal(newest.compute_s, whole.compute_s[4:])
    assert sorted(set(newest.transfers.step.tolist())) == [4, 5] and len(newest.transfers) == 2
    assert whole.last(10) is whole

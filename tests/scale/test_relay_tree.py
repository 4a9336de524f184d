"""Rack relays: a two-level tree on loopback loses and double-counts nothing, and pongs come back down it."""

from __future__ import annotations

import threading
import time
from collections import Counter
from collections.abc import Iterator

import pytest
import zmq

from agent import wire
from agent.clock import ManualClock
from agent.probe import Probe
from tests.conftest import free_tcp_port
from watchtower.cli import main
from watchtower.collector import Collector
from watchtower.ingest import Ingest
from watchtower.relay import Relay

DEADLINE_S = 20.0
RACKS = 2
PROBES_PER_RACK = 3
STEPS = 25


def _loopback() -> str:
    return f"tcp://127.0.0.1:{free_tcp_port()}"


class Tree:
    """collector <- top relay <- RACKS rack relays, each serving in its own thread."""

    def __init__(self, ctx: zmq.Context) -> None:
        self.arrived: Counter[tuple[int, int]] = Counter()  # (sender, step) -> times it reached the store
        self.ingest = Ingest()
        self.collector = Collector(_loopback(), self.ingest, context=ctx, on_message=self._seen)
        self.top = Relay(_loopback(), self.collector.bound, context=ctx)
        self.racks = [Relay(_loopback(), self.top.bound, context=ctx) for _ in range(RACKS)]
        self.stop = threading.Event()
        self.threads = [threading.Thread(target=self.collector.run, args=(self.stop,))]
        self.threads += [threading.Thread(target=r.serve, args=(self.stop,)) for r in (self.top, *self.racks)]
        for thread in self.threads:
            thread.start()

    def _seen(self, received_ns: int, frames: list[bytes], message: wire.Message | None) -> None:
        if isinstance(message, wire.Step):
            self.arrived[message.header.sender, message.step] += 1

    def close(self) -> None:
        self.stop.set()
        for thread in self.threads:
            thread.join(DEADLINE_S)
            assert not thread.is_alive()
        for relay in (*self.racks, self.top):
            relay.close()
        self.collector.close()


@pytest.fixture
def tree(zmq_context: zmq.Context) -> Iterator[Tree]:
    built = Tree(zmq_context)
    yield built
    built.close()


def until(condition, what: str) -> None:  # type: ignore[no-untyped-def]
    deadline = time.monotonic() + DEADLINE_S
    while not condition():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.005)


def test_two_level_tree_delivers_every_step_once_and_routes_pongs_back(tree: Tree, zmq_context: zmq.Context) -> None:
    world = RACKS * PROBES_PER_RACK
    clock = ManualClock()
    probes = [Probe(rank, world, f"rack{rank // PROBES_PER_RACK}-node{rank}",
                    tree.racks[rank // PROBES_PER_RACK].bound, layers=["embed", "block"], clock=clock,
                    context=zmq_context, queue_frames=10_000)
              for rank in range(world)]
    sent: dict[int, int] = dict.fromkeys((p.sender for p in probes), 0)  # sender -> steps sent
    try:
        for _ in range(STEPS):
            for probe in probes:
                with probe.compute("block"):
                    clock.advance(1_000)
                assert probe.end_step()
                sent[probe.sender] += 1

        def synced() -> bool:  # each probe reads its pong at its next step; keep stepping until all have
            for probe in probes:
                if probe.offset_ns is None:
                    assert probe.end_step()
                    sent[probe.sender] += 1
            return all(p.offset_ns is not None for p in probes)

        until(synced, "clock pongs through two relays")
        total = sum(sent.values())
        until(lambda: tree.ingest.steps == total, f"{total} steps at the collector")
    finally:
        for probe in probes:
            probe.close()
    expected = {(sender, step) for sender, count in sent.items() for step in range(count)}
    assert set(tree.arrived) == expected
    assert set(tree.arrived.values()) == {1}
    loss = tree.ingest.ledger
    assert (loss.missing, loss.duplicates, loss.bad_total, loss.dropped_at_senders) == (0, 0, 0, 0)
    assert len(loss.senders) == world and len(tree.ingest.store.ranks) == world
    assert all(p.dropped == 0 for p in probes)


def test_relay_refuses_an_open_listener_without_keys_or_insecure(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["relay", "--listen", f"tcp://0.0.0.0:{free_tcp_port()}", "--collector", _loopback()]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--insecure" in err


@pytest.mark.parametrize("argv", [
    ["relay", "--collector", "udp://head:1"],
    ["relay", "--collector", "tcp://head:5555", "--listen", "tcp://127.0.0.1:99999"],
    ["relay", "--collector", "tcp://head:5555", "--uplink-key", "relay.key_secret"],
])
def test_relay_bad_arguments_are_one_line_and_status_2(argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    assert main(argv) == 2
    assert capsys.readouterr().err.count("\n") == 1

"""The node daemon: relays probe frames to the collector, routes pongs back, reports the node, cleans up."""

from __future__ import annotations

import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import zmq
from agent_helpers import DEADLINE_S, FakeCollector

from agent import wire
from agent.clock import ManualClock
from agent.daemon import DaemonError, NodeDaemon
from agent.nodestats import NicCounters, NodeSampler
from agent.probe import Probe


def _fake_sampler() -> NodeSampler:
    sent = iter(range(0, 10**12, 1_000))
    return NodeSampler(counters=lambda: {"eth0": NicCounters(next(sent), 0)}, cpu_percent=lambda: 25.0,
                       memory_percent=lambda: 50.0)


@pytest.fixture
def running_daemon(tmp_path: Path, collector: FakeCollector, zmq_context: zmq.Context) -> Iterator[NodeDaemon]:
    daemon = NodeDaemon(collector.endpoint, "node-7", f"ipc://{tmp_path}/run/daemon.ipc", interval_s=0.05,
                        sampler=_fake_sampler(), context=zmq_context)
    stop = threading.Event()
    server = threading.Thread(target=daemon.serve, args=(stop,))
    server.start()
    yield daemon
    stop.set()
    server.join(DEADLINE_S)
    assert not server.is_alive()
    daemon.close()


def test_relays_probe_frames_and_routes_the_pong_back(running_daemon: NodeDaemon, collector: FakeCollector,
                                                      zmq_context: zmq.Context) -> None:
    clock = ManualClock()
    probe = Probe(2, 4, "node-7", running_daemon.local_endpoint, layers=["l"], clock=clock, context=zmq_context)
    with probe.compute("l"):
        clock.advance(123)
    probe.end_step()  # ping, schema, step

    def from_probe(ms: list[wire.Message]) -> list[wire.Message]:
        return [m for m in ms if m.header.sender == probe.sender]

    messages = from_probe(collector.receive_until(lambda ms: len(from_probe(ms)) == 3))
    ping, schema, step = messages
    assert isinstance(ping, wire.ClockPing) and isinstance(schema, wire.Schema) and isinstance(step, wire.Step)
    assert (schema.rank, schema.world, schema.node) == (2, 4, "node-7")
    assert step.layer_ns[0].tolist() == [123]
    envelope = next(env for env, m in collector.messages if m is ping)
    assert len(envelope) == 3  # daemon identity, probe identity, empty delimiter

    collector.reply(envelope, wire.encode_pong(0, 0, ping.t0, ping.t0 + 5_000, ping.t0 + 6_000))
    assert probe._socket.poll(int(DEADLINE_S * 1000)), "the pong did not come back through the daemon"
    probe.end_step()  # reads the pong and reports the offset
    assert probe.offset_ns is not None
    offset = next(m for m in collector.receive_until(lambda ms: any(isinstance(m, wire.ClockOffset) for m in ms))
                  if isinstance(m, wire.ClockOffset))  # it may share its batch with the step after it
    assert isinstance(offset, wire.ClockOffset) and offset.header.sender == probe.sender
    assert offset.offset_ns == probe.offset_ns
    probe.close()


def test_daemon_announces_itself_then_samples_the_node(running_daemon: NodeDaemon,
                                                       collector: FakeCollector) -> None:
    messages = collector.receive_until(lambda ms: sum(isinstance(m, wire.NodeSample) for m in ms) >= 2)
    own = [m for m in messages if m.header.sender == running_daemon.sender]
    schema = own[0]
    assert isinstance(schema, wire.Schema)
    assert (schema.rank, schema.world, schema.layers, schema.node) == (-1, 1, (), "node-7")
    samples = [m for m in own if isinstance(m, wire.NodeSample)]
    assert samples[0].nics == ("eth0",)
    assert (samples[0].cpu_percent, samples[0].memory_percent) == (25.0, 50.0)
    # The fake NIC sent 1000 bytes between readings: the rate is that over the measured interval.
    np.testing.assert_allclose(samples[1].nic_values[0, 0] * samples[1].interval_s, 1_000.0)
    assert [m.header.seq for m in own] == list(range(len(own)))
    assert running_daemon.dropped == 0


def test_daemon_measures_its_clock_offset(tmp_path: Path, collector: FakeCollector, zmq_context: zmq.Context) -> None:
    daemon = NodeDaemon(collector.endpoint, "n", f"ipc://{tmp_path}/d.ipc", interval_s=0.01,
                        sampler=_fake_sampler(), context=zmq_context)
    daemon.pong_wait_ms = int(DEADLINE_S * 1000)  # a slow test machine must not miss the window
    stop = threading.Event()
    server = threading.Thread(target=daemon.serve, args=(stop,))
    server.start()
    try:
        ping = collector.receive_until(lambda ms: any(isinstance(m, wire.ClockPing) for m in ms))[-1]
        envelope = collector.messages[-1][0]
        ahead = 3 * 10**9  # the collector's clock runs 3 s ahead of the node's
        t1 = time.time_ns() + ahead
        collector.reply(envelope, wire.encode_pong(0, 0, ping.t0, t1, t1 + 1_000))
        offset = collector.receive_until(lambda ms: isinstance(ms[-1], wire.ClockOffset))[-1]
    finally:
        stop.set()
        server.join(DEADLINE_S)
        daemon.close()
    assert offset.header.sender == daemon.sender
    # The NTP estimate is off by at most half the round trip.
    assert abs(offset.offset_ns - ahead) <= offset.round_trip_ns // 2 + 1_000
    assert daemon.offset_ns == offset.offset_ns


def test_close_removes_the_ipc_file_and_the_folder_it_made(tmp_path: Path, collector: FakeCollector) -> None:
    path = tmp_path / "made-by-daemon" / "d.ipc"
    daemon = NodeDaemon(collector.endpoint, "n", f"ipc://{path}", sampler=_fake_sampler())
    assert path.exists()
    daemon.close()
    assert not path.exists() and not path.parent.exists()


def test_refuses_to_take_over_a_live_daemon_socket(tmp_path: Path, collector: FakeCollector) -> None:
    endpoint = f"ipc://{tmp_path}/d.ipc"
    first = NodeDaemon(collector.endpoint, "n", endpoint, sampler=_fake_sampler())
    try:
        with pytest.raises(DaemonError, match="already listens"):
            NodeDaemon(collector.endpoint, "n", endpoint, sampler=_fake_sampler())
    finally:
        first.close()
    (tmp_path / "d.ipc").touch()  # a stale file left by a crash is not in the way
    NodeDaemon(collector.endpoint, "n", endpoint, sampler=_fake_sampler()).close()


def test_cli_daemon_stops_cleanly_on_sigterm(tmp_path: Path, collector: FakeCollector) -> None:
    path = tmp_path / "cli.ipc"
    proc = subprocess.Popen(
        [sys.executable, "-m", "agent.cli", "run", "--collector", collector.endpoint, "--node", "cli-node",
         "--local", f"ipc://{path}", "--interval", "0.05"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        collector.receive_until(lambda ms: any(isinstance(m, wire.NodeSample) for m in ms))
    finally:
        proc.send_signal(signal.SIGTERM)
        _, stderr = proc.communicate(timeout=DEADLINE_S)
    assert proc.returncode == 0, stderr
    assert stderr == ""
    assert not path.exists()

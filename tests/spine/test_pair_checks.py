"""Pair checks end to end on loopback: daemons find each other through the collector (or a cluster file),
check every ordered pair, and their CHECK records reach the store as link records of their own kind."""

from __future__ import annotations

import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import zmq

from agent import wire
from agent.daemon import CheckOptions, NodeDaemon
from agent.nodestats import NicCounters, NodeSampler
from watchtower.collector import Collector
from watchtower.ingest import Ingest

DEADLINE_S = 30.0
NOMINAL_BPS = 20e6
BUDGET = 0.2  # high, so the slots are short and the test quick (slot 0.13 s, period 0.4 s for 3 nodes)


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _sampler() -> NodeSampler:
    return NodeSampler(counters=lambda: {"eth0": NicCounters(0, 0)}, cpu_percent=lambda: 1.0,
                       memory_percent=lambda: 1.0)


def _run(daemons: list[NodeDaemon], collector: Collector, done) -> list[wire.CheckResults]:
    """Serve everything until ``done(results so far)`` or the deadline; returns the CHECK messages seen."""
    results: list[wire.CheckResults] = []
    collector.on_message = lambda _t, _f, m: results.append(m) if isinstance(m, wire.CheckResults) else None
    stop = threading.Event()
    threads = [threading.Thread(target=d.serve, args=(stop,)) for d in daemons]
    threads.append(threading.Thread(target=collector.run, args=(stop,)))
    for t in threads:
        t.start()
    try:
        deadline = time.monotonic() + DEADLINE_S
        while not done(list(results)):
            assert time.monotonic() < deadline, f"timed out with {len(results)} check messages"
            time.sleep(0.05)
    finally:
        stop.set()
        for t in threads:
            t.join(DEADLINE_S)
        for d in daemons:
            d.close()
        collector.close()
    return results


def _pairs(results: list[wire.CheckResults], names: dict[int, str]) -> set[tuple[str, str]]:
    return {(names[m.header.sender], m.peers[int(i)]) for m in results for i in m.results[wire.C_PEER]}


def _daemons(tmp_path: Path, collector: Collector, ctx: zmq.Context, nodes: list[str],
             endpoints: dict[str, str] | None = None) -> list[NodeDaemon]:
    out = []
    for node in nodes:
        port = int(endpoints[node].rpartition(":")[2]) if endpoints else 0
        options = CheckOptions(NOMINAL_BPS, BUDGET, "127.0.0.1", port, "127.0.0.1", dict(endpoints or {}))
        daemon = NodeDaemon(collector.bound, node, f"ipc://{tmp_path}/{node}.ipc", interval_s=0.2,
                            sampler=_sampler(), context=ctx, checks=options)
        daemon.checker._nic_bytes = lambda: 0  # the back-off is tested on its own; other tests share this host
        out.append(daemon)
    return out


def test_daemons_find_each_other_through_the_collector_and_check_every_pair(
        tmp_path: Path, endpoint: str, zmq_context: zmq.Context) -> None:
    nodes = ["c-a", "c-b", "c-c"]
    collector = Collector(endpoint, Ingest(), context=zmq_context)
    daemons = _daemons(tmp_path, collector, zmq_context, nodes)
    names = {d.sender: d.node for d in daemons}
    everything = {(a, b) for a in nodes for b in nodes if a != b}
    store = collector.ingest.store
    results = _run(daemons, collector, lambda rs: _pairs(rs, names) >= everything)
    assert _pairs(results, names) == everything
    for daemon in daemons:
        assert daemon.check_endpoint.startswith("127.0.0.1:")
    assert set(collector.check_directory.endpoints) == set(nodes)
    checks = store.checks()
    assert {(store.nodes[s].name, store.nodes[d].name) for s, d in zip(checks.src, checks.dst, strict=True)} \
        == everything
    assert set(np.unique(checks.nbytes).tolist()) == {1024, 256 * 1024}
    assert (checks.seconds > 0).all()
    assert checks.budget == BUDGET and checks.period_s > 0
    assert not store.ranks  # checks are not job traffic: no ranks, no transfers
    assert len(store.window().transfers) == 0


def test_a_cluster_file_listing_replaces_the_collector(tmp_path: Path, endpoint: str,
                                                       zmq_context: zmq.Context) -> None:
    nodes = ["f-a", "f-b"]
    listed = {node: f"127.0.0.1:{_free_port()}" for node in nodes}
    collector = Collector(endpoint, Ingest(), context=zmq_context)
    daemons = _daemons(tmp_path, collector, zmq_context, nodes, listed)
    names = {d.sender: d.node for d in daemons}
    results = _run(daemons, collector, lambda rs: len(_pairs(rs, names)) == 2)
    assert _pairs(results, names) == {("f-a", "f-b"), ("f-b", "f-a")}
    assert collector.check_directory.endpoints == {}  # nobody asked the collector


@pytest.mark.parametrize(("argv", "message"), [
    (["--check-budget", "0.01"], "need --pair-checks"),
    (["--pair-checks", "--check-budget", "2"], "must be a share"),
    (["--pair-checks", "--check-nominal", "-5"], "must be > 0"),
    (["--pair-checks", "--check-listen", "nohost"], "is not HOST:PORT"),
])
def test_bad_check_flags_are_one_line_usage_errors(tmp_path: Path, argv: list[str], message: str) -> None:
    done = subprocess.run([sys.executable, "-m", "agent.cli", "run", "--collector", "tcp://127.0.0.1:1",
                           "--local", f"ipc://{tmp_path}/d.ipc", *argv], capture_output=True, text=True,
                          timeout=60, check=False)
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and message in lines[0], done.stderr


def test_a_bad_cluster_file_is_a_one_line_usage_error(tmp_path: Path) -> None:
    bad = tmp_path / "cluster.toml"
    bad.write_text('[checks]\nbudget = 0.01\n[checks.endpoints]\nn0 = "no-port"\n')
    done = subprocess.run([sys.executable, "-m", "agent.cli", "run", "--collector", "tcp://127.0.0.1:1",
                           "--local", f"ipc://{tmp_path}/d.ipc", "--pair-checks", "--check-nominal", "1e9",
                           "--cluster", str(bad), "--node", "n0"], capture_output=True, text=True, timeout=60,
                          check=False)
    assert done.returncode == 2 and "is not \"HOST:PORT\"" in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1


def test_directory_answers_with_every_listener_and_the_pairs_to_favour() -> None:
    """The collector's answer: listeners sorted by node, a stamp that moves only on change, and the pair the
    job's own throughput suspects (a third of its peers' rate) weighted to be checked first."""
    from agent.checkplan import SUSPECT_WEIGHT
    from watchtower.checkdir import CheckDirectory

    ingest = Ingest()
    t0 = 10**18
    for rank, node in enumerate(["j0", "j1", "j2"]):
        ingest.feed(t0, wire.encode_schema(10 + rank, 0, t0, schema_id=1, rank=rank, world=3, node=node,
                                           layers=["halo"]))
    for step in range(4):
        for rank in range(3):  # each rank receives 1 MB from its left neighbour; j1's arrives 5× slower
            left = (rank - 1) % 3
            seconds_ns = 100_000_000 if left == 1 else 20_000_000
            table = np.array([[0], [int(wire.Op.RECV)], [left], [0], [1_000_000], [0], [seconds_ns], [0]], np.int64)
            ingest.feed(t0, wire.encode_step(10 + rank, 1 + step, t0, step=step, duration_ns=10**8, dropped_total=0,
                                             schema_id=1, layer_ns=np.array([[1], [1]], np.int64), exchanges=table))
    directory = CheckDirectory(ingest.store, sender=1)
    hello = wire.decode(wire.encode_check_hello(5, 0, 0, node="j2", endpoint="10.0.0.3:7100"))
    first = wire.decode(directory.answer(hello, 20 * 10**9, 0))
    assert first.peers == (("j2", "10.0.0.3:7100"),) and first.stamp_ns == 20 * 10**9
    assert first.weights == (("j1", "j2", SUSPECT_WEIGHT),)
    again = wire.decode(directory.answer(hello, 21 * 10**9, 1))
    assert again.stamp_ns == first.stamp_ns  # nothing changed: daemons keep planning alike
    other = wire.decode(wire.encode_check_hello(6, 0, 0, node="j0", endpoint="10.0.0.1:7100"))
    third = wire.decode(directory.answer(other, 22 * 10**9, 2))
    assert [p[0] for p in third.peers] == ["j0", "j2"] and third.stamp_ns == 22 * 10**9

"""The halo-ring workload: real ranks on loopback, checked through the frames their probes publish."""

from __future__ import annotations

import socket
import subprocess
import sys
import threading
import time
from collections import defaultdict

import numpy as np
import pytest
from agent_helpers import DEADLINE_S, FakeCollector

from agent import wire
from agent.probe import Probe
from agent.workload import (
    HALO,
    HALO_MAGIC,
    ConnectError,
    HaloRing,
    WorkloadConfig,
    WorkloadError,
    connect_ring,
    halo_sizes,
    neighbours,
    run_workload,
)

STEPS, LAYERS, EXCHANGE_BYTES = 3, 4, 40_000


def _listeners(world: int) -> tuple[list[socket.socket], tuple[tuple[str, int], ...]]:
    """Listening sockets on free loopback ports, bound before any rank starts (no port races)."""
    socks = [socket.create_server(("127.0.0.1", 0)) for _ in range(world)]
    return socks, tuple(s.getsockname()[:2] for s in socks)


def _run_ranks(world: int, collector: str | None, **overrides: object) -> list[list[list[bytes]]]:
    """Run every rank of a ring in its own thread; returns each rank's in-memory frames."""
    listeners, peers = _listeners(world)
    results: dict[int, list[list[bytes]]] = {}
    errors: list[BaseException] = []

    def rank_main(rank: int) -> None:
        config = WorkloadConfig(rank=rank, peers=peers, collector=collector, node=f"n{rank}", steps=STEPS,
                                layers=LAYERS, exchange_bytes=EXCHANGE_BYTES, compute_ms=0.5,
                                connect_timeout_s=DEADLINE_S, **overrides)
        try:
            results[rank] = run_workload(config, listener=listeners[rank]).frames
        except (WorkloadError, OSError) as exc:
            errors.append(exc)

    threads = [threading.Thread(target=rank_main, args=(r,)) for r in range(world)]
    for thread in reversed(threads):  # start order must not matter
        thread.start()
    for thread in threads:
        thread.join(DEADLINE_S * 2)
    assert not errors, errors
    assert not any(t.is_alive() for t in threads)
    return [results[r] for r in range(world)]


def test_neighbours_and_halo_sizes() -> None:
    assert neighbours(0, 1) == []
    assert (neighbours(0, 2), neighbours(1, 2)) == ([1], [0])
    assert neighbours(0, 5) == [1, 4]
    sizes = halo_sizes(8_000, 9, seed=3)
    assert sizes == halo_sizes(8_000, 9, seed=3)
    assert sorted(sizes) == [round(8_000 * f) for f in np.geomspace(1 / 8, 2, 9)]
    assert (min(sizes), max(sizes)) == (1_000, 16_000)
    assert sizes != sorted(sizes)  # shuffled, so size is not confounded with layer order


def test_three_ranks_publish_plausible_steps(collector: FakeCollector) -> None:
    _run_ranks(3, collector.endpoint)
    collector.receive_until(lambda ms: sum(isinstance(m, wire.Step) for m in ms) == 3 * STEPS)
    rank_of = {m.header.sender: m.rank for _, m in collector.messages if isinstance(m, wire.Schema)}
    steps: dict[int, list[wire.Step]] = defaultdict(list)
    for _, m in collector.messages:
        if isinstance(m, wire.Step):
            steps[rank_of[m.header.sender]].append(m)
    assert sorted(steps) == [0, 1, 2]
    sizes = np.array(halo_sizes(EXCHANGE_BYTES, LAYERS, 0))
    for rank, rank_steps in steps.items():
        assert [s.step for s in rank_steps] == list(range(STEPS))
        for step in rank_steps:
            ex = step.exchanges
            recv = ex[:, ex[wire.X_OP] == wire.Op.RECV]
            send = ex[:, ex[wire.X_OP] == wire.Op.SEND]
            # One RECV and one SEND per neighbour per layer, each one message of that layer's halo size.
            assert recv.shape[1] == send.shape[1] == 2 * LAYERS
            for table in (recv, send):
                assert sorted(set(table[wire.X_PEER].tolist())) == neighbours(rank, 3)
                np.testing.assert_array_equal(table[wire.X_NBYTES], sizes[table[wire.X_LAYER]])
            # RECV records are the bytes on the wire: they start when the bytes could move, so no wait is left
            assert (recv[wire.X_END] >= recv[wire.X_START]).all() and (recv[wire.X_WAIT] == 0).all()
            assert (send[wire.X_WAIT] == wire.UNKNOWN_WAIT).all()
            assert (step.layer_ns[0] > 0).all()
            # The two sends of a layer are in flight at the same time, as in a real halo exchange.
            for layer in range(LAYERS):
                a, b = send[:, send[wire.X_LAYER] == layer].T
                assert max(a[wire.X_START], b[wire.X_START]) < min(a[wire.X_END], b[wire.X_END])
            # A layer's exchange time is its whole halo phase, once: it spans both (overlapping) sends.
            for layer in range(LAYERS):
                mine = send[:, send[wire.X_LAYER] == layer]
                assert step.layer_ns[1, layer] >= mine[wire.X_END].max() - mine[wire.X_START].min()
            assert step.duration_ns >= step.layer_ns.sum()


def test_world_two_exchanges_once_with_the_single_neighbour() -> None:
    frames = _run_ranks(2, None)
    for rank, rank_frames in enumerate(frames):
        steps = [m for m in map(wire.decode, rank_frames) if isinstance(m, wire.Step)]
        assert len(steps) == STEPS
        for step in steps:
            assert step.exchanges.shape[1] == 2 * LAYERS  # one SEND and one RECV per layer
            assert set(step.exchanges[wire.X_PEER].tolist()) == {1 - rank}


def test_world_one_only_computes() -> None:
    (frames,) = _run_ranks(1, None)
    steps = [m for m in map(wire.decode, frames) if isinstance(m, wire.Step)]
    assert len(steps) == STEPS
    assert all(s.exchanges.shape[1] == 0 and (s.layer_ns[0] > 0).all() for s in steps)


def test_unreachable_neighbour_gives_up_after_the_timeout() -> None:
    blocker = socket.socket()  # bound but never listening: connections to it are refused
    blocker.bind(("127.0.0.1", 0))
    (listener,), (own,) = _listeners(1)
    with blocker, pytest.raises(ConnectError, match="cannot reach rank 1"):
        connect_ring(0, (own, blocker.getsockname()[:2]), timeout_s=0.2, listener=listener)


def test_neighbour_that_never_connects_gives_up_after_the_timeout() -> None:
    (listener,), (own,) = _listeners(1)
    with pytest.raises(ConnectError, match="rank 0 did not connect"):
        connect_ring(1, (("127.0.0.1", 9), own), timeout_s=0.2, listener=listener)


def _ring_over_socketpair() -> tuple[HaloRing, socket.socket, Probe]:
    mine, theirs = socket.socketpair()
    mine.setblocking(False)
    return HaloRing({1: mine}, capacity=64, idle_timeout_s=DEADLINE_S), theirs, Probe(0, 2, "n", None)


def test_neighbour_closing_mid_run_is_a_workload_error() -> None:
    ring, theirs, probe = _ring_over_socketpair()
    theirs.close()
    with pytest.raises(WorkloadError, match="rank 1"):
        ring.exchange(probe, 0, 0, "l", np.zeros(16, dtype=np.uint8))
    ring.close()


def test_halo_for_the_wrong_layer_is_a_workload_error() -> None:
    ring, theirs, probe = _ring_over_socketpair()
    with theirs:
        theirs.sendall(HALO.pack(HALO_MAGIC, 0, 5, 0, 0, 0))  # step 0 but layer 5
        with pytest.raises(WorkloadError, match="layer 5"):
            ring.exchange(probe, 0, 0, "l", np.zeros(16, dtype=np.uint8))
    ring.close()


def test_one_halo_phase_records_a_send_and_the_receive_as_it_was_on_the_wire() -> None:
    ring, theirs, probe = _ring_over_socketpair()
    with theirs:
        start_ns = time.time_ns()
        theirs.sendall(HALO.pack(HALO_MAGIC, 0, 0, start_ns, 3, 0) + b"abc")
        ring.exchange(probe, 0, 0, "l", np.arange(10, dtype=np.uint8))
        header = _read(theirs, HALO.size)
        magic, step, layer, _, nbytes, _ = HALO.unpack(header)
        assert (magic, step, layer, nbytes) == (HALO_MAGIC, 0, 0, 10)
        assert _read(theirs, 10) == bytes(range(10))
    ring.close()
    probe.end_step()
    step = wire.decode(probe.sent_frames[-1])
    assert isinstance(step, wire.Step)
    ops = dict(zip(step.exchanges[wire.X_OP].tolist(), step.exchanges.T.tolist(), strict=True))
    assert ops[wire.Op.SEND][wire.X_NBYTES] == 10 and ops[wire.Op.SEND][wire.X_WAIT] == wire.UNKNOWN_WAIT
    assert ops[wire.Op.RECV][wire.X_NBYTES] == 3
    recv, send = ops[wire.Op.RECV], ops[wire.Op.SEND]
    # the neighbour's bytes were on their way before this rank's halo phase began, and were in before it read
    assert recv[wire.X_START] < send[wire.X_START] and recv[wire.X_WAIT] == 0
    assert recv[wire.X_START] <= recv[wire.X_END] < send[wire.X_END] + 1_000_000


def _read(sock: socket.socket, size: int) -> bytes:
    sock.settimeout(DEADLINE_S)
    data = b""
    while len(data) < size:
        chunk = sock.recv(size - len(data))
        assert chunk, "the ring closed the link early"
        data += chunk
    return data


def test_cli_world_one_runs_to_completion(collector: FakeCollector) -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "agent.cli", "workload", "--rank", "0", "--peers", "127.0.0.1:9",
         "--collector", collector.endpoint, "--steps", "2", "--layers", "2", "--compute-ms", "0.2"],
        capture_output=True, text=True, timeout=DEADLINE_S)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "rank 0: 2 steps, 0 monitoring frames dropped"
    messages = collector.receive_until(lambda ms: sum(isinstance(m, wire.Step) for m in ms) == 2)
    schema = next(m for m in messages if isinstance(m, wire.Schema))
    assert (schema.rank, schema.world, schema.layers) == (0, 1, ("layer.00", "layer.01"))


def test_compute_ms_is_spent_per_layer_from_the_first_step_to_the_last() -> None:
    """``--compute-ms X`` means X ms of compute per layer in every step, as the probe measures it (±10 %,
    the issue's bar). Each step's shortest layer: the loop runs to a deadline on the clock, so being
    preempted by another process on a shared core can only lengthen a layer, and under load more than half
    of a step's layers were (medians of 4.2 ms for 3 ms), while its shortest layer stayed within 1 %. The
    first and last steps are checked on their own because a count of repetitions calibrated once drifted
    early in a run (0.6 ms measured for 5 ms)."""
    compute_ms, steps, layers = 3.0, 12, 6
    listeners, peers = _listeners(1)
    config = WorkloadConfig(rank=0, peers=peers, collector=None, node="n0", steps=steps, layers=layers,
                            exchange_bytes=EXCHANGE_BYTES, compute_ms=compute_ms, connect_timeout_s=DEADLINE_S)
    frames = run_workload(config, listener=listeners[0]).frames
    per_step = np.array([np.min(m.layer_ns[0]) for m in map(wire.decode, frames) if isinstance(m, wire.Step)])
    assert len(per_step) == steps
    expected_ns = compute_ms * 1e6
    assert per_step[0] == pytest.approx(expected_ns, rel=0.10)
    assert per_step[-1] == pytest.approx(expected_ns, rel=0.10)
    assert np.median(per_step) == pytest.approx(expected_ns, rel=0.10)

"""``workload --collective``: a job that only uses collectives (a numpy ring allreduce over TCP)."""

from __future__ import annotations

import socket
import threading

import numpy as np
import pytest
from agent_helpers import DEADLINE_S
from test_agent_workload import _listeners, _run_ranks

from agent import wire
from agent.workload import CHUNK, CHUNK_MAGIC, RingAllreduce, WorkloadError, connect_ring


def _allreduce_all(world: int, length: int, seed: int = 0) -> tuple[list[np.ndarray], np.ndarray]:
    """Every rank allreduces its own seeded vector; returns what each ended with and numpy's sum."""
    rng = np.random.default_rng(seed)
    inputs = [rng.standard_normal(length) for _ in range(world)]
    listeners, peers = _listeners(world)
    outputs: dict[int, np.ndarray] = {}
    errors: list[BaseException] = []

    def rank_main(rank: int) -> None:
        try:
            links = connect_ring(rank, peers, DEADLINE_S, listeners[rank])
            ring = RingAllreduce(links, rank, world, DEADLINE_S)
            vector = inputs[rank].copy()
            for step in range(2):  # twice over the same connections: chunks must not run into each other
                vector = inputs[rank].copy()
                ring.allreduce(vector, step)
            outputs[rank] = vector
            ring.close()
            for sock in links.values():
                sock.close()
        except (WorkloadError, OSError) as exc:
            errors.append(exc)

    threads = [threading.Thread(target=rank_main, args=(r,)) for r in range(world)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(DEADLINE_S * 2)
    assert not errors, errors
    return [outputs[r] for r in range(world)], np.sum(inputs, axis=0)


@pytest.mark.parametrize(("world", "length"), [(1, 10), (2, 1000), (3, 1001), (4, 65_536), (5, 7)])
def test_ring_allreduce_sums_like_numpy(world: int, length: int) -> None:
    outputs, expected = _allreduce_all(world, length)
    for out in outputs:
        np.testing.assert_allclose(out, expected, rtol=1e-12, atol=1e-12)


def test_collective_job_records_one_allreduce_per_step_and_no_point_to_point() -> None:
    ranks = _run_ranks(3, None, collective=True)
    for frames in ranks:
        steps = [m for m in map(wire.decode, frames) if isinstance(m, wire.Step)]
        assert len(steps) == 3
        for step in steps:
            ops = step.exchanges[wire.X_OP].tolist()
            assert ops == [int(wire.Op.ALLREDUCE)]
            assert step.exchanges[wire.X_GROUP].tolist() == [3]
            assert step.exchanges[wire.X_PEER].tolist() == [wire.NO_PEER]
            assert step.exchanges[wire.X_NBYTES].tolist() == [40_000]


def test_a_neighbour_out_of_step_is_a_workload_error() -> None:
    a, b = socket.socketpair()
    ring = RingAllreduce({1: a}, 0, 2, 2.0)
    a.setblocking(False)
    b.sendall(CHUNK.pack(CHUNK_MAGIC, 7, 40) + bytes(40))  # step 7, ring is at step 0
    with pytest.raises(WorkloadError, match="expected step 0"):
        ring.allreduce(np.zeros(10), 0)
    a.close()
    b.close()

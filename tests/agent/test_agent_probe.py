"""Probe timings with a ManualClock: exact sums, exchange records, the wait split, publishing and drops."""

from __future__ import annotations

import pytest
import zmq
from agent_helpers import DEADLINE_S, FakeCollector

from agent import wire
from agent.clock import ManualClock
from agent.probe import Probe
from agent.wire import Op


def _probe(clock: ManualClock, **kwargs: object) -> Probe:
    return Probe(0, 4, "node-a", None, clock=clock, wall_clock=clock, **kwargs)


def _messages(probe: Probe) -> list[wire.Message]:
    return [wire.decode(frames) for frames in probe.sent_frames]


def _steps(probe: Probe) -> list[wire.Step]:
    return [m for m in _messages(probe) if isinstance(m, wire.Step)]


def test_compute_sums_exact_nanoseconds_per_layer() -> None:
    clock = ManualClock(1_000)
    probe = _probe(clock, layers=["a", "b"])
    for ns in (100, 250):
        with probe.compute("a"):
            clock.advance(ns)
    with probe.compute("b"):
        clock.advance(7)
    clock.advance(3)  # time outside any region belongs to the step only
    probe.end_step()
    step = _steps(probe)[-1]
    assert step.layer_ns.tolist() == [[350, 7], [0, 0]]
    assert step.duration_ns == 360
    assert step.step == 0


def test_explicit_start_stop_matches_with_form() -> None:
    clock = ManualClock()
    probe = _probe(clock)
    probe.start_compute("x")
    clock.advance(42)
    probe.stop_compute("x")
    probe.end_step()
    assert _steps(probe)[-1].layer_ns[0].tolist() == [42]
    with pytest.raises(RuntimeError):
        probe.stop_compute("x")


def test_exchange_record_and_wait_split() -> None:
    clock = ManualClock(5_000)
    probe = _probe(clock, layers=["l0"])
    clock.advance(10)  # exchange starts 10 ns into the step
    ex = probe.exchange("l0", peer=2, nbytes=64, op=wire.Op.RECV)
    ex.peer_ready_at(clock() + 30)  # the peer started sending 30 ns later
    clock.advance(100)
    ex.stop(nbytes=4096)
    probe.end_step()
    step = _steps(probe)[-1]
    record = dict(zip(wire.EXCHANGE_COLUMNS, step.exchanges[:, 0].tolist(), strict=True))
    assert record == {"layer": 0, "op": int(wire.Op.RECV), "peer": 2, "group": 0, "nbytes": 4096,
                      "start_ns": 10, "end_ns": 110, "wait_ns": 30}
    assert step.layer_ns[1].tolist() == [100]


def test_wall_clock_ready_stamp_maps_onto_probe_clock() -> None:
    clock = ManualClock(10**9)
    wall = ManualClock(1_700_000_000 * 10**9)
    probe = Probe(0, 2, "n", None, clock=clock, wall_clock=wall)
    probe.end_step()  # the next step starts with both clocks read at the same instant
    step_wall = wall()
    clock.advance(20)
    wall.advance(20)
    ex = probe.exchange("l", peer=1, op=wire.Op.RECV)
    ex.peer_ready_at_wall(step_wall + 20 + 75)
    clock.advance(200)
    ex.stop()
    assert ex.wait_ns == 75


def test_wait_is_negative_when_the_peer_started_first_and_clamped_at_the_end() -> None:
    clock = ManualClock()
    probe = _probe(clock)
    early = probe.exchange("l", peer=1)
    early.peer_ready_at(clock() - 500)  # the peer started first: its transfer began 500 ns before ours
    late = probe.exchange("l", peer=2)
    late.peer_ready_at(clock() + 10_000)  # a stamp beyond the end cannot exceed the exchange
    clock.advance(80)
    early.stop()
    late.stop()
    assert (early.wait_ns, late.wait_ns) == (-500, 80)


def test_overlapping_exchanges_count_once_in_layer_time() -> None:
    clock = ManualClock()
    probe = _probe(clock, layers=["halo"])
    to_left = probe.exchange("halo", peer=3, nbytes=10, op=wire.Op.SEND)
    clock.advance(5)
    to_right = probe.exchange("halo", peer=1, nbytes=10, op=wire.Op.SEND)
    clock.advance(20)
    to_left.stop()  # [0, 25]
    clock.advance(10)
    to_right.stop()  # [5, 35]
    clock.advance(100)
    with probe.exchange("halo", peer=1):  # [135, 145], disjoint from the others
        clock.advance(10)
    probe.end_step()
    step = _steps(probe)[-1]
    assert step.layer_ns[1].tolist() == [35 + 10]
    durations = step.exchanges[wire.X_END] - step.exchanges[wire.X_START]
    assert durations.tolist() == [25, 30, 10]


def test_stop_inside_with_records_once_and_double_stop_raises() -> None:
    clock = ManualClock()
    probe = _probe(clock)
    with probe.exchange("l", peer=1) as ex:
        clock.advance(9)
        ex.stop(nbytes=123)
    with pytest.raises(RuntimeError):
        ex.stop()
    probe.end_step()
    step = _steps(probe)[-1]
    assert step.exchanges.shape[1] == 1
    assert step.exchanges[wire.X_NBYTES].tolist() == [123]
    assert step.layer_ns[1].tolist() == [9]


def test_collective_and_peer_validation() -> None:
    probe = _probe(ManualClock())
    with pytest.raises(ValueError):
        probe.exchange("l", peer=4)
    with pytest.raises(ValueError):
        probe.exchange("l", peer=1, op=wire.Op.ALLREDUCE)
    probe.exchange("l", op=wire.Op.ALLREDUCE, group=4, nbytes=8).stop()
    probe.end_step()
    record = _steps(probe)[-1].exchanges[:, 0]
    assert (record[wire.X_OP], record[wire.X_PEER], record[wire.X_GROUP]) == (wire.Op.ALLREDUCE, -1, 4)


def test_schema_announced_first_and_again_when_a_layer_appears() -> None:
    clock = ManualClock()
    probe = _probe(clock, layers=["a"])
    probe.end_step()
    probe.end_step()
    with probe.compute("b"):
        clock.advance(1)
    probe.end_step()
    kinds = [type(m).__name__ for m in _messages(probe)]
    assert kinds == ["Schema", "Step", "Step", "Schema", "Step"]
    schemas = [m for m in _messages(probe) if isinstance(m, wire.Schema)]
    assert [s.layers for s in schemas] == [("a",), ("a", "b")]
    assert schemas[1].schema_id > schemas[0].schema_id == _steps(probe)[0].schema_id
    assert _steps(probe)[-1].schema_id == schemas[1].schema_id
    seqs = [m.header.seq for m in _messages(probe)]
    assert seqs == list(range(len(seqs)))


def test_steps_reset_between_end_step_calls() -> None:
    clock = ManualClock()
    probe = _probe(clock)
    with probe.compute("a"):
        clock.advance(5)
    probe.exchange("a", peer=1).stop()
    probe.end_step()
    probe.end_step()
    last = _steps(probe)[-1]
    assert last.step == 1
    assert last.layer_ns.tolist() == [[0], [0]]
    assert last.exchanges.shape == (len(wire.EXCHANGE_COLUMNS), 0)


def test_full_queue_drops_and_counts_then_recovers(tmp_path, zmq_context: zmq.Context) -> None:
    endpoint = f"ipc://{tmp_path}/nobody-yet.ipc"  # nobody binds it until the end: the queue fills
    clock = ManualClock()
    probe = Probe(1, 2, "n", endpoint, clock=clock, queue_frames=4, context=zmq_context)
    results = [probe.end_step() for _ in range(10)]
    # The queue holds 4 frames: ping, schema and two steps. The third step is dropped; from then on
    # every step also re-announces the schema, which is dropped too. All counted, all numbered.
    assert results == [True, True] + [False] * 8
    assert (probe.dropped, probe.seq) == (1 + 7 * 2, 4 + 1 + 7 * 2)

    collector = FakeCollector(zmq_context, endpoint)
    queued = collector.receive_until(lambda ms: len(ms) == 4)
    assert [type(m).__name__ for m in queued] == ["ClockPing", "Schema", "Step", "Step"]
    assert probe._socket.poll(int(DEADLINE_S * 1000), zmq.POLLOUT), "the queue never drained"
    # Room again: the next step goes out after a fresh schema and carries the running drop count.
    assert probe.end_step() is True
    messages = collector.receive_until(lambda ms: len(ms) == 6)
    schema, step = messages[4:]
    assert isinstance(schema, wire.Schema) and isinstance(step, wire.Step)
    assert step.dropped_total == probe.dropped == 15
    # Sequence numbers are exact: the gap in them is precisely the frames that were dropped.
    assert [m.header.seq for m in messages] == [0, 1, 2, 3, 19, 20]
    probe.close()


def test_record_transfer_keeps_the_transfer_and_charges_only_the_exposed_part() -> None:
    clock = ManualClock()
    probe = Probe(0, 2, "n", None, clock=clock)
    clock.advance(1_000)
    probe.record_transfer("sync", op=Op.ALLREDUCE, group=2, nbytes=4096, start_ns=200, end_ns=900, exposed_ns=150)
    probe.record_transfer("halo", op=Op.RECV, peer=1, nbytes=64, start_ns=100, end_ns=600, peer_ready_ns=50)
    probe.end_step()
    step = wire.decode(probe.sent_frames[-1])
    assert isinstance(step, wire.Step)
    assert step.layer_ns[1].tolist() == [150, 0]  # hidden time costs nothing
    table = step.exchanges
    assert table[wire.X_START].tolist() == [200, 100] and table[wire.X_END].tolist() == [900, 600]
    assert table[wire.X_WAIT].tolist() == [wire.UNKNOWN_WAIT, -50]  # the peer was ready 50 ns before
    with pytest.raises(ValueError):
        probe.record_transfer("halo", op=Op.RECV, peer=5, nbytes=1, start_ns=0, end_ns=1)


@pytest.mark.parametrize(("node", "layer"), [("n" * 300, "ok"), ("ok", "\ud800"), ("ok", "l" * 257)])
def test_names_the_wire_cannot_carry_are_refused_at_once(node: str, layer: str) -> None:
    with pytest.raises(ValueError):
        probe = Probe(0, 1, node, None, clock=ManualClock())
        probe.compute(layer)

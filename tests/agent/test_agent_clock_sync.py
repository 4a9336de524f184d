"""The probe's clock offset: the NTP estimate (RFC 5905) from a pong read at the next region's start, not a
whole step later, and of several samples the one of least delay (NTP's clock filter, RFC 5905 §10)."""

from __future__ import annotations

import zmq
from agent_helpers import DEADLINE_S, FakeCollector

from agent import wire
from agent.clock import ManualClock
from agent.probe import Probe

MS = 1_000_000


def _pings(collector: FakeCollector, probe: Probe, n: int) -> list[tuple[list[bytes], wire.ClockPing]]:
    collector.receive_until(lambda ms: sum(isinstance(m, wire.ClockPing) and m.header.sender == probe.sender
                                           for m in ms) >= n)
    return [(env, m) for env, m in collector.messages if isinstance(m, wire.ClockPing)][:n]


def _answer(collector: FakeCollector, probe: Probe, envelope: list[bytes], t1: int, t2: int) -> None:
    collector.reply(envelope, wire.encode_pong(0, 0, probe._ping_t0, t1, t2))
    assert probe._socket.poll(int(DEADLINE_S * 1000)), "no pong came back"


def test_the_pong_is_read_at_the_next_region_and_the_least_delay_sample_wins(
        collector: FakeCollector, zmq_context: zmq.Context) -> None:
    wall = ManualClock(10_000 * MS)
    probe = Probe(0, 1, "n0", collector.endpoint, layers=["l"], clock=ManualClock(), wall_clock=wall,
                  context=zmq_context)
    probe.end_step()  # the first ping, at t0 = 10 000 ms on the probe's wall clock
    (envelope, ping), = _pings(collector, probe, 1)
    assert ping.t0 == 10_000 * MS
    # The collector's clock runs 500 ms ahead; it stamps the ping 1 ms after it left (t1) and answers at once.
    _answer(collector, probe, envelope, ping.t0 + 501 * MS, ping.t0 + 501 * MS)
    wall.advance(2 * MS)
    with probe.compute("l"):  # the pong is read here, at t3 = t0 + 2 ms, not at the end of the step
        wall.advance(300 * MS)  # a long layer: read at the step's end, the delay would be 302 ms
    # offset = ((t1 − t0) + (t2 − t3)) / 2 = (501 + 499) / 2 = 500 ms; delay = (t3 − t0) − (t2 − t1) = 2 ms.
    assert probe.offset_ns == 500 * MS
    offset = collector.receive_until(lambda ms: any(isinstance(m, wire.ClockOffset) for m in ms))
    reported = next(m for m in offset if isinstance(m, wire.ClockOffset))
    assert (reported.offset_ns, reported.round_trip_ns) == (500 * MS, 2 * MS)

    probe.end_step()  # the filter is not full: another ping at once
    (_, _), (envelope, ping) = _pings(collector, probe, 2)
    # This one is read 40 ms late and the collector stamped it 30 ms after it left: delay 40 ms, estimate
    # (530 + (530 − 40)) / 2 = 510 ms. The 2 ms sample stays: its error bound (1 ms) is the tighter.
    _answer(collector, probe, envelope, ping.t0 + 530 * MS, ping.t0 + 530 * MS)
    wall.advance(40 * MS)
    with probe.blocked("l"):
        pass
    assert probe.offset_ns == 500 * MS
    reports = [m for m in collector.receive_until(lambda ms: sum(isinstance(m, wire.ClockOffset) for m in ms) == 2)
               if isinstance(m, wire.ClockOffset)]
    assert [(m.offset_ns, m.round_trip_ns) for m in reports] == [(500 * MS, 2 * MS)] * 2
    probe.close()


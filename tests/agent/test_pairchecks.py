"""Pair checks: the schedule (pure), the byte budget, the TCP protocol on loopback, and the wire records."""

from __future__ import annotations

import socket
import time
from collections import Counter

import numpy as np
import pytest
from scipy import stats

from agent import wire
from agent.checkplan import (
    SUSPECT_WEIGHT,
    WeightBook,
    assignment,
    check_sizes,
    period_seconds,
    plan_cycle,
    rotation,
    rounds_per_cycle,
    slot_seconds,
)
from agent.pairchecks import REQUEST, REQUEST_MAGIC, CheckClient, CheckConfig, CheckListener, PairChecker

NODE_COUNTS = (2, 3, 4, 5, 6, 7, 8, 9, 16)


def _names(n: int) -> list[str]:
    return [f"n{i:02d}" for i in range(n)]


def _slot_pairs(nodes: list[str], slot: int, weights: dict | None = None) -> list[tuple[str, str]]:
    """Every node's own view of the slot, as each daemon computes it independently."""
    pairs = []
    for me in nodes:
        job = assignment(list(reversed(nodes)), me, slot, weights)  # any order of the names must agree
        assert job is not None
        pairs.append((me, job.target))
    return pairs


@pytest.mark.parametrize("n", NODE_COUNTS)
def test_no_port_carries_two_checks_at_once(n: int) -> None:
    nodes = _names(n)
    for weights in (None, {(nodes[0], nodes[-1]): 9.0, (nodes[-1], nodes[0]): 2.0}):
        for slot in range(3 * rounds_per_cycle(n)):
            pairs = _slot_pairs(nodes, slot, weights)
            outs = Counter(src for src, _ in pairs)
            ins = Counter(dst for _, dst in pairs)
            assert max(outs.values()) == 1 and max(ins.values()) == 1, (slot, pairs)
            assert all(src != dst for src, dst in pairs)
            for me in nodes:  # the node a daemon expects to hear from is the one that checks it
                job = assignment(nodes, me, slot, weights)
                assert (job.source, me) in pairs


@pytest.mark.parametrize("n", NODE_COUNTS)
def test_every_ordered_pair_is_checked_within_one_period(n: int) -> None:
    nodes = _names(n)
    per_cycle = rounds_per_cycle(n)
    everything = {(a, b) for a in nodes for b in nodes if a != b}
    for weights in (None, {(nodes[1], nodes[0]): SUSPECT_WEIGHT * 2}):
        for first in (0, 1, per_cycle - 1, 5 * per_cycle + 2):  # any window of one period, aligned or not
            seen = {p for slot in range(first, first + per_cycle) for p in _slot_pairs(nodes, slot, weights)}
            assert seen == everything
    assert period_seconds(n, 2.0) == pytest.approx(2.0 * per_cycle)


def test_rotations_cover_the_pairs_exactly_once() -> None:
    n = 6
    pairs = [p for r in range(1, n) for p in rotation(n, r)]
    assert len(pairs) == len(set(pairs)) == n * (n - 1)
    with pytest.raises(ValueError):
        rotation(n, 0)


def test_suspected_link_is_checked_first() -> None:
    nodes = _names(6)
    suspect = (nodes[4], nodes[1])  # rotation (1 - 4) mod 6 = 3
    plan = plan_cycle(nodes, {suspect: SUSPECT_WEIGHT})
    assert plan[0] == 3
    assert assignment(nodes, nodes[4], 0, {suspect: SUSPECT_WEIGHT}).target == nodes[1]
    assert plan_cycle(nodes)[: len(nodes) - 1] == list(range(1, len(nodes)))


def test_uncertain_pairs_are_checked_more_often() -> None:
    nodes = _names(7)
    uncertain = (nodes[2], nodes[5])
    counts = Counter(p for slot in range(rounds_per_cycle(7)) for p in _slot_pairs(nodes, slot, {uncertain: 2.5}))
    others = [c for p, c in counts.items() if p != uncertain]
    assert counts[uncertain] > max(others) - 1 and counts[uncertain] >= 2
    assert counts[uncertain] > np.median(others)


@pytest.mark.parametrize("nominal_Bps", [5e6, 50e6, 1.25e9, 12.5e9, 50e9])
@pytest.mark.parametrize("budget", [0.001, 0.01, 0.05])
def test_checks_stay_within_their_budget(nominal_Bps: float, budget: float) -> None:
    """Simulate a cycle's slots: each node sends its slot's bytes once per slot; its average rate over the
    period is the budget's share of nominal, never more."""
    n = 5
    sizes = check_sizes(nominal_Bps)
    slot_s = slot_seconds(sizes, nominal_Bps, budget)
    sent = Counter()
    for slot in range(rounds_per_cycle(n)):
        for src, _ in _slot_pairs(_names(n), slot):
            sent[src] += sizes.repeats * (sizes.small + sizes.large)
    period = period_seconds(n, slot_s)
    assert max(sent.values()) / period <= budget * nominal_Bps * (1 + 1e-12)
    with pytest.raises(ValueError):
        slot_seconds(sizes, nominal_Bps, 0.0)


@pytest.mark.parametrize("nominal_Bps", [5e6, 50e6, 1.25e9, 12.5e9])
@pytest.mark.parametrize("alpha_s", [5e-6, 50e-6, 500e-6])
def test_sizes_make_alpha_and_beta_identifiable(nominal_Bps: float, alpha_s: float) -> None:
    """Hockney (1994): t(n) = α + n/β. With times from the model plus 2 % noise at the two sizes, a least-
    squares line (scipy.stats.linregress) recovers β within 10 % and α within a few α: the small message is
    latency-dominated, the large one bandwidth-dominated."""
    sizes = check_sizes(nominal_Bps)
    rng = np.random.default_rng(7)
    n = np.repeat([sizes.small, sizes.large], 20).astype(float)
    t = (alpha_s + n / nominal_Bps) * rng.normal(1.0, 0.02, len(n))
    fit = stats.linregress(n, t)
    assert 1 / fit.slope == pytest.approx(nominal_Bps, rel=0.10)
    assert sizes.large / nominal_Bps >= 4 * min(alpha_s, 50e-6)  # large: n/β dominates typical latencies
    assert sizes.small / nominal_Bps < alpha_s or nominal_Bps < 1e8  # small: α dominates on real fabrics
    assert abs(fit.intercept - alpha_s) < max(3 * alpha_s, 0.05 * sizes.large / nominal_Bps)


def test_weight_book_plans_a_cycle_with_what_held_before_it() -> None:
    book = WeightBook(margin_s=2.0)
    assert book.for_cycle(10**12) == ((), {})
    book.add(1_000_000_000, ["b", "a"], {})
    book.add(5_000_000_000, ["a", "b", "c"], {("a", "c"): 3.0})
    assert book.for_cycle(4_000_000_000) == (("a", "b"), {})
    assert book.for_cycle(7_000_000_000) == (("a", "b", "c"), {("a", "c"): 3.0})


# ------------------------------------------------------------------------------------ protocol on loopback

def test_listener_acknowledges_and_the_client_times_it() -> None:
    listener = CheckListener("127.0.0.1", 0)
    client = CheckClient()
    try:
        endpoint = f"127.0.0.1:{listener.port}"
        times = [client.measure(endpoint, size) for size in (1024, 1 << 20, 1024)]
        assert all(t is not None and t > 0 for t in times)
        assert client.bytes_moved == 1024 + (1 << 20) + 1024
        deadline = time.monotonic() + 5
        while listener.bytes_moved < client.bytes_moved and time.monotonic() < deadline:
            time.sleep(0.01)
        assert listener.bytes_moved == client.bytes_moved
    finally:
        client.close()
        listener.close()


def test_listener_closes_a_connection_that_breaks_the_protocol() -> None:
    listener = CheckListener("127.0.0.1", 0)
    try:
        for request in (b"nonsense-16bytes", REQUEST.pack(REQUEST_MAGIC, 1, 1 << 40)):
            with socket.create_connection(("127.0.0.1", listener.port), timeout=5) as conn:
                conn.sendall(request)
                assert conn.recv(16) == b""  # closed, no reply, nothing allocated for 1 TiB
        client = CheckClient()  # still serving others
        assert client.measure(f"127.0.0.1:{listener.port}", 4096) is not None
        client.close()
    finally:
        listener.close()


def test_a_missing_peer_fails_the_check_without_raising() -> None:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]  # bound, not listening: connection refused
        client = CheckClient()
        assert client.measure(f"127.0.0.1:{port}", 1024) is None


def test_checker_runs_its_slot_and_backs_off_while_the_job_is_busy() -> None:
    listener = CheckListener("127.0.0.1", 0)
    sizes = check_sizes(50e6)
    busy = {"on": False, "bytes": 0}

    def nic_bytes() -> int:  # job traffic: 1 MB per call while busy (far above 5 % of 50 MB/s over 20 ms)
        busy["bytes"] += 1_000_000 if busy["on"] else 0
        return busy["bytes"]

    book = WeightBook(margin_s=0.0)
    book.add(0, ["a", "b"], {})
    config = CheckConfig("a", sizes, slot_seconds(sizes, 50e6, 0.01), 0.01, 50e6)
    base = time.time_ns()  # slot 0 starts now: the whole slot is ahead of the checker
    checker = PairChecker(config, book, listener, nic_bytes=nic_bytes, clock_ns=lambda: time.time_ns() - base)
    checker.endpoints = {"b": f"127.0.0.1:{listener.port}"}
    slot_ns = int(config.slot_s * 1e9)
    try:
        assert checker.run_slot(0, slot_ns) == 2 * sizes.repeats
        peers, table = checker.drain()
        assert peers == ("b",) and table.shape == (4, 2 * sizes.repeats)
        assert sorted(set(table[wire.C_NBYTES].tolist())) == [sizes.small, sizes.large]
        busy["on"] = True
        assert checker.run_slot(1, slot_ns) == 0
        assert checker.deferred == 1
        assert checker.drain()[1].shape == (4, 0)
    finally:
        checker.stop()
        listener.close()


# ------------------------------------------------------------------------------------ wire records

def test_check_records_round_trip_through_the_wire() -> None:
    table = np.array([[0, 1, 1], [1024, 262144, 1024], [10, 20, 30], [5000, 60000, 5100]], np.int64)
    message = wire.decode(wire.encode_checks(7, 3, 99, period_s=6.5, budget=0.01, deferred_total=2,
                                             peers=("n1", "n2"), results=table))
    assert isinstance(message, wire.CheckResults)
    assert message.peers == ("n1", "n2") and message.period_s == 6.5 and message.deferred_total == 2
    np.testing.assert_array_equal(message.results, table)
    hello = wire.decode(wire.encode_check_hello(7, 4, 99, node="n0", endpoint="10.0.0.1:7100"))
    assert isinstance(hello, wire.CheckHello) and hello.endpoint == "10.0.0.1:7100"
    peers = wire.decode(wire.encode_check_peers(1, 0, 5, peers=[("n0", "10.0.0.1:7100")],
                                                weights=[("n0", "n1", 2.0)], stamp_ns=5))
    assert isinstance(peers, wire.CheckPeers) and peers.weights == (("n0", "n1", 2.0),)


@pytest.mark.parametrize(("mutate", "reason"), [
    (lambda f: [wire.HEADER.pack(wire.MAGIC, 1, wire.Kind.CHECK, 7, 3, 99, wire.MAX_CHECK_RESULTS + 1, len(f[2])),
                *f[1:]], "oversize"),
    (lambda f: [f[0], wire.CHECK_META.pack(0.0, 0.01, 0, 0), *f[2:]], "bad-check"),
    (lambda f: [f[0], wire.CHECK_META.pack(1.0, 1.5, 0, 0), *f[2:]], "bad-check"),
    (lambda f: [*f[:3], np.array([[5], [1024], [0], [10]], np.int64).tobytes()], "bad-check"),
    (lambda f: [*f[:3], np.array([[0], [0], [0], [10]], np.int64).tobytes()], "bad-check"),
    (lambda f: [*f[:3], f[3][:-8]], "bad-length"),
    (lambda f: f[:3], "bad-part-count"),
])
def test_bad_check_records_are_rejected_with_a_reason(mutate, reason: str) -> None:
    frames = wire.encode_checks(7, 3, 99, period_s=1.0, budget=0.01, deferred_total=0, peers=("n1",),
                                results=np.array([[0], [1024], [0], [10]], np.int64))
    with pytest.raises(wire.WireError) as caught:
        wire.decode(mutate(frames))
    assert caught.value.reason == reason


@pytest.mark.parametrize("endpoint", ["nohost", "h:0", "h:70000", ":80", "h:x", "a" * 300 + ":1"])
def test_bad_check_endpoints_are_rejected(endpoint: str) -> None:
    with pytest.raises(wire.WireError) as caught:
        wire.decode(wire.encode_check_hello(1, 0, 0, node="n0", endpoint=endpoint))
    assert caught.value.reason == "bad-check"


def test_a_slots_first_check_waits_for_the_jobs_exchange_to_end() -> None:
    """The job is busy for the first 0.2 s of the slot, then computes: the first message goes within
    JUST_ENDED_S of the end of the job's traffic, not while it is in flight."""
    from agent.pairchecks import JUST_ENDED_S

    listener = CheckListener("127.0.0.1", 0)
    sizes = check_sizes(50e6)
    busy_until = time.monotonic() + 0.2
    total = {"bytes": 0}

    def nic_bytes() -> int:
        total["bytes"] += 1_000_000 if time.monotonic() < busy_until else 0
        return total["bytes"]

    book = WeightBook(margin_s=0.0)
    book.add(0, ["a", "b"], {})
    config = CheckConfig("a", sizes, 5.0, 0.01, 50e6)
    base = time.time_ns()
    checker = PairChecker(config, book, listener, nic_bytes=nic_bytes, clock_ns=lambda: time.time_ns() - base)
    checker.endpoints = {"b": f"127.0.0.1:{listener.port}"}
    slot_ns = int(config.slot_s * 1e9)
    try:
        assert checker.run_slot(0, slot_ns) == 2 * sizes.repeats
        _, table = checker.drain()
        first_ns = int(table[wire.C_START].min())
        ended_ns = time.time_ns() - base - int((time.monotonic() - busy_until) * 1e9)
        assert 0 <= first_ns - ended_ns <= (JUST_ENDED_S + 0.05) * 1e9
    finally:
        checker.stop()
        listener.close()

"""Pair checks on the head side: a collective-only job's links and ports come from the daemons' checks and
are judged by the same rules as job traffic; check weights; degradation alerts on checked links.

Ground truth: checks are generated from the Hockney model t(n) = α + n/β (Hockney, 1994) with known α and
β per port, seeded noise and one-sided delays (the job's bursts); the fit must recover the slow port's β.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from agent import wire
from watchtower.analysis.checks import SUSPECT_WEIGHT, Checks, check_weights, fit_checks
from watchtower.cluster import Cluster
from watchtower.ingest import Ingest
from watchtower.snapshot import build_snapshot

NODES = ("p0", "p1", "p2", "p3")
FAST_BPS, SLOW_BPS, ALPHA_S = 50e6, 5e6, 150e-6
SLOW_NODE = 1  # its way out is slow
SIZES = (1024, 262_144)


def _rate(src: int, dst: int) -> float:
    return SLOW_BPS if src == SLOW_NODE else FAST_BPS


def _check_table(rng: np.random.Generator, src: int, rounds: int, slow_from: int | None = None,
                 dst_slow: tuple[int, int] | None = None) -> tuple[tuple[str, ...], np.ndarray]:
    """One daemon's results to every peer: ``rounds`` × (small, large) each, t = α + n/β, 2 % noise, and one
    message in five delayed by up to 50 % (met the job's traffic)."""
    peers = tuple(n for i, n in enumerate(NODES) if i != src)
    rows = []
    for k, peer in enumerate(peers):
        dst = NODES.index(peer)
        for _ in range(rounds):
            for n in SIZES:
                beta = _rate(src, dst)
                if dst_slow is not None and (src, dst) == dst_slow:
                    beta /= 2
                t = (ALPHA_S + n / beta) * rng.normal(1.0, 0.02)
                if rng.random() < 0.2:
                    t *= 1 + 0.5 * rng.random()
                rows.append((k, n, 0, int(t * 1e9)))
    return peers, np.array(rows, np.int64).T.copy()


def _daemon_frames(node: int, sender: int) -> list[bytes]:
    return wire.encode_schema(sender, 0, 0, schema_id=1, rank=-1, world=1, node=NODES[node], layers=())


def _collective_job(ingest: Ingest, steps: int, t0: int = 10**18) -> None:
    """A job of one rank per node that only allreduces (no point-to-point record at all)."""
    for rank, node in enumerate(NODES):
        ingest.feed(t0, wire.encode_schema(100 + rank, 0, t0, schema_id=1, rank=rank, world=len(NODES),
                                           node=node, layers=["fwd", "grad.allreduce"]))
    for step in range(steps):
        for rank in range(len(NODES)):
            table = np.array([[1], [int(wire.Op.ALLREDUCE)], [wire.NO_PEER], [len(NODES)], [1 << 20],
                              [5_000_000], [30_000_000], [wire.UNKNOWN_WAIT]], np.int64)
            ingest.feed(t0 + step, wire.encode_step(
                100 + rank, step + 1, t0 + step * 40_000_000, step=step, duration_ns=40_000_000, dropped_total=0,
                schema_id=1, layer_ns=np.array([[5_000_000, 0], [0, 25_000_000]], np.int64), exchanges=table))


def _feed_checks(ingest: Ingest, rng: np.random.Generator, rounds: int = 8, seq: int = 1) -> None:
    for node in range(len(NODES)):
        peers, table = _check_table(rng, node, rounds)
        ingest.feed(10**18, wire.encode_checks(200 + node, seq, 0, period_s=6.0, budget=0.01, deferred_total=3,
                                               peers=peers, results=table))


@pytest.fixture
def snapshot() -> dict:
    ingest = Ingest()
    for node in range(len(NODES)):
        ingest.feed(10**18, _daemon_frames(node, 200 + node))
    _collective_job(ingest, steps=30)
    _feed_checks(ingest, np.random.default_rng(3))
    return build_snapshot(ingest, Cluster.default(), source={"kind": "test", "where": ""})


def test_a_collective_only_job_gets_its_links_from_the_checks(snapshot: dict) -> None:
    links = {(lk["src"], lk["dst"]): lk for lk in snapshot["links"]}
    assert set(links) == {(a, b) for a in NODES for b in NODES if a != b}
    assert {lk["measured_by"] for lk in links.values()} == {"check"}
    assert {lk["check_every_s"] for lk in links.values()} == {6.0}
    assert all(lk["hours_at_stake"] is None and lk["of_nominal"] is None for lk in links.values())
    slow = {pair for pair, lk in links.items() if lk["slow"]}
    assert slow == {(NODES[SLOW_NODE], b) for b in NODES if b != NODES[SLOW_NODE]}
    assert snapshot["checks"] == {"results": 4 * 3 * 8 * 2, "period_s": 6.0, "budget": 0.01, "deferred": 12}


def test_the_checks_name_the_slow_port_at_its_rate_and_no_other(snapshot: dict) -> None:
    slow_ports = [p for p in snapshot["ports"] if p["slow"]]
    assert [(p["node"], p["direction"]) for p in slow_ports] == [(NODES[SLOW_NODE], "out")]
    assert slow_ports[0]["capacity_Bps"] == pytest.approx(SLOW_BPS, rel=0.05)
    for lk in snapshot["links"]:
        if lk["slow"]:
            assert lk["port"] == f"{NODES[SLOW_NODE]} out"
            assert lk["latency_s"] == pytest.approx(ALPHA_S, rel=0.5)


def test_check_fit_agrees_with_scipy_least_squares_on_clean_points() -> None:
    """Without delays the lower-quartile fit and scipy.stats.linregress through all points agree on β."""
    rng = np.random.default_rng(11)
    n = np.tile(np.array(SIZES, np.int64), 20)
    t = (ALPHA_S + n / SLOW_BPS) * rng.normal(1.0, 0.005, len(n))
    checks = Checks(np.zeros(len(n), np.int32), np.ones(len(n), np.int32), n, t, np.zeros(len(n), np.int64))
    fit = fit_checks(checks, 2)
    reference = stats.linregress(n, t)
    assert fit.fit.beta_Bps[0] == pytest.approx(1 / reference.slope, rel=0.02)


def test_job_transfers_take_precedence_over_checks_on_the_pairs_they_cover() -> None:
    ingest = Ingest()
    for node in range(len(NODES)):
        ingest.feed(10**18, _daemon_frames(node, 200 + node))
    t0 = 10**18
    for rank, node in enumerate(NODES[:2]):
        ingest.feed(t0, wire.encode_schema(300 + rank, 0, t0, schema_id=1, rank=rank, world=2, node=node,
                                           layers=["halo"]))
    for step in range(10):
        for size in SIZES:
            table = np.array([[0], [int(wire.Op.RECV)], [0], [0], [size], [0],
                              [int((ALPHA_S + size / FAST_BPS) * 1e9)], [0]], np.int64)
            ingest.feed(t0, wire.encode_step(301, 1 + step * 2 + (size > 1024), t0, step=step, duration_ns=10**7,
                                             dropped_total=0, schema_id=1,
                                             layer_ns=np.array([[1], [1]], np.int64), exchanges=table))
    _feed_checks(ingest, np.random.default_rng(5))
    snapshot = build_snapshot(ingest, Cluster.default(), source={"kind": "test", "where": ""})
    by = {(lk["src"], lk["dst"]): lk["measured_by"] for lk in snapshot["links"]}
    assert by.pop((NODES[0], NODES[1])) == "job"
    assert set(by.values()) == {"check"} and len(by) == 11


def test_weights_favour_uncertain_and_suspected_pairs() -> None:
    rng = np.random.default_rng(9)
    src, dst, nbytes, secs = [], [], [], []
    for s in range(4):
        for d in range(4):
            if s == d:
                continue
            for _ in range(8):
                for n in SIZES:
                    beta = SLOW_BPS if (s, d) == (1, 2) else FAST_BPS
                    noise = rng.uniform(0.5, 1.5) if (s, d) == (3, 0) else rng.normal(1.0, 0.01)
                    src.append(s), dst.append(d), nbytes.append(n), secs.append((ALPHA_S + n / beta) * noise)
    checks = Checks(np.array(src, np.int32), np.array(dst, np.int32), np.array(nbytes), np.array(secs),
                    np.zeros(len(src), np.int64))
    weights = {(a, b): w for a, b, w in check_weights(checks, NODES, suspects=frozenset({("p2", "p3")}))}
    assert weights.pop(("p1", "p2")) == SUSPECT_WEIGHT  # far below its peers
    assert weights.pop(("p2", "p3")) == SUSPECT_WEIGHT  # the job's own figures suspect it
    assert 1.0 < weights.pop(("p3", "p0")) <= 3.0  # rates spread widely: uncertain
    assert weights == {}  # steady pairs are not favoured


def test_a_checked_link_that_slows_down_raises_an_alert() -> None:
    """Checks arriving step by step; p2→p3 halves from step 120, and the job's ring allreduce, which waits for
    its slowest hop, slows with it: an alert on that link, begun near 120 (a link's fall that costs the job
    nothing raises no alert; see test_cusum)."""
    ingest = Ingest()
    for node in range(len(NODES)):
        ingest.feed(10**18, _daemon_frames(node, 200 + node))
    rng = np.random.default_rng(4)
    _collective_job(ingest, steps=1)
    seq = 1
    for step in range(1, 240):
        jitter = int(rng.normal(0, 1_000_000))  # 1 ms of noise on a 25 ms allreduce
        _collective_job_step(ingest, step, allreduce_ns=(50_000_000 if step >= 120 else 25_000_000) + jitter)
        for node in range(len(NODES)):
            peers, table = _check_table(rng, node, 1, dst_slow=(2, 3) if step >= 120 else None)
            ingest.feed(10**18, wire.encode_checks(200 + node, seq, 0, period_s=6.0, budget=0.01, deferred_total=0,
                                                   peers=peers, results=table))
        seq += 1
    snapshot = build_snapshot(ingest, Cluster.default(), source={"kind": "test", "where": ""})
    alerts = [a for a in snapshot["alerts"] if a["kind"] == "link-throughput"]
    assert [a["subject"] for a in alerts] == ["p2→p3"], alerts
    assert 100 <= alerts[0]["step_began"] <= 130


def _collective_job_step(ingest: Ingest, step: int, t0: int = 10**18, allreduce_ns: int = 25_000_000) -> None:
    """One step of the allreduce-only job; ``allreduce_ns`` is the exposed allreduce (the step is 15 ms more)."""
    for rank in range(len(NODES)):
        table = np.array([[1], [int(wire.Op.ALLREDUCE)], [wire.NO_PEER], [len(NODES)], [1 << 20],
                          [5_000_000], [5_000_000 + allreduce_ns], [wire.UNKNOWN_WAIT]], np.int64)
        ingest.feed(t0 + step, wire.encode_step(
            100 + rank, step + 1, t0 + step * 40_000_000, step=step, duration_ns=15_000_000 + allreduce_ns,
            dropped_total=0, schema_id=1, layer_ns=np.array([[5_000_000, 0], [0, allreduce_ns]], np.int64),
            exchanges=table))


def test_checks_from_an_unknown_daemon_are_rejected_and_counted() -> None:
    ingest = Ingest()
    peers, table = _check_table(np.random.default_rng(1), 0, 1)
    assert ingest.feed(1, wire.encode_checks(999, 0, 0, period_s=1.0, budget=0.01, deferred_total=0, peers=peers,
                                             results=table)) is not None
    assert len(ingest.store.checks()) == 0
    assert ingest.ledger.as_json()["bad_reasons"].get("unknown-schema") == 1

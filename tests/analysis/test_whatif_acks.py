"""The "slow links fixed" what-if when the slow part is a way out: the links into that node, whose TCP
acknowledgements leave through it (RFC 9293), are freed with it. Three nodes, one rank each, every figure
worked out by hand below."""

from __future__ import annotations

import numpy as np
import pytest

from watchtower.analysis import Transfers, Window, analyse, analysis_to_json
from watchtower.cluster import Cluster

ALPHA = 1e-4
# n1's way out is choked (0.25 GB/s); the links into n1 run at 0.8 GB/s, held back by their acknowledgements;
# the two links that touch neither, n0→n2 and n2→n0, run at 1 GB/s.
BETA = {(0, 1): 0.8e9, (0, 2): 1e9, (1, 0): 0.25e9, (1, 2): 0.25e9, (2, 0): 1e9, (2, 1): 0.8e9}
STEP_S = 3.0  # every rank: 1 s of compute and 2 s of exchange in each of the 2 steps


def three_nodes() -> Window:
    # Step s: every rank sends (s + 1) × 100 MB to each of the others, at exact Hockney times α + n/β, each
    # transfer in its own 10 s slot (so none shares a port: sharing has its own tests).
    rows = [(s, src, dst, (s + 1) * 1e8) for s in range(2) for (src, dst) in BETA]
    st, src, dst, nb = (np.array(col) for col in zip(*rows, strict=True))
    secs = ALPHA + nb / np.array([BETA[int(a), int(b)] for a, b in zip(src, dst, strict=True)])
    start = 10.0 * np.arange(len(st))
    transfers = Transfers(st.astype(np.int64), np.zeros(len(st), np.int32), src.astype(np.int32),
                          dst.astype(np.int32), nb.astype(np.int64), start, start + secs, np.full(len(st), np.nan))
    compute = np.ones((2, 3, 1))
    exchange = np.full((2, 3, 1), STEP_S - 1.0)
    return Window(("x",), ("n0", "n1", "n2"), np.arange(3, dtype=np.int32), np.arange(3, dtype=np.int32),
                  np.arange(2, dtype=np.int64), compute, exchange, compute.sum(axis=2) + exchange.sum(axis=2),
                  transfers)


@pytest.fixture(scope="module")
def result() -> dict:
    return analysis_to_json(analyse(three_nodes(), None, Cluster(name="acks", total_steps=1002, nic_Bps=1.25e9)))


def test_the_choked_way_out_is_the_slow_port_and_the_links_into_it_are_not_slow(result: dict) -> None:
    # n1 out: capacity 0.25 GB/s < half of 1.25 GB/s (below nominal). n1 in: 0.8 GB/s, above half, and its
    # score among the ways in (log 1, log 0.8, log 1; MAD 0, so mean absolute deviation × 1.2533) is −2.39.
    slow_ports = [(p["node"], p["direction"]) for p in result["ports"] if p["slow"]]
    assert slow_ports == [("n1", "out")]
    links = {(lk["src"], lk["dst"]): lk for lk in result["links"]}
    assert {pair for pair, lk in links.items() if lk["slow"]} == {("n1", "n0"), ("n1", "n2")}
    assert links["n0", "n1"]["bandwidth_Bps"] == pytest.approx(0.8e9)
    assert not links["n0", "n1"]["slow"] and not links["n2", "n1"]["slow"]


def test_fixing_the_way_out_frees_the_links_its_acknowledgements_held(result: dict) -> None:
    # The class's healthy reference leaves out the slow links and the links n1 out acknowledges: median of
    # n0→n2 and n2→n0 = 1 GB/s. Fixed, all six links run at 1 GB/s.
    # The halo model (per step, the busiest rank counting what it receives and, apart, what it sends):
    #   now, n1 sending: 2α + 2 (s + 1) 100 MB / 0.25 GB/s = 0.8002 s (step 0), 1.6002 s (step 1): 1.2002 s a step;
    #   fixed, every rank alike: 2α + 2 (s + 1) 100 MB / 1 GB/s = 0.2002 s, 0.4002 s: 0.3002 s a step.
    # Predicted step = measured 3 s − 1.2002 + 0.3002 = 2.1 s; speedup = work per step (3 ranks × 1 s) / 2.1 s.
    fixed = next(w for w in result["whatif"] if w["slow_fixed"])
    assert fixed["step_s"] == pytest.approx(2.1, rel=1e-9)
    assert fixed["speedup"] == pytest.approx(3.0 / 2.1, rel=1e-9)
    # Had the links into n1 stayed at 0.8 GB/s (and the median taken them in: 0.9 GB/s), n1 receiving would
    # hold the step: 2α + 2 (s + 1) 100 MB / 0.8 GB/s = 0.2502, 0.5002 s, 0.3752 s a step, predicting 2.175 s.
    assert fixed["step_s"] != pytest.approx(3.0 - 1.2002 + 0.3752, rel=1e-3)
    # Hours at stake: 1000 steps remain after step 1; 1000 × 0.9 s / 3600.
    assert result["hours_at_stake"] == pytest.approx(1000 * 0.9 / 3600, rel=1e-9)


def test_one_link_of_the_port_alone_does_not_free_the_acknowledgements(result: dict) -> None:
    # n1→n0 alone at 1 GB/s: n1 still sends (s + 1) 100 MB at 0.25 GB/s to n2: 2α + (s + 1) 100 MB × (1/1 +
    # 1/0.25) GB/s = 0.5002, 1.0002 s, 0.7502 s a step; the links into n1 stay at 0.8 GB/s (the port is not
    # fixed), their 0.3752 s is less. Saving 1.2002 − 0.7502 = 0.45 s a step, × 1000 steps / 3600.
    links = {(lk["src"], lk["dst"]): lk for lk in result["links"]}
    assert links["n1", "n0"]["hours_at_stake"] == pytest.approx(1000 * 0.45 / 3600, rel=1e-9)

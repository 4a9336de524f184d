"""Every cut-off that decides a flag, on both sides of it, through ``analyse`` and ``analysis_to_json`` (what
the console and the report show).

Each boundary is probed just inside and just outside, close enough that the threshold moved by a few tens
of percent either way flips at least one verdict. Sources are named beside each value; a rule of thumb is
marked "common practice, no source".

Windows are built so every figure is known exactly: link transfers are laid end to end (no port sharing)
with exact Hockney times α + n/β at two sizes, so each fitted β is the β typed here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from watchtower.analysis import Window, analyse, analysis_to_json
from watchtower.cluster import Cluster

ALPHA = 2e-5
C = 1e9  # a healthy link, bytes/s
Z_MAD = 0.6745  # Iglewicz & Hoaglin (1993): M = 0.6745 (x − median) / MAD


def layers_window(fractions: list[tuple[float, float]]) -> Window:
    """One rank, one step; layer l computes C_l and exchanges E_l seconds (its comm fraction E/(C+E))."""
    c = np.array([[[ce[0] for ce in fractions]]])
    e = np.array([[[ce[1] for ce in fractions]]])
    return Window(tuple(f"l{i}" for i in range(len(fractions))), ("n0",), np.array([0], np.int32),
                  np.array([0], np.int32), np.array([0]), c, e, (c + e).sum(axis=2))


def test_comm_bound_threshold_on_both_sides() -> None:
    # Comm-bound: E / (C + E) > 0.5 (common practice, no source); strictly above, so exactly 0.5 is not.
    # Fractions by hand: 0.30/1, 0.49/1, 1/2, 0.51/1, 0.80/1.
    w = layers_window([(0.70, 0.30), (0.51, 0.49), (1.0, 1.0), (0.49, 0.51), (0.20, 0.80)])
    out = analysis_to_json(analyse(w, None, Cluster.default()))
    assert out["comm_bound_threshold"] == 0.5
    assert [lay["comm_fraction"] for lay in out["layers"]] == pytest.approx([0.30, 0.49, 0.50, 0.51, 0.80])
    assert [lay["comm_bound"] for lay in out["layers"]] == [False, False, False, True, True]


def test_comm_bound_threshold_is_a_setting() -> None:
    # The same layers against a threshold of 0.25 set by the user: 0.30 is now bound too.
    w = layers_window([(0.80, 0.20), (0.70, 0.30)])
    out = analysis_to_json(analyse(w, None, Cluster.default(), threshold=0.25))
    assert [lay["comm_bound"] for lay in out["layers"]] == [False, True]


def straggler_window(build_window, offsets: list[float]) -> Window:
    compute = np.exp(np.asarray(offsets))[None, :, None]  # one step, one layer, log compute = the offset
    return build_window(compute, np.zeros((1, 1)))


@pytest.mark.parametrize(("z", "flagged"), [(3.25, False), (4.25, True)])
def test_straggler_threshold_on_both_sides(build_window, z: float, flagged: bool) -> None:
    # Straggler: modified z-score of log compute > 3.5 (Iglewicz & Hoaglin, 1993). Ten ranks at log offsets
    # −d ×4, 0 ×3, +d ×3, and rank 10 at z·σ: the median is the 6th of 11 values, 0, and the 6th smallest
    # |dev| is d, so MAD = d and σ = d / 0.6745 (d = 0.05 keeps σ above the 2 % jitter floor). Score = z.
    d = 0.05
    w = straggler_window(build_window, [-d] * 4 + [0.0] * 3 + [d] * 3 + [z * d / Z_MAD])
    out = analysis_to_json(analyse(w, None, Cluster.default()))
    if flagged:
        (st,) = out["stragglers"]
        assert st["rank"] == 10 and st["score"] == pytest.approx(z)
    else:
        assert out["stragglers"] == []


@pytest.mark.parametrize(("offset", "flagged"), [(0.06, False), (0.08, True)])
def test_straggler_jitter_floor(build_window, offset: float, flagged: bool) -> None:
    # The scale has a floor of 2 % (σ of log compute; common practice, no source: timer and clock jitter).
    # Here MAD σ = 0.005 / 0.6745 = 0.0074 < 0.02, so σ = 0.02 and the score is offset / 0.02: 3.0 (not a
    # straggler) and 4.0 (a straggler), by hand.
    d = 0.005
    w = straggler_window(build_window, [-d] * 4 + [0.0] * 3 + [d] * 3 + [offset])
    stragglers = analysis_to_json(analyse(w, None, Cluster.default()))["stragglers"]
    assert [(s["rank"], round(s["score"], 9)) for s in stragglers] == ([(10, offset / 0.02)] if flagged else [])


def network_window(build_window, build_transfers, betas: dict[tuple[int, int], float], n_nodes: int, *,
                   sizes: tuple[float, ...] = (1e6, 4e6), repeats: int = 2) -> Window:
    """One rank per node; each directed pair sends every size ``repeats`` times at exactly α + n/β."""
    rows = [(s, d, n, ALPHA + n / beta) for (s, d), beta in betas.items() for n in sizes for _ in range(repeats)]
    src, dst, nbytes, secs = (np.array(col) for col in zip(*rows, strict=True))
    tr = build_transfers(np.zeros(len(src), np.int64), src, dst, nbytes, secs)
    return build_window(np.ones((1, n_nodes, 1)), np.zeros((1, 1)), transfers=tr)


def ring(n: int) -> list[tuple[int, int]]:
    return [(i, (i + 1) % n) for i in range(n)]


def links_by_pair(out: dict) -> dict[tuple[int, int], dict]:
    return {(int(lk["src"][1:]), int(lk["dst"][1:])): lk for lk in out["links"]}


@pytest.mark.parametrize(("z", "slow"), [(3.25, False), (4.25, True)])
def test_link_outlier_threshold_on_both_sides(build_window, build_transfers, z: float, slow: bool) -> None:
    # Slow link: modified z-score of log β < −3.5 within its class (Iglewicz & Hoaglin, 1993). Eleven links
    # of one ring at log offsets −d ×3, 0 ×3, +d ×4 and one at −z·σ: median 0, MAD d (by hand as above).
    d = 0.05
    offsets = [-d] * 3 + [0.0] * 3 + [d] * 4 + [-z * d / Z_MAD]
    betas = {pair: C * math.exp(x) for pair, x in zip(ring(11), offsets, strict=True)}
    out = analysis_to_json(analyse(network_window(build_window, build_transfers, betas, 11), None, Cluster()))
    links = links_by_pair(out)
    assert links[10, 0]["bandwidth_Bps"] == pytest.approx(C * math.exp(-z * d / Z_MAD), rel=1e-9)
    assert links[10, 0]["score"] == pytest.approx(-z)
    assert links[10, 0]["slow"] is slow and links[10, 0]["reason"] == ("outlier" if slow else "")
    assert not any(lk["slow"] for pair, lk in links.items() if pair != (10, 0))


@pytest.mark.parametrize(("ratio", "slow"), [(0.30, True), (0.36, False)])
def test_far_below_peers_on_both_sides(build_window, build_transfers, ratio: float, slow: bool) -> None:
    # A link under a third of its class's median β is slow whatever the spread (common practice, no source).
    # A wide class (d = 0.4, σ = 0.593) keeps the z-scores of both probes above −3.5: log 0.30 / σ = −2.03,
    # log 0.36 / σ = −1.72, so only the one-third rule can decide.
    d = 0.4
    offsets = [-d] * 3 + [0.0] * 3 + [d] * 4 + [math.log(ratio)]
    betas = {pair: C * math.exp(x) for pair, x in zip(ring(11), offsets, strict=True)}
    links = links_by_pair(analysis_to_json(analyse(network_window(build_window, build_transfers, betas, 11), None,
                                                   Cluster())))
    assert links[10, 0]["score"] == pytest.approx(math.log(ratio) * Z_MAD / d)
    assert links[10, 0]["score"] > -3.5
    assert links[10, 0]["slow"] is slow and links[10, 0]["reason"] == ("outlier" if slow else "")
    assert not any(lk["slow"] for pair, lk in links.items() if pair != (10, 0))


@pytest.mark.parametrize(("pairs", "slow"), [
    ([(0, 1), (1, 0)], False),  # a class of two: which of the two is "the peers"? The rule stays off.
    (ring(3), True),  # a class of three: the rule is on
])
def test_far_below_rule_needs_a_class_of_three(build_window, build_transfers, pairs, slow: bool) -> None:
    # The last link runs at a tenth of the others (in a class of two, under a third of the median 0.55 C
    # too). Its z-score alone never flags it: in a class of two the scores are ±0.6745 (each one MAD from
    # the median); in a class of three MAD = 0, so the scale is 1.253314 × mean |dev| = 1.253314 × log(10)
    # / 3 and the score is −3 / 1.253314 = −2.39 (Iglewicz & Hoaglin, 1993), by hand.
    betas = {pair: C for pair in pairs[:-1]} | {pairs[-1]: C / 10}
    n_nodes = max(max(p) for p in pairs) + 1
    links = links_by_pair(analysis_to_json(analyse(
        network_window(build_window, build_transfers, betas, n_nodes), None, Cluster())))
    expected_score = -Z_MAD if len(pairs) == 2 else -3 / 1.253314
    assert links[pairs[-1]]["score"] == pytest.approx(expected_score, rel=1e-6)
    assert links[pairs[-1]]["slow"] is slow
    assert not any(lk["slow"] for pair, lk in links.items() if pair != pairs[-1])


def test_below_nominal_on_both_sides(build_window, build_transfers) -> None:
    # Below nominal: β < 0.5 × the nominal rate (common practice, no source: under half its rate a link is
    # broken, not busy). A class of two keeps the peer rules out. 0.47 and 0.53 of 1.25 GB/s.
    nominal = 1.25e9
    betas = {(0, 1): 0.47 * nominal, (1, 0): 0.53 * nominal}
    out = analysis_to_json(analyse(network_window(build_window, build_transfers, betas, 2), None,
                                   Cluster(nic_Bps=nominal)))
    links = links_by_pair(out)
    assert links[0, 1]["slow"] and links[0, 1]["reason"] == "below-nominal"
    assert not links[1, 0]["slow"] and links[1, 0]["reason"] == ""


def test_below_nominal_needs_two_message_sizes(build_window, build_transfers) -> None:
    # With one message size α and β cannot be told apart: the effective rate n / t of 8 kB messages with
    # α = 20 µs is 8e3 / (20e-6 + 8e3 / β), latency and all: 0.21 and 0.23 of nominal for β at 0.6 and 0.8
    # of it, yet no link is called below nominal: only a two-size fit gives a β comparable with a NIC rate.
    nominal = 1.25e9
    betas = {(0, 1): 0.6 * nominal, (1, 0): 0.8 * nominal}
    out = analysis_to_json(analyse(network_window(build_window, build_transfers, betas, 2, sizes=(8e3,)), None,
                                   Cluster(nic_Bps=nominal)))
    for pair, lk in links_by_pair(out).items():
        effective = 8e3 / (ALPHA + 8e3 / betas[pair])
        assert lk["bandwidth_Bps"] == pytest.approx(effective) and effective < 0.5 * nominal
        assert lk["latency_s"] is None and not lk["slow"]


# ---------------------------------------------------------------------------------------------- ports
def mesh(n: int) -> list[tuple[int, int]]:
    return [(s, d) for s in range(n) for d in range(n) if s != d]


def ports_and_links(build_window, build_transfers, betas: dict[tuple[int, int], float], n_nodes: int,
                    cluster: Cluster | None = None, nic: np.ndarray | None = None) -> tuple[dict, dict]:
    out = analysis_to_json(analyse(network_window(build_window, build_transfers, betas, n_nodes), None,
                                   cluster or Cluster(), nic_Bps=nic))
    return {f"{p['node']} {p['direction']}": p for p in out["ports"]}, links_by_pair(out)


@pytest.mark.parametrize(("fraction", "limited"), [(0.8, True), (0.7, False)])
def test_a_slow_port_limits_links_at_three_quarters_of_its_capacity(build_window, build_transfers,
                                                                    fraction: float, limited: bool) -> None:
    # A slow port limits a link running at ≥ 75 % of the port's capacity (common practice, no source).
    # Ring both ways on six nodes at 1 GB/s; n2's way out carries n2→n1 at 0.2 GB/s (its capacity: the
    # fastest link through it) and n2→n3 at 0.8 or 0.7 of that.
    betas = {pair: C for pair in ring(6) + [(d, s) for s, d in ring(6)]}
    betas[2, 1], betas[2, 3] = 0.2 * C, fraction * 0.2 * C
    ports, links = ports_and_links(build_window, build_transfers, betas, 6)
    assert ports["n2 out"]["capacity_Bps"] == pytest.approx(0.2 * C) and ports["n2 out"]["slow"]
    assert [name for name, p in ports.items() if p["slow"]] == ["n2 out"]
    assert links[2, 1]["port"] == "n2 out"
    assert links[2, 3]["slow"]  # far below its class either way
    assert links[2, 3]["port"] == ("n2 out" if limited else None)
    assert links[2, 3]["unexplained"] is not limited


@pytest.mark.parametrize(("ratio", "shadowed"), [(3.3, True), (2.7, False)])
def test_a_way_out_over_three_times_faster_than_a_slow_way_in_is_shadowed(build_window, build_transfers,
                                                                          ratio: float, shadowed: bool) -> None:
    # One direction more than 3× slower than the other explains it (acknowledgements travel the other way,
    # RFC 9293; 3×: common practice, no source). n2's way in at 0.05 GB/s, its way out at 3.3× or 2.7× that:
    # both far below their peers, but only the first is put down to the way in.
    betas = {pair: C for pair in ring(6) + [(d, s) for s, d in ring(6)]}
    betas[1, 2] = betas[3, 2] = 0.05 * C
    betas[2, 1] = betas[2, 3] = ratio * 0.05 * C
    ports, _ = ports_and_links(build_window, build_transfers, betas, 6)
    assert ports["n2 in"]["slow"]
    assert ports["n2 out"]["capacity_Bps"] == pytest.approx(ratio * 0.05 * C)
    assert ports["n2 out"]["slow"] is not shadowed
    assert ports["n2 out"]["shadowed_by"] == ("n2 in" if shadowed else None)


@pytest.mark.parametrize(("groups", "slow"), [
    ({"n0": "a", "n1": "a", "n2": "b", "n3": "b"}, False),  # n1's way out has one peer: the rule stays off
    ({"n0": "a", "n1": "a", "n2": "a", "n3": "b"}, True),  # two peers: the rule is on
])
def test_port_far_below_rule_needs_three_ports(build_window, build_transfers, groups: dict, slow: bool) -> None:
    # A port under a third of its peers' median capacity (same direction, same node group) is slow (common
    # practice, no source). Four nodes, every pair at 1 GB/s but n1's way out at 0.1 GB/s (under a third
    # of the median of two, 0.55 GB/s, too). Its z-score alone does not flag it: against one peer it is
    # −0.6745; against two, MAD = 0 and the score is −3 / 1.253314 = −2.39 (Iglewicz & Hoaglin, 1993).
    betas = {pair: (0.1 * C if pair[0] == 1 else C) for pair in mesh(4)}
    ports, _ = ports_and_links(build_window, build_transfers, betas, 4, Cluster(node_group=groups))
    assert ports["n1 out"]["score"] == pytest.approx(-Z_MAD if not slow else -3 / 1.253314, rel=1e-6)
    assert ports["n1 out"]["slow"] is slow
    assert [name for name, p in ports.items() if p["slow"]] == (["n1 out"] if slow else [])


def test_nic_counters_disagree_above_a_tenth_more_than_capacity(build_window, build_transfers) -> None:
    # nic_disagrees: the counters saw more than capacity × 1.1 (10 % for headers: common practice, no
    # source). Every port's capacity is 1 GB/s; n0's counters say 1.08 GB/s out, n1's 1.12 GB/s out.
    betas = {pair: C for pair in ring(4) + [(d, s) for s, d in ring(4)]}
    nic = np.full((4, 2), np.nan)
    nic[0, 0], nic[1, 0] = 1.08 * C, 1.12 * C
    ports, _ = ports_and_links(build_window, build_transfers, betas, 4, nic=nic)
    assert ports["n0 out"]["capacity_Bps"] == pytest.approx(C)
    assert (ports["n0 out"]["nic_disagrees"], ports["n1 out"]["nic_disagrees"]) == (False, True)
    assert ports["n2 out"]["nic_Bps"] is None and not ports["n2 out"]["nic_disagrees"]

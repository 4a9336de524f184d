"""Ports: capacity from concurrent flows, the culprit port of slow links, and its place in the JSON.

Flows come from ``ringflows``, run through the demo's fluid model (max-min fair sharing at the ports), so every
capacity is known exactly.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from ringflows import max_min_rates, ring_transfers

from watchtower.analysis import (
    RunSeries,
    Transfers,
    Window,
    analyse,
    analysis_to_json,
    busy_level,
    port_load,
)
from watchtower.cluster import Cluster

N = 6
C = 1e9  # healthy port capacity, bytes/s
X = 2  # the node with a shaped port
CLUSTER = Cluster(nic_Bps=1.25e9)


def window_of(tr: Transfers) -> Window:
    steps = int(tr.step.max()) + 1
    zeros = np.zeros((steps, N, 1))
    return Window(("halo",), tuple(f"n{i}" for i in range(N)), np.arange(N, dtype=np.int32),
                  np.arange(N, dtype=np.int32), np.arange(steps), zeros + 1.0, zeros, np.full((steps, N), 2.0), tr)


def ports_of(out: dict) -> dict[str, dict]:
    return {f"{p['node']} {p['direction']}": p for p in out["ports"]}


def links_of(out: dict) -> dict[tuple[str, str], dict]:
    return {(lk["src"], lk["dst"]): lk for lk in out["links"]}


def shaped(direction: str, rng: np.random.Generator, **kw) -> dict:
    egress, ingress = np.full(N, C), np.full(N, C)
    (egress if direction == "out" else ingress)[X] = C / 5
    return analysis_to_json(analyse(window_of(ring_transfers(egress, ingress, rng, **kw)), None, CLUSTER))


def test_max_min_fair_rates_of_a_textbook_example() -> None:
    # The line network of Bertsekas & Gallager, Data Networks, §6.5 (from memory): links A and B of
    # capacity 1; session 0 crosses both, sessions 1 and 2 use A only, session 3 B only. Worked by hand:
    # A fills first with three sessions at 1/3; session 3 then takes what B has left, 2/3.
    rates = max_min_rates([(0, 1), (0,), (0,), (1,)], np.array([1.0, 1.0]))
    assert rates == pytest.approx([1 / 3, 1 / 3, 1 / 3, 2 / 3])
    # Unequal capacities, by hand: A = 3 shared by 0 and 1 → 1.5 each is not feasible for 0 on B = 1
    # with session 2: B fills at 0.5 each; then session 1 takes A's rest, 2.5.
    assert max_min_rates([(0, 1), (0,), (1,)], np.array([3.0, 1.0])) == pytest.approx([0.5, 2.5, 0.5])


def test_port_load_by_hand() -> None:
    # One port: a moves 2 MB over [0, 2), b 2 MB over [1, 3), 1 MB/s each. During a the port moved a's
    # 2 MB and b's 1 MB; flow-seconds 2 + 1. A third item on another port is alone.
    during, flows = port_load(np.array([0, 0, 1]), np.array([0.0, 1.0, 0.5]), np.array([2.0, 3.0, 1.5]),
                              np.array([2e6, 2e6, 5e5]))
    assert during == pytest.approx([3e6, 3e6, 5e5])
    assert flows == pytest.approx([3.0, 3.0, 1.0])


def test_tiny_transfers_do_not_set_the_busy_level() -> None:
    # 99 s at 1 GB/s, and 100 spikes of 1 µs at 50 GB/s: the time-weighted level stays at 1 GB/s (± a bin).
    rate = np.r_[np.full(99, 1e9), np.full(100, 5e10)]
    seconds = np.r_[np.ones(99), np.full(100, 1e-6)]
    (level,) = busy_level(np.zeros(199, np.int64), rate, seconds, 1)
    assert level == pytest.approx(1e9, rel=0.05)


def test_egress_shaped_port_is_named_with_its_capacity(rng: np.random.Generator) -> None:
    out = shaped("out", rng)
    ports, links = ports_of(out), links_of(out)
    assert [name for name, p in ports.items() if p["slow"]] == ["n2 out"]
    culprit = ports["n2 out"]
    assert culprit["capacity_Bps"] == pytest.approx(C / 5, rel=0.10)
    assert sorted(map(tuple, culprit["explains"])) == [("n2", "n1"), ("n2", "n3")]
    for pair in (("n2", "n1"), ("n2", "n3")):
        lk = links[pair]
        assert lk["slow"] and lk["port"] == "n2 out" and not lk["unexplained"]
        # The port's capacity, not the half of it each of the two concurrent flows got.
        assert lk["bandwidth_Bps"] == pytest.approx(culprit["capacity_Bps"], rel=0.10)
        assert lk["bandwidth_Bps"] == pytest.approx(C / 5, rel=0.10)
        assert lk["throughput_Bps"] < 0.7 * C / 5
    # Every other port within ±10 % of its capacity, and no other link slow.
    for name, p in ports.items():
        if name != "n2 out":
            assert p["capacity_Bps"] == pytest.approx(C, rel=0.10), name
    assert {pair for pair, lk in links.items() if lk["slow"]} == {("n2", "n1"), ("n2", "n3")}


def test_ingress_shaped_port_is_named(rng: np.random.Generator) -> None:
    out = shaped("in", rng)
    ports, links = ports_of(out), links_of(out)
    assert [name for name, p in ports.items() if p["slow"]] == ["n2 in"]
    assert ports["n2 in"]["capacity_Bps"] == pytest.approx(C / 5, rel=0.10)
    assert sorted(map(tuple, ports["n2 in"]["explains"])) == [("n1", "n2"), ("n3", "n2")]
    # n1's way out also carried the fast n1→n0: the slow n1→n2 is not lifted to n1's port rate, and the
    # fast one keeps the full rate.
    assert links["n1", "n2"]["bandwidth_Bps"] == pytest.approx(C / 5, rel=0.10)
    assert links["n1", "n0"]["bandwidth_Bps"] == pytest.approx(C, rel=0.10)
    assert ports["n1 out"]["capacity_Bps"] == pytest.approx(C, rel=0.10) and not ports["n1 out"]["slow"]


def test_slow_pair_without_slow_port_is_unexplained(rng: np.random.Generator) -> None:
    tr = ring_transfers(np.full(N, C), np.full(N, C), rng, slow_pairs={(3, 4): C / 5})
    out = analysis_to_json(analyse(window_of(tr), None, CLUSTER))
    lk = links_of(out)["n3", "n4"]
    assert lk["slow"] and lk["port"] is None and lk["unexplained"]
    assert not any(p["slow"] for p in out["ports"])
    assert all(not other["unexplained"] for pair, other in links_of(out).items() if pair != ("n3", "n4"))


def test_nic_counters_are_a_second_witness(rng: np.random.Generator) -> None:
    egress = np.full(N, C)
    egress[X] = C / 5
    window = window_of(ring_transfers(egress, np.full(N, C), rng))
    nic = np.full((N, 2), 0.3 * C)
    nic[X, 0] = 0.5 * C  # the counters saw n2 send more than the probes' flows could: unseen traffic
    ports = ports_of(analysis_to_json(analyse(window, None, CLUSTER, nic_Bps=nic)))
    assert ports["n2 out"]["nic_Bps"] == pytest.approx(0.5 * C) and ports["n2 out"]["nic_disagrees"]
    assert not any(p["nic_disagrees"] for name, p in ports.items() if name != "n2 out")
    assert ports["n0 in"]["nominal_Bps"] == 1.25e9


def test_alert_names_the_port_all_its_links_share(rng: np.random.Generator) -> None:
    # n4's two links out drop together from step 70; the window itself is healthy.
    window = window_of(ring_transfers(np.full(N, C), np.full(N, C), rng))
    n = 100
    pairs = ((4, 3), (4, 5), (0, 1))
    rate = np.full((n, 3), 1e9) * (1 + 0.01 * rng.standard_normal((n, 3)))
    rate[70:, :2] *= 0.3
    step = np.where(np.arange(n) < 70, 1.0, 2.0)  # the drop doubles the step: worth an alert
    series = RunSeries(np.arange(n), step, pairs, rate * 0.01, np.full((n, 3), 0.01))
    out = analysis_to_json(analyse(window, series, CLUSTER))
    alerts = {al["subject"]: al for al in out["alerts"] if al["kind"] == "link-throughput"}
    assert set(alerts) == {"n4→n3", "n4→n5"}
    assert all(al["port"] == "n4 out" and al["message"].endswith("likely port n4 out") for al in alerts.values())


def test_ports_json_is_plain(rng: np.random.Generator) -> None:
    out = shaped("out", rng, steps=8)
    json.dumps(out, allow_nan=False)
    # Every node's way out, then its way in; each carried its two ring links at 1 GB/s but n2's way out.
    order = [(f"n{i}", d) for i in range(N) for d in ("out", "in")]
    assert [(p["node"], p["direction"]) for p in out["ports"]] == order
    for p in out["ports"]:
        culprit = (p["node"], p["direction"]) == ("n2", "out")
        assert p["links"] == 2 and p["nominal_Bps"] == 1.25e9 and p["nic_Bps"] is None and not p["nic_disagrees"]
        assert p["capacity_Bps"] == pytest.approx(C / 5 if culprit else C, rel=0.05)
        assert p["slow"] is culprit and p["lower_bound"] is not culprit and p["shadowed_by"] is None
        # 0.2 GB/s is far below its peers and below half the 1.25 GB/s nominal rate.
        assert p["reason"] == ("outlier, below-nominal" if culprit else "")
        assert p["explains"] == ([["n2", "n1"], ["n2", "n3"]] if culprit else [])
    assert {(lk["src"], lk["dst"]): lk["port"] for lk in out["links"] if lk["port"]} == {
        ("n2", "n1"): "n2 out", ("n2", "n3"): "n2 out"}
    assert not any(lk["unexplained"] for lk in out["links"])
    how = out["how"]
    assert "Iglewicz & Hoaglin (1993)" in how["ports.slow"]["source"]
    assert "Bertsekas & Gallager" in how["links.concurrency"]["source"]
    assert "75 %" in how["links.port"]["definition"] and "no source" in how["links.port"]["source"]


def test_a_way_out_held_back_by_a_far_slower_way_in_is_not_a_second_culprit(rng: np.random.Generator) -> None:
    # n2's way in is choked to a tenth; its way out, slowed to 0.55 by the acknowledgements queueing behind it,
    # is below its peers too, but the verdict names one part: the way in.
    egress, ingress = np.full(N, C), np.full(N, C)
    ingress[X], egress[X] = C / 10, 0.55 * C
    out = analysis_to_json(analyse(window_of(ring_transfers(egress, ingress, rng)), None, CLUSTER))
    ports = {(p["node"], p["direction"]): p for p in out["ports"]}
    assert [key for key, p in ports.items() if p["slow"]] == [(f"n{X}", "in")]
    assert ports[f"n{X}", "out"]["shadowed_by"] == f"n{X} in" and ports[f"n{X}", "out"]["reason"] == ""
    links = {(lk["src"], lk["dst"]): lk for lk in out["links"]}
    for pair in ((f"n{X - 1}", f"n{X}"), (f"n{X + 1}", f"n{X}"), (f"n{X}", f"n{X - 1}"), (f"n{X}", f"n{X + 1}")):
        assert links[pair]["slow"] and links[pair]["port"] == f"n{X} in", pair  # out links: slowed by the way in
    assert sum(lk["slow"] for lk in out["links"]) == 4


def test_link_models_use_the_newest_whole_steps_under_the_cap() -> None:
    from watchtower.analysis.links import _newest_steps

    steps = np.repeat(np.arange(5), [3, 3, 4, 2, 2])  # 14 transfers over five steps
    assert _newest_steps(steps, 100).all()
    assert steps[_newest_steps(steps, 8)].tolist() == [2, 2, 2, 2, 3, 3, 4, 4]  # whole steps, newest first
    assert steps[_newest_steps(steps, 1)].tolist() == [4, 4]  # never less than one step


def test_a_link_into_a_node_whose_way_out_failed_names_it_through_the_acknowledgements(
        rng: np.random.Generator) -> None:
    # n4's two links out drop from step 70, and so does n3→n4: its acknowledgements leave through n4's way out.
    window = window_of(ring_transfers(np.full(N, C), np.full(N, C), rng))
    n = 100
    pairs = ((4, 3), (4, 5), (3, 4), (0, 1))
    rate = np.full((n, 4), 1e9) * (1 + 0.01 * rng.standard_normal((n, 4)))
    rate[70:, :3] *= 0.3
    step = np.where(np.arange(n) < 70, 1.0, 2.0)  # the drop doubles the step: worth an alert
    series = RunSeries(np.arange(n), step, pairs, rate * 0.01, np.full((n, 4), 0.01))
    alerts = {al["subject"]: al for al in analysis_to_json(analyse(window, series, CLUSTER))["alerts"]
              if al["kind"] == "link-throughput"}
    assert set(alerts) == {"n4→n3", "n4→n5", "n3→n4"}
    assert alerts["n3→n4"]["port"] == "n4 out (acknowledgements)" and alerts["n4→n3"]["port"] == "n4 out"

"""One node's way out is throttled by tbf: its two outgoing links, and only those, must come out slow, at the
rate tbf allows. The ring job runs over real TCP between network namespaces; the ground truth is the kernel's
token bucket, not anything this project computed.

Every node's egress carries a fabric rate (400 Mb/s), so every link has a defined rate: an unshaped veth
moves bytes at memory speed with a spread of two decades between runs, which is not a rate to compare with.
Latency (α) is not checked: netem is not in this kernel, so there is no delay whose ground truth we know.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from netns_cluster import Job, NetnsCluster
from netns_helpers import links, report, ring_links, run_job, tc_rate, tcp_payload_Bps

pytestmark = pytest.mark.netns

FABRIC_BPS = 400e6
SLOW_BPS = 40e6
SLOW = "node1"
JOB = Job(steps=40, layers=8, exchange_bytes=262_144, compute_ms=5.0, seed=1)  # ~27 s at 40 Mb/s


@pytest.fixture(scope="module")
def snapshot(netns_cluster: NetnsCluster, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    for node in netns_cluster.nodes:
        netns_cluster.shape(node, tc_rate(FABRIC_BPS))
    netns_cluster.shape(SLOW, tc_rate(SLOW_BPS))
    recording = run_job(netns_cluster, JOB, Path(tmp_path_factory.mktemp("egress")))
    return report(recording)


def test_exactly_the_shaped_nodes_outgoing_links_are_slow(snapshot: dict[str, Any],
                                                         netns_cluster: NetnsCluster) -> None:
    by_pair = links(snapshot)
    assert set(by_pair) == ring_links(netns_cluster.nodes)
    slow = {pair for pair, link in by_pair.items() if link["slow"]}
    # A link into the shaped node really is slowed (its acknowledgements queue behind the shaped way out);
    # flagged, it must name that way out as its cause.
    acks = {pair for pair in slow - {(SLOW, "node0"), (SLOW, "node2")}
            if pair[1] == SLOW and by_pair[pair]["port"] == f"{SLOW} out (acknowledgements)"}
    assert slow - acks == {(SLOW, "node0"), (SLOW, "node2")}, {pair: (by_pair[pair]["score"], by_pair[pair]["port"])
                                                             for pair in by_pair}


def test_shaped_links_bandwidth_is_the_tbf_payload_rate(snapshot: dict[str, Any]) -> None:
    expected = tcp_payload_Bps(SLOW_BPS)  # 4.78 MB/s, see netns_helpers for the overhead model
    by_pair = links(snapshot)
    for pair in ((SLOW, "node0"), (SLOW, "node2")):
        assert by_pair[pair]["bandwidth_Bps"] == pytest.approx(expected, rel=0.10), pair


def test_the_culprit_is_the_shaped_nodes_way_out(snapshot: dict[str, Any]) -> None:
    """Both of node1's links are explained by one port, its way out, whose capacity is what tbf allows:
    the two flows it carries at once are seen as the port's capacity, not each as half of it."""
    slow_ports = {(p["node"], p["direction"]): p for p in snapshot["ports"] if p["slow"]}
    assert set(slow_ports) == {(SLOW, "out")}, [(p["node"], p["direction"], p["score"]) for p in snapshot["ports"]]
    port = slow_ports[SLOW, "out"]
    assert port["capacity_Bps"] == pytest.approx(tcp_payload_Bps(SLOW_BPS), rel=0.10)
    assert sorted(map(tuple, port["explains"])) == [(SLOW, "node0"), (SLOW, "node2")]
    by_pair = links(snapshot)
    assert by_pair[SLOW, "node0"]["port"] == by_pair[SLOW, "node2"]["port"] == f"{SLOW} out"

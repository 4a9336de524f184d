"""One node's way in is throttled (tbf on its bridge port, whose egress is the traffic towards the node): the
links into that node, and only those, must come out slow. See test_netns_egress.py for the set-up; α is not
checked because netem is not in this kernel.
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
JOB = Job(steps=40, layers=8, exchange_bytes=262_144, compute_ms=5.0, seed=2)


@pytest.fixture(scope="module")
def snapshot(netns_cluster: NetnsCluster, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    for node in netns_cluster.nodes:
        netns_cluster.shape(node, tc_rate(FABRIC_BPS))
    netns_cluster.shape(SLOW, tc_rate(SLOW_BPS), "ingress")
    recording = run_job(netns_cluster, JOB, Path(tmp_path_factory.mktemp("ingress")))
    return report(recording)


def test_exactly_the_links_into_the_shaped_node_are_slow(snapshot: dict[str, Any],
                                                        netns_cluster: NetnsCluster) -> None:
    by_pair = links(snapshot)
    assert set(by_pair) == ring_links(netns_cluster.nodes)
    slow = {pair for pair, link in by_pair.items() if link["slow"]}
    assert slow == {("node0", SLOW), ("node2", SLOW)}, {pair: by_pair[pair]["score"] for pair in by_pair}


def test_the_culprit_is_the_shaped_nodes_way_in(snapshot: dict[str, Any]) -> None:
    slow_ports = {(p["node"], p["direction"]): p for p in snapshot["ports"] if p["slow"]}
    assert set(slow_ports) == {(SLOW, "in")}, [(p["node"], p["direction"], p["score"]) for p in snapshot["ports"]]
    port = slow_ports[SLOW, "in"]
    assert port["capacity_Bps"] == pytest.approx(tcp_payload_Bps(SLOW_BPS), rel=0.10)
    assert sorted(map(tuple, port["explains"])) == [("node0", SLOW), ("node2", SLOW)]

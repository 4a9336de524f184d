"""A job that only uses collectives (``workload --collective``: a ring allreduce) across four namespace
nodes, one node's way out throttled by tbf. The job's own records cannot say which hop is slow; the node
daemons' pair checks must: exactly that port slow, at the rate tbf allows less TCP/IP and Ethernet
overhead (±10 %), and no other port flagged. The ground truth is the kernel's token bucket.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from netns_cluster import Job, NetnsCluster
from netns_helpers import links, report, run_job, tc_rate, tcp_payload_Bps

pytestmark = pytest.mark.netns

FABRIC_BPS = 400e6
SLOW_BPS = 40e6
SLOW = "node1"
# 4 layers × 40 ms compute, then a 256 KiB allreduce (~80 ms through the slow hop): ~0.3 s a step, ~40 s.
JOB = Job(steps=130, layers=4, exchange_bytes=262_144, compute_ms=40.0, seed=1, collective=True)
CLUSTER_FILE = f"""
[network]
nic_Bps = {FABRIC_BPS / 8:.0f}
[checks]
budget = 0.01
"""


@pytest.fixture(scope="module")
def snapshot(netns_cluster: NetnsCluster, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    for node in netns_cluster.nodes:
        netns_cluster.shape(node, tc_rate(FABRIC_BPS))
    netns_cluster.shape(SLOW, tc_rate(SLOW_BPS))
    workdir = Path(tmp_path_factory.mktemp("checks"))
    cluster_file = workdir / "cluster.toml"
    cluster_file.write_text(CLUSTER_FILE)
    recording = run_job(netns_cluster, JOB, workdir, daemons=cluster_file)
    return report(recording)


def test_every_link_of_the_collective_job_is_measured_by_check(snapshot: dict[str, Any],
                                                              netns_cluster: NetnsCluster) -> None:
    by_pair = links(snapshot)
    nodes = netns_cluster.nodes
    assert set(by_pair) == {(a, b) for a in nodes for b in nodes if a != b}
    assert {link["measured_by"] for link in by_pair.values()} == {"check"}
    assert snapshot["checks"]["budget"] == 0.01


def test_the_checks_name_the_shaped_port_at_the_tbf_rate_and_no_other(snapshot: dict[str, Any]) -> None:
    ports = {(p["node"], p["direction"]): p for p in snapshot["ports"]}
    slow_ports = {key for key, p in ports.items() if p["slow"]}
    assert slow_ports == {(SLOW, "out")}, {key: (p["capacity_Bps"], p["score"]) for key, p in ports.items()}
    expected = tcp_payload_Bps(SLOW_BPS)  # 4.78 MB/s, see netns_helpers for the overhead model
    assert ports[SLOW, "out"]["capacity_Bps"] == pytest.approx(expected, rel=0.10)


def test_the_shaped_nodes_outgoing_links_are_slow_and_every_slow_link_is_blamed_on_its_port(
        snapshot: dict[str, Any], netns_cluster: NetnsCluster) -> None:
    """Every link out of the shaped node is slow through its way out. A check *into* the shaped node may be
    slow too, and honestly so: its TCP acknowledgements leave through the throttled way out, queued behind
    the job's own traffic (RFC 9293: acknowledgements travel the reverse path). Whether one is
    caught doing so depends on when the check ran, so such a link may be slow, but then it must name the
    shaped port and say it is the acknowledgements; any other slow link is a false alarm."""
    by_pair = links(snapshot)
    slow = {pair for pair, link in by_pair.items() if link["slow"]}
    shaped_out = {(SLOW, b) for b in netns_cluster.nodes if b != SLOW}
    detail = {pair: (link["bandwidth_Bps"], link["reason"], link["port"]) for pair, link in by_pair.items()}
    assert shaped_out <= slow, detail
    for pair in shaped_out:
        assert by_pair[pair]["port"] == f"{SLOW} out"
    for pair in slow - shaped_out:
        assert pair[1] == SLOW, detail
        assert by_pair[pair]["port"] == f"{SLOW} out (acknowledgements)", detail

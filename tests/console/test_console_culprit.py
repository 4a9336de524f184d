"""The culprit strip: which node, which way, how slow against whom, what it costs, since when."""

from __future__ import annotations

from typing import Any

from rich.cells import cell_len

from watchtower.console.culprit import CLEAR, culprit_line, suspects

from .scenario import NODES, make_snapshot


def two_culprits() -> dict[str, Any]:
    """node-c's way out slow (one link, 1.3 h); node-e's way out and in slow as well, and degrading."""
    snapshot = make_snapshot()
    for port in snapshot["ports"]:
        if port["node"] == NODES[4]:
            port.update(slow=True, capacity_Bps=1.22e9 if port["direction"] == "out" else 1.3e9)
    for link in snapshot["links"]:
        if NODES[4] in (link["src"], link["dst"]) and NODES[2] not in (link["src"], link["dst"]):
            link.update(slow=True, hours_at_stake=2.0,
                        port=f"{NODES[4]} {'out' if link['src'] == NODES[4] else 'in'}")
    snapshot["alerts"][0]["port"] = f"{NODES[4]} out"
    snapshot["alerts"][0]["step_began"] = 260
    return snapshot


def test_suspects_name_node_directions_rate_peers_cost_and_onset() -> None:
    found = suspects(two_culprits())
    worst = found[0]  # 8 slow links × 2 h outweigh node-c's 1.3 h
    assert (worst.node, worst.what, worst.links, worst.hours, worst.since) == (NODES[4], "out/in", 8, 16.0, 260)
    assert worst.rate_Bps == 1.22e9 and worst.peers_Bps == 11.0e9  # the slower way; peers' median capacity
    assert (found[1].node, found[1].what, found[1].links) == (NODES[2], "out", 1)
    assert found[-1].what == "rank 13"  # the straggler


def test_the_line_shortens_names_never_cuts_them() -> None:
    snapshot = two_culprits()
    wide = culprit_line(snapshot, 200)
    assert "node-e out/in at 1.22 GB/s vs 11.0 GB/s peers, degraded since step 260 → 8 links, 16 h" in wide
    narrow = culprit_line(snapshot, 60)
    assert narrow == "cause: e out/in 1.22 GB/s → 16 h; +2 more"
    for width in range(45, 200, 7):
        line = culprit_line(snapshot, width)
        assert cell_len(line) <= width and "…" not in line
        assert all(word in NODES or len(word) <= 1 or not word.startswith("node") for word in line.split())


def test_a_healthy_job_says_so() -> None:
    snapshot = make_snapshot(stragglers=[], alerts=[])
    for port in snapshot["ports"]:
        port["slow"] = False
    assert culprit_line(snapshot, 80) == CLEAR


def test_a_node_costs_what_fixing_all_its_links_together_buys() -> None:
    """Each slow link's own stake is what fixing that link alone buys — nothing while the node's other links
    hold the step — so the strip takes the node's standing finding (all its links fixed together), and for
    a port named by alerts, their stake; never the links' solo stakes added up."""
    snapshot = two_culprits()
    for link in snapshot["links"]:
        if link["slow"] and link["port"] and link["port"].startswith(NODES[4]):
            link["hours_at_stake"] = 0.0
    snapshot["standing"] = [{"kind": "slow-port", "subject": f"{NODES[4]} out and in",
                             "culprit": f"{NODES[4]} out and in", "links": [], "hours_at_stake": 7.5,
                             "hours_once_others_fixed": 7.5, "message": ""}]
    snapshot["alerts"][0]["hours_at_stake"] = 3.25
    found = {s.node: s for s in suspects(snapshot)}
    assert found[NODES[4]].hours == 7.5
    assert found[NODES[2]].hours == 1.3  # no standing finding, no alert names node-c out: its link's stake
    snapshot["standing"] = []
    assert {s.node: s for s in suspects(snapshot)}[NODES[4]].hours == 3.25  # the alert naming its way out

"""Ports: each node's way out to the switch and its way in, the usual physical culprit behind slow links.

A cable, NIC or switch port slows every node pair that crosses it. Link β is already corrected for flows
sharing a port (``sharing.py``), so the fastest link through a port shows what the port can do; a slow
port is judged against its peers and its nominal rate, and named as the cause of the slow links it limits.
The switch is taken as non-blocking: a pair's path is limited only by the sender's way out and the
receiver's way in (a blocking switch or an oversubscribed uplink shows up as slow links no port explains).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np

from watchtower.analysis.cusum import Alert
from watchtower.analysis.efficiency import FAR_BELOW_PEERS, OUTLIER_Z, RELATIVE_JITTER
from watchtower.analysis.links import SLOW_FRACTION, LinkStats
from watchtower.analysis.robust import modified_z
from watchtower.cluster import Cluster

SHADOW = 3.0  # one direction this many times slower than the other explains it; common practice, no source
LIMITS = 0.75  # a slow port limits a link running at ≥ 75 % of the port's capacity; common practice, no source
NIC_MARGIN = 0.1  # counters may exceed the payload rate by protocol headers (~5 %); common practice, no source

Direction = Literal["out", "in"]


@dataclass(frozen=True)
class PortStats:
    """One node's way out (``direction`` "out") or in, over the window.

    ``capacity_Bps`` is the highest β of the network links through the port (each β already corrected
    for concurrent flows, so it is the rate the port sustained, not one flow's share): every link through
    a port is at most as fast as the port, and the fastest one shows what the port can do. When every link
    through the port runs at the capacity of its other end, the port never showed its own limit:
    ``lower_bound`` is set and the port is not judged slow (it is still scored). ``score`` is
    the modified z-score of log capacity among ports of the same direction and node group. ``nic_Bps`` is
    the NIC counters' rate for this direction when known; ``nic_disagrees`` is set when the counters saw
    the port move more than ``capacity_Bps`` (plus a margin for headers): traffic the probes do not see
    shares the port, so its low capacity is contention, not a broken port. ``explains`` lists the slow
    links this port limits. ``shadowed_by`` names the node's other direction when that one is slow and
    more than ``SHADOW`` times slower: TCP's acknowledgements travel the other way, so a choked way in
    also holds back the way out (and the reverse); this port is then not judged slow on its own.
    """

    node: int
    node_name: str
    direction: Direction
    links: int  # network links through the port
    capacity_Bps: float
    lower_bound: bool
    nominal_Bps: float | None
    nic_Bps: float | None
    nic_disagrees: bool
    score: float
    slow: bool
    reason: str  # "" | "outlier" | "below-nominal" | "outlier, below-nominal"
    explains: tuple[tuple[str, str], ...]
    shadowed_by: str | None = None  # the node's other direction, far slower, that this one only suffers from

    @property
    def name(self) -> str:
        return f"{self.node_name} {self.direction}"


def port_stats(links: Sequence[LinkStats], nodes: tuple[str, ...], cluster: Cluster,
               nic_Bps: np.ndarray | None = None, *, slow_fraction: float = SLOW_FRACTION,
               threshold: float = -OUTLIER_Z) -> tuple[tuple[PortStats, ...], tuple[LinkStats, ...]]:
    """Every port that carried network traffic (by node, out before in), and the links with their port.

    ``nic_Bps`` is float64 [N, 2]: per node of ``nodes``, the NIC counters' rate out and in (NaN: unknown).
    A port is slow like a link: modified z-score of log capacity < ``threshold`` against its peers (same
    direction, same node group), or capacity below ``slow_fraction`` of the node's nominal rate. A slow
    link's ``port`` is the slow port at either end that it saturates (β ≥ ``LIMITS`` × capacity), the
    slower one if both do; a slow link with no such port is ``unexplained``.
    """
    n = len(nodes)
    net = [lk for lk in links if not lk.local]
    beta = np.array([lk.bandwidth_Bps for lk in net] * 2, np.float64)
    ends = np.array([lk.src for lk in net] + [n + lk.dst for lk in net], np.int64)  # each link's out, then in
    other = np.concatenate([ends[len(net):], ends[:len(net)]])
    count = np.bincount(ends, minlength=2 * n)
    capacity = np.full(2 * n, np.nan)
    np.fmax.at(capacity, ends, beta)
    node = np.arange(2 * n) % n
    direction = np.where(np.arange(2 * n) < n, "out", "in")
    peers = np.array([f"{d}|{cluster.node_group.get(nodes[i], '')}" for i, d in zip(node, direction, strict=True)])
    score = np.full(2 * n, np.nan)
    far_below = np.zeros(2 * n, bool)
    for group in set(peers[count > 0]):
        members = np.flatnonzero((peers == group) & (count > 0))
        with np.errstate(divide="ignore", invalid="ignore"):
            score[members] = modified_z(np.log(capacity[members]), min_scale=RELATIVE_JITTER)
        if len(members) >= 3:
            far_below[members] = capacity[members] < FAR_BELOW_PEERS * np.nanmedian(capacity[members])
    # A port is only bounded when every link through it runs at the other end's capacity: those links show
    # the other port, and this one may be as fast as it likes (qvx-03's way in, fed by two slow senders).
    shown = np.zeros(2 * n, bool)
    np.logical_or.at(shown, ends, capacity[other] > (1 + RELATIVE_JITTER) * beta)
    bound = (count > 0) & ~shown
    outlier = ((np.nan_to_num(score, nan=0.0) < threshold) | far_below) & ~bound
    nominal = np.array([np.nan if (v := cluster.nominal_Bps(nodes[i])) is None else v for i in node], np.float64)
    below = (capacity < slow_fraction * nominal) & ~bound
    slow = outlier | below
    # One direction far slower than the other: the faster one's shortfall is the slow one's doing (its
    # acknowledgements queue behind the choked direction), not a second broken part.
    other_way = np.concatenate([np.arange(n, 2 * n), np.arange(n)])
    shadowed = slow & slow[other_way] & (capacity > SHADOW * capacity[other_way])
    slow &= ~shadowed

    # Every link that runs at a slow port's capacity is limited by it, and so slow itself, whether or not
    # its own score stood out: links that cross a bad port are few, and among links of very different
    # speeds their scores may not.
    candidates = {(lk.src, lk.dst): [q for q in (lk.src, n + lk.dst) if _limits(lk, q, capacity, slow)]
                  for lk in net}
    load = np.bincount([q for qs in candidates.values() for q in qs], minlength=2 * n)
    # The slower port; within jitter of each other, the one that explains more slow links; then "out".
    named = {pair: min(qs, key=lambda q, qs=qs: (capacity[q] > (1 + RELATIVE_JITTER) * capacity[qs].min(),
                                                 -load[q], q))
             for pair, qs in candidates.items() if qs}
    # A link slow in its own right through a shadowed port is explained by the port that shadows it; it is
    # not made slow by it (its shortfall is the acknowledgements', which its own figures already show).
    for lk in net:
        if lk.slow and (lk.src, lk.dst) not in named:
            behind = [int(other_way[q]) for q in (lk.src, n + lk.dst)
                      if shadowed[q] and lk.bandwidth_Bps >= LIMITS * capacity[q]]
            if behind:
                named[lk.src, lk.dst] = behind[0]
    nic = np.full((n, 2), np.nan) if nic_Bps is None else np.asarray(nic_Bps, np.float64).reshape(n, 2)
    nic_port = np.concatenate([nic[:, 0], nic[:, 1]])
    explains: dict[int, list[tuple[str, str]]] = {}
    for (src, dst), p in named.items():
        explains.setdefault(int(p), []).append((nodes[src], nodes[dst]))
    ports = []
    for p in np.flatnonzero(count > 0):
        i = int(node[p])
        reason = "" if shadowed[p] else ", ".join(
            r for r, hit in (("outlier", outlier[p]), ("below-nominal", below[p])) if hit)
        seen = float(nic_port[p]) if np.isfinite(nic_port[p]) else None
        ports.append(PortStats(
            node=i, node_name=nodes[i], direction=str(direction[p]), links=int(count[p]),  # type: ignore[arg-type]
            capacity_Bps=float(capacity[p]), lower_bound=bool(bound[p]), nominal_Bps=cluster.nominal_Bps(nodes[i]),
            nic_Bps=seen, nic_disagrees=bool(seen is not None and seen > (1 + NIC_MARGIN) * capacity[p]),
            score=float(score[p]), slow=bool(reason), reason=reason,
            explains=tuple(explains.get(int(p), ())),
            shadowed_by=f"{nodes[i]} {direction[other_way[p]]}" if shadowed[p] else None,
        ))
    ports.sort(key=lambda ps: (ps.node, ps.direction != "out"))
    out_links = []
    for lk in links:
        p = named.get((lk.src, lk.dst)) if not lk.local else None
        name = None if p is None else f"{nodes[p % n]} {'out' if p < n else 'in'}"
        reason = lk.reason if p is None else ", ".join(filter(None, (lk.reason, "slow port")))
        if p is None and lk.slow and not lk.local:
            # A slow link no port limits, whose acknowledgements leave through a slow port (the receiver's way
            # out, or come in through the sender's way in): that port is its cause, named as such (RFC 9293:
            # TCP acknowledges in the reverse direction), not a second fault of unknown origin.
            acks = [q for q in (lk.dst, n + lk.src) if slow[q]]
            if acks:
                q = min(acks, key=lambda q: capacity[q])
                name = f"{nodes[q % n]} {'out' if q < n else 'in'} (acknowledgements)"
        hours = lk.hours_at_stake if reason or lk.hours_at_stake is None else 0.0  # only slow links put hours at stake
        unexplained = lk.slow and not lk.local and name is None
        same = (name, bool(reason), reason, hours, unexplained) == (lk.port, lk.slow, lk.reason, lk.hours_at_stake,
                                                                    lk.unexplained)
        out_links.append(lk if same else replace(lk, port=name, slow=bool(reason), reason=reason,
                                                 hours_at_stake=hours, unexplained=unexplained))
    return tuple(ports), tuple(out_links)


def _limits(lk: LinkStats, p: int, capacity: np.ndarray, slow: np.ndarray) -> bool:
    """A slow port limits a link that runs at about the port's capacity."""
    return bool(slow[p]) and bool(lk.bandwidth_Bps >= LIMITS * capacity[p])


def name_alert_ports(alerts: Sequence[Alert], links: Sequence[LinkStats]) -> tuple[Alert, ...]:
    """Add the likely port to each link-throughput alert, and say so in its message.

    The port is the one that explains the link in this window when there is one; otherwise a shared cause:
    when every network link out of the sender (two or more) raised an alert, its way out, else when every
    link into the receiver did, its way in; failing that, the port the link's acknowledgements cross when
    every link through it alerted (the receiver's way out, or the sender's way in). A lone link's drop
    names no port.
    """
    net = [lk for lk in links if not lk.local]
    by_subject = {f"{lk.src_name}→{lk.dst_name}": lk for lk in net}
    alerted = {lk.src_name + "→" + lk.dst_name for lk in net} & {al.subject for al in alerts}
    out = []
    for al in alerts:
        lk = by_subject.get(al.subject) if al.kind == "link-throughput" else None
        port = None if lk is None else lk.port or _shared_cause(lk, net, alerted)
        out.append(al if port is None else replace(al, port=port, message=f"{al.message}; likely port {port}"))
    return tuple(out)


def _shared_cause(lk: LinkStats, net: Sequence[LinkStats], alerted: set[str]) -> str | None:
    for side, same, direction in ((lk.src, lambda x: x.src, "out"), (lk.dst, lambda x: x.dst, "in")):
        peers = [f"{x.src_name}→{x.dst_name}" for x in net if same(x) == side]
        if len(peers) >= 2 and all(s in alerted for s in peers):
            return f"{lk.src_name if direction == 'out' else lk.dst_name} {direction}"
    # The link's acknowledgements travel the other way: every link out of its receiver (or into its sender)
    # slowing too points at that node's port, which the acknowledgements queue behind.
    for side, same, name, direction in ((lk.dst, lambda x: x.src, lk.dst_name, "out"),
                                        (lk.src, lambda x: x.dst, lk.src_name, "in")):
        peers = [f"{x.src_name}→{x.dst_name}" for x in net if same(x) == side]
        if len(peers) >= 2 and all(s in alerted for s in peers):
            return f"{name} {direction} (acknowledgements)"
    return None

"""Concurrent flows: how much of its bottleneck port each transfer had while it ran.

Two flows out of one node share its way out, so each sees only part of the port. ``links.py`` divides a
transfer's byte-moving time by this share to fit the rate the path gives a transfer that has it to
itself. Pure numpy, one sort for the whole window.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

SATURATED = 0.6  # a port moving ≥ 60 % of its usual busy level is full; common practice, no source
FAIR = 0.6  # a flow at ≥ 60 % of the mean rate of the port's flows has its fair share; common practice, no source
BUSY_QUANTILE = 0.9  # time-weighted quantile of a port's aggregate rate taken as its busy level; no source
BINS_PER_OCTAVE = 16  # resolution of that quantile (4.4 %), ample for a 60 % test
OVER_NOMINAL = 1.1  # room for rounding and a nominal rate quoted as payload; common practice, no source


def port_load(port: np.ndarray, lo: np.ndarray, hi: np.ndarray, nbytes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per item: bytes its port moved during [lo, hi), and the flow-seconds the port carried then.

    Each item moves its bytes at a uniform rate n / (hi − lo) over its interval (the probe sees only the
    ends). A port's rate is then piecewise constant; its integral is read at every item's ends after one
    sort of all ends by (port, time), so the cost is one sort and a few cumulative sums, whatever the
    overlap. Items must have hi > lo.
    """
    m = len(port)
    if m == 0:
        return np.zeros(0), np.zeros(0)
    t = np.concatenate([lo, hi])
    order, event_port = _by_port_and_time(np.concatenate([port, port]), t)
    rate = nbytes / (hi - lo)
    # Random access dominates the cost, so the columns travel together: one gather, one scatter.
    events = np.column_stack([t, np.concatenate([rate, -rate]), np.repeat([1.0, -1.0], m)])[order]
    dt = np.diff(events[:, 0])
    dt[event_port[1:] != event_port[:-1]] = 0.0  # no integral across ports (each one's rate ends at 0)
    after = np.cumsum(events[:-1, 1:], axis=0)  # the port's rate and flow count after each event
    integral = np.zeros((2 * m, 2))
    np.cumsum(after * dt[:, None], axis=0, out=integral[1:])
    at = np.empty((2 * m, 2))  # bytes moved and flow-seconds up to each event, back in item order
    at[order] = integral
    # The item's own bytes are part of it; clipping removes rounding when the interval is near the clock's grain.
    return np.maximum(at[m:, 0] - at[:m, 0], nbytes), np.maximum(at[m:, 1] - at[:m, 1], hi - lo)


def _by_port_and_time(port: np.ndarray, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Indices that order events by port, then time, and the port of each event in that order.

    One ``np.sort`` of packed uint64 keys (port | time on a grid | index), several times faster than an
    argsort. Events closer than the grid (the window's span / 2^bits: tens of nanoseconds for a 100 s
    window of a million transfers) may come in either order, which moves an integral by rate × grid. When
    too few bits are left for time, a float argsort does it.
    """
    n = len(t)
    t0, span = float(t.min()), float(t.max() - t.min())
    port_bits, index_bits = max(1, int(port.max()).bit_length()), max(1, (n - 1).bit_length())
    time_bits = min(52, 64 - port_bits - index_bits)
    if time_bits < 24:
        order = np.argsort(port + 0.5 * (t - t0) / (span if span > 0 else 1.0))
        return order, port[order]
    grid = ((t - t0) * ((2.0**time_bits - 1) / (span if span > 0 else 1.0))).astype(np.uint64)
    key = (port.astype(np.uint64) << np.uint64(time_bits + index_bits)) | (grid << np.uint64(index_bits))
    key |= np.arange(n, dtype=np.uint64)
    key.sort()
    return (key & np.uint64((1 << index_bits) - 1)).astype(np.int64), key >> np.uint64(time_bits + index_bits)


def busy_bins(rate: np.ndarray, bins_per_octave: int = BINS_PER_OCTAVE) -> np.ndarray:
    """Each rate's bin on a fixed log grid (bin k holds [2^(k/b), 2^((k+1)/b))): the same grid for every
    window, so histograms of different steps add up (the per-step summaries keep them that way)."""
    return np.floor(np.log2(rate) * bins_per_octave).astype(np.int64)


def busy_level(port: np.ndarray, rate: np.ndarray, seconds: np.ndarray, n_ports: int, *,
               quantile: float = BUSY_QUANTILE, bins_per_octave: int = BINS_PER_OCTAVE) -> np.ndarray:
    """Per port, the time-weighted ``quantile`` of the aggregate rate its items saw (NaN: no items).

    Time-weighted so that a few tiny transfers, whose intervals catch spikes, cannot set the level; a high
    quantile so that time spent waiting (unknown waits lower the rate) does not. A log histogram (one
    bincount) on the fixed grid of ``busy_bins`` stands in for a sort: the same grid as the per-step
    summaries' histograms, so both paths find the same level (``level_of_bins``).
    """
    ok = (rate > 0) & np.isfinite(rate) & (seconds > 0)
    return level_of_bins(port[ok], busy_bins(rate[ok], bins_per_octave), seconds[ok], n_ports, quantile=quantile,
                         bins_per_octave=bins_per_octave)


def level_of_bins(port: np.ndarray, bins: np.ndarray, seconds: np.ndarray, n_ports: int, *,
                  quantile: float = BUSY_QUANTILE, bins_per_octave: int = BINS_PER_OCTAVE) -> np.ndarray:
    """``busy_level`` from (port, bin, seconds) items on the fixed grid of ``busy_bins``, which may be sums of
    several steps' (per-step summaries): the grid's bins do not depend on the window, so both give one level."""
    level = np.full(n_ports, np.nan)
    if len(bins) == 0:
        return level
    low = int(bins.min())
    n_bins = int(min(64 * bins_per_octave, int(bins.max()) - low)) + 1
    b = np.minimum(bins - low, n_bins - 1)
    hist = np.bincount(port * n_bins + b, weights=seconds, minlength=n_ports * n_bins).reshape(n_ports, n_bins)
    cum = np.cumsum(hist, axis=1)
    has = cum[:, -1] > 0
    first = np.argmax(cum >= quantile * cum[:, -1:], axis=1)
    level[has] = 2.0 ** ((low + first[has] + 1) / bins_per_octave)  # the bin's upper edge
    return level


def bottleneck_share(src_node: np.ndarray, dst_node: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                     nbytes: np.ndarray, nominal_Bps: np.ndarray) -> np.ndarray:
    """Per network transfer, the share of its bottleneck port's bytes it carried while it ran (1: alone).

    A port is a transfer's bottleneck when the port was full and the transfer had at least its fair share
    there (the bottleneck of max-min fairness: Bertsekas & Gallager, Data Networks, §6.5). "Full" is
    judged against the port's own busy level (``busy_level``), "fair" against the mean rate of the port's
    flows during the transfer. Why both: a port that is merely shared with a flow limited elsewhere (L's
    way out carrying L→X, slow because X's way in is, next to a fast L→Y) is full, but L→X does not have
    its fair share there, so L→X keeps its own rate. When both ports qualify, the one that moved more bytes
    meanwhile is taken: a port's busy level is only what it was seen to do, and a way in fed by a shaped
    sender and a healthy one never fills, yet looks full against its own level (n1's way in when n2's way
    out is shaped, next to n0's full way out). When neither qualifies the transfer was not slowed by
    sharing and keeps its own rate. A port whose busy level exceeds its nominal rate (``nominal_Bps`` per
    node, NaN: unknown) by more than ``OVER_NOMINAL`` is never full: no card moves more than its line rate,
    so flows that seem to share it do not (clock offsets that fake an overlap; a wrong nominal rate only
    turns the correction off). Ports are indexed ``node`` (out) and ``n_nodes + node`` (in).
    """
    flows = port_flows(src_node, dst_node, lo, hi, nbytes, len(nominal_Bps))
    return shares(flows, busy_level(flows.port, flows.aggregate, flows.seconds, 2 * len(nominal_Bps)), nominal_Bps)


@dataclass(frozen=True)
class PortFlows:
    """Each transfer twice, at its way out (first half) and its way in: what its port carried meanwhile."""

    port: np.ndarray  # node (out) or n_nodes + node (in)
    nbytes: np.ndarray
    seconds: np.ndarray
    during: np.ndarray  # bytes the port moved while the transfer ran
    flow_s: np.ndarray  # flow-seconds the port carried meanwhile

    @property
    def aggregate(self) -> np.ndarray:
        return self.during / self.seconds


def port_flows(src_node: np.ndarray, dst_node: np.ndarray, lo: np.ndarray, hi: np.ndarray, nbytes: np.ndarray,
               n_nodes: int) -> PortFlows:
    """``port_load`` at both ends of every network transfer."""
    port = np.concatenate([src_node, n_nodes + np.asarray(dst_node)]).astype(np.int64)
    lo2, hi2, n2 = np.concatenate([lo, lo]), np.concatenate([hi, hi]), np.concatenate([nbytes, nbytes])
    during, flow_s = port_load(port, lo2, hi2, n2)
    return PortFlows(port, n2, hi2 - lo2, during, flow_s)


def shares(flows: PortFlows, level: np.ndarray, nominal_Bps: np.ndarray) -> np.ndarray:
    """``bottleneck_share`` given each port's busy level (its window's, or a summary's of the same window)."""
    m = len(flows.port) // 2
    level = level.copy()
    level[level > OVER_NOMINAL * np.concatenate([nominal_Bps, nominal_Bps])] = np.inf
    share = flows.nbytes / flows.during
    bottleneck = (flows.aggregate >= SATURATED * level[flows.port]) & (share * flows.flow_s / flows.seconds >= FAIR)
    s_out, s_in = share[:m], share[m:]
    b_out, b_in = bottleneck[:m], bottleneck[m:]
    return np.where(b_out & b_in, np.minimum(s_out, s_in),
                    np.where(b_out, s_out, np.where(b_in, s_in, 1.0)))

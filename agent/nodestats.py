"""Node figures for the daemon: NIC byte rates and totals, CPU and memory use, sampled with psutil.

psutil is only the source of raw counters; the arithmetic (rates from deltas, counter resets, the wire's
caps on NIC count and name length) lives in ``nic_rates`` so tests can feed it fake counters.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import psutil

from agent import wire

MIN_INTERVAL_S = 1e-6  # the wire rejects a zero interval; two samples in one clock tick still make sense


class NicCounters(NamedTuple):
    """Cumulative bytes a NIC has sent and received since boot (or since its counters were reset)."""

    bytes_sent: int
    bytes_recv: int


@dataclass(frozen=True, slots=True)
class NodeFigures:
    """One sample, shaped for ``wire.encode_node`` (``nic_values`` rows per ``wire.NIC_COLUMNS``)."""

    cpu_percent: float
    memory_percent: float
    interval_s: float
    nics: tuple[str, ...]
    nic_values: np.ndarray  # float64 [4, N]: sent_Bps, recv_Bps, sent_total, recv_total


def nic_rates(previous: Mapping[str, NicCounters], current: Mapping[str, NicCounters],
              interval_s: float) -> tuple[tuple[str, ...], np.ndarray]:
    """Per-NIC bytes/s out and in over ``interval_s``, plus the current totals.

    NICs are sorted by name and capped at ``wire.MAX_NICS``; a name longer than the wire allows is left
    out rather than cut (cut names could collide). A NIC that is new, or whose counter went
    backwards (driver reset, interface re-created), has no rate for this interval: 0, not a negative spike.
    """
    interval_s = max(interval_s, MIN_INTERVAL_S)
    names = sorted(name for name in current if len(name.encode()) <= wire.MAX_NAME_BYTES)[:wire.MAX_NICS]
    values = np.zeros((len(wire.NIC_COLUMNS), len(names)), dtype=np.float64)
    for column, name in enumerate(names):
        now = current[name]
        before = previous.get(name)
        values[2, column], values[3, column] = now.bytes_sent, now.bytes_recv
        if before is not None:
            values[0, column] = max(now.bytes_sent - before.bytes_sent, 0) / interval_s
            values[1, column] = max(now.bytes_recv - before.bytes_recv, 0) / interval_s
    return tuple(names), values


def psutil_counters() -> dict[str, NicCounters]:
    """This node's NIC counters; psutil already folds 32-bit counter wrap-arounds (``nowrap``)."""
    return {name: NicCounters(c.bytes_sent, c.bytes_recv)
            for name, c in psutil.net_io_counters(pernic=True).items()}


def psutil_memory_percent() -> float:
    return float(psutil.virtual_memory().percent)


def psutil_cpu_percent() -> float:
    """CPU use since the previous call, over all cores (psutil keeps the previous reading)."""
    return float(psutil.cpu_percent(interval=None))


class NodeSampler:
    """Turns successive counter readings into rates. The sources are injectable for tests."""

    def __init__(
        self,
        counters: Callable[[], Mapping[str, NicCounters]] = psutil_counters,
        cpu_percent: Callable[[], float] = psutil_cpu_percent,
        memory_percent: Callable[[], float] = psutil_memory_percent,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._counters, self._cpu, self._memory, self._clock = counters, cpu_percent, memory_percent, clock
        # Prime every delta so the first sample covers the time since construction, not since boot.
        self._cpu()
        self._previous = dict(self._counters())
        self._previous_at = self._clock()

    def sample(self) -> NodeFigures:
        now = self._clock()
        current = dict(self._counters())
        interval = max(now - self._previous_at, MIN_INTERVAL_S)
        nics, values = nic_rates(self._previous, current, interval)
        self._previous, self._previous_at = current, now
        return NodeFigures(self._cpu(), self._memory(), interval, nics, values)

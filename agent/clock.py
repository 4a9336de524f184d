"""Clocks a probe can time with. Any zero-argument callable returning integer nanoseconds will do.

The default is ``time.perf_counter_ns``: monotonic and cheap (about 100 ns for a pair of calls on the
machines we measured, see DESIGN §6). Only differences between readings in one process are ever used. On a
GPU a host clock times launches, not work: time with device markers instead (``Probe(device=...)``,
``agent/device.py``), not with a clock that synchronises.
"""

from __future__ import annotations

import time
from collections.abc import Callable

Clock = Callable[[], int]

default_clock: Clock = time.perf_counter_ns


class ManualClock:
    """A clock that moves only when told to: for tests and for generating recordings from a model."""

    __slots__ = ("now",)

    def __init__(self, start_ns: int = 0) -> None:
        self.now = start_ns

    def __call__(self) -> int:
        return self.now

    def advance(self, ns: int) -> None:
        self.now += ns

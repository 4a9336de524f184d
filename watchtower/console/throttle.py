"""Coalescing of snapshots so a fast feed costs at most a few redraws per second."""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Generic, TypeVar

T = TypeVar("T")


class Throttle(Generic[T]):
    """Keeps only the newest item and releases it at most once per interval.

    The clock is injectable so tests decide when time passes instead of sleeping.
    """

    def __init__(self, interval_s: float = 0.25, clock: Callable[[], float] = time.monotonic) -> None:
        self.interval_s = interval_s
        self._clock = clock
        self._pending: T | None = None
        self._released_at: float | None = None

    @property
    def pending(self) -> bool:
        """True when an item is waiting for its turn."""
        return self._pending is not None

    def offer(self, item: T) -> None:
        """Queue `item`, replacing any older one that has not been released yet."""
        self._pending = item

    def wait_s(self) -> float:
        """Seconds until the pending item may be released (0 when it may go now)."""
        if self._released_at is None:
            return 0.0
        return max(0.0, self._released_at + self.interval_s - self._clock())

    def take(self) -> T | None:
        """The pending item if its turn has come, else None."""
        if self._pending is None or self.wait_s() > 0:
            return None
        item, self._pending = self._pending, None
        self._released_at = self._clock()
        return item

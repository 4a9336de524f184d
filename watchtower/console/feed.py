"""What the console needs from a source of snapshots, and a fixed-list source.

The console knows nothing about sockets, collectors or recordings: anything that can hand it
snapshot dictionaries (docs/snapshot.md) and, for a replay, be steered, plugs in here.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, Protocol

Snapshot = dict[str, Any]
"""One job snapshot as described in docs/snapshot.md."""

Deliver = Callable[[Snapshot], None]
"""Called by a feed with each new snapshot; safe to call from any thread."""

ReportSeek = Callable[[dict[str, Any]], None]
"""Called by a replay while a seek reads ahead without building snapshots (a build costs as much as reading
many records), at most once a snapshot period: `snapshot["replay"]` as it stands mid-way, plus
`seek: (target, start)`. Safe to call from any thread."""


class FeedEnded(Exception):
    """Raised by a feed's ``start`` when its source is gone for good (a followed recording vanished): the
    console then closes and the command prints this one-line message."""


class ReplayControls(Protocol):
    """Steering for a recording being replayed; the console calls these from its keys."""

    def pause(self) -> None: ...

    def resume(self) -> None: ...

    def step(self, n: int = 1) -> None: ...

    def seek(self, step: int) -> None: ...

    def set_speed(self, x: float) -> None: ...

    def report_seeks_to(self, report: ReportSeek) -> None:
        """Where to say how far a seek has come, so a long one visibly advances."""


class Feed(Protocol):
    """A source of snapshots; `start` runs in a thread worker and returns after `stop`."""

    controls: ReplayControls | None
    """Replay steering, or None for a live job (the replay keys are then hidden)."""

    def start(self, deliver: Deliver) -> None: ...

    def stop(self) -> None: ...


class StaticFeed:
    """Hands out a fixed list of snapshots, the first on start and each further one on `advance`.

    Used by the tests (deterministic delivery) and to look at a saved `report --json` output.
    """

    def __init__(self, snapshots: Sequence[Snapshot], controls: ReplayControls | None = None) -> None:
        self.controls = controls
        self.stopped = False
        self._snapshots = list(snapshots)
        self._next = 0
        self._deliver: Deliver | None = None

    def start(self, deliver: Deliver) -> None:
        """Remember where to deliver and hand over the first snapshot."""
        self._deliver = deliver
        self.advance()

    def advance(self) -> bool:
        """Deliver the next snapshot; False when the list is exhausted or the feed is stopped."""
        if self._deliver is None or self._next >= len(self._snapshots):
            return False
        snapshot = self._snapshots[self._next]
        self._next += 1
        self._deliver(snapshot)
        return True

    def stop(self) -> None:
        """Deliver nothing more."""
        self._deliver = None
        self.stopped = True

"""Deferred device timing: markers recorded on a device's streams now, read when the device has passed them.

On a GPU, kernels and collectives run asynchronously: a host clock read in a hook measures the launch, not
the work, and a device-wide synchronise to fix that would serialise the very overlap Watchtower measures.
So with a device backend a timed region records a *marker* on the stream at its start and one at its end
(for PyTorch, ``torch.cuda.Event(enable_timing=True)``); the step is kept as pending, and at each
``end_step`` the probe asks the markers whether the device has reached them (``query``, which never
waits) and publishes every pending step that is complete, oldest first. On a busy device that is one or
two steps behind the host; one ``MAX_PENDING_STEPS`` behind (``agent/probe.py``) is stuck, and its oldest
step is given up.

Markers come from one pool and go back to it once their step is published: after the first steps no
region allocates one. The backend is anything that fits ``Markers``: the CUDA one lives in
``agent/integrations/torch.py`` (this module does not import torch), the tests drive a simulated device.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

Marker = Any  # whatever the backend's markers are (a CUDA event, a simulated marker)
Stream = Any  # a backend's stream; None means the backend's current stream

COMPUTE, EXCHANGE = 0, 1  # the row of a layer's figure a region adds to


class Markers(Protocol):
    """What a device must offer: markers that are recorded on a stream and read without waiting."""

    def create(self) -> Marker:
        """A new marker, ready to be recorded (called only while the pool grows)."""

    def record(self, marker: Marker, stream: Stream = None) -> None:
        """Enqueue ``marker`` on ``stream`` (None: the current stream); it completes when the device
        reaches it. Recording a marker again replaces its earlier recording."""

    def query(self, marker: Marker) -> bool:
        """Whether the device has passed the marker; never waits."""

    def elapsed_ns(self, start: Marker, end: Marker) -> int:
        """Device nanoseconds from ``start`` to ``end``, both complete (may be negative across streams)."""


class MarkerPool:
    """Markers reused across steps: ``take`` records one (creating it only if none is free), ``give``
    returns it once read. Tolerates ``take`` from another thread (a collective's callback)."""

    __slots__ = ("_free", "_record", "backend", "created")

    def __init__(self, backend: Markers) -> None:
        self.backend = backend
        self.created = 0
        self._free: list[Marker] = []
        self._record = backend.record  # bound once: ``take`` runs twice per region

    def take(self, stream: Stream = None) -> Marker:
        try:
            marker = self._free.pop()
        except IndexError:
            marker = self.backend.create()
            self.created += 1
        self._record(marker, stream)
        return marker

    def give(self, markers: Sequence[Marker]) -> None:
        self._free.extend(markers)

    @property
    def free(self) -> int:
        return len(self._free)


@dataclass(slots=True)
class Transfer:
    """A transfer timed by markers, e.g. on a collective's own stream; ``exposed_ns`` is filled in when the
    step is resolved, from the wait windows that name it."""

    layer: int
    op: int
    peer: int
    group: int
    nbytes: int
    start: Marker
    end: Marker = None
    wait_ns: int = 0
    exposed_ns: int = 0


@dataclass(slots=True)
class Window:
    """The compute stream waiting for ``transfers``: from ``start`` (its work before the wait is done) to
    ``end`` (it resumes). That span is the exposed part of those transfers."""

    start: Marker
    end: Marker
    transfers: list[Transfer]


@dataclass(slots=True)
class PendingStep:
    """A step the host has ended and the device may not have: its markers and what they time."""

    step: int
    wall_ns: int
    origin: Marker  # the marker that began the step (the previous step's ``last``)
    last: Marker  # the marker that ended it
    regions: list[tuple[int, int, Marker, Marker]]  # (row COMPUTE/EXCHANGE, layer, start, end)
    blocking: list[Transfer]  # exchanges timed on the compute stream: their whole time is blocked time
    transfers: list[Transfer]  # transfers on their own streams: only what a window exposes counts
    windows: list[Window]
    loose: list[Marker]  # markers taken with ``Probe.mark``
    markers: list[Marker] = field(default_factory=list)  # every marker, for the readiness check
    checked: int = 0  # markers[:checked] are known complete

    def __post_init__(self) -> None:
        marks = self.markers
        for _, _, start, end in self.regions:
            marks += (start, end)
        for t in (*self.blocking, *self.transfers):
            marks += (t.start, t.end)
        for w in self.windows:
            marks += (w.start, w.end)
        marks += self.loose
        marks.append(self.last)

    def ready(self, backend: Markers) -> bool:
        """Whether the device has passed every marker of the step; asks only about markers not yet seen
        complete, so a step is never queried twice for the same marker once it answered yes."""
        marks, query = self.markers, backend.query
        while self.checked < len(marks):
            if not query(marks[self.checked]):
                return False
            self.checked += 1
        return True


def split_exposed(window_start: int, window_end: int, intervals: Sequence[tuple[int, int]]) -> list[int]:
    """How much of the wait ``[window_start, window_end]`` each transfer ``(start, end)`` accounts for.

    Taken in order of completion, each transfer is charged the part of the wait up to its end that no
    earlier one was charged; a transfer done before the wait began (hidden behind compute) costs nothing,
    and the charges add up to at most the wait. All times on one clock."""
    charged = [0] * len(intervals)
    cursor = window_start
    for i in sorted(range(len(intervals)), key=lambda k: intervals[k][1]):
        start, end = intervals[i]
        until = min(end, window_end)
        charged[i] = max(0, until - max(cursor, start))
        cursor = max(cursor, until)
    return charged


def union_ns(intervals: list[tuple[int, int]]) -> int:
    """The length of the union of ``intervals``: overlapping exchanges count once."""
    total, reach = 0, None
    for start, end in sorted(intervals):
        if reach is None or start > reach:
            total += end - start
            reach = end
        elif end > reach:
            total += end - reach
            reach = end
    return total

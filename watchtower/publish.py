"""``collect`` builds snapshots and publishes them; attached consoles only draw (``watchtower.subscribe``).

Between two drains, at most every ``period_s``, collect's loop copies what a snapshot needs from the store
(``snapshot.gather_snapshot``: the window, series and the facts only the collector knows) and hands the copy
to a thread of its own, which analyses it, serialises the snapshot to one JSON message and sends it on a PUB
socket bound to ipc in the private run folder (the attach beacon names it, ``snapshots``). Frame intake
pauses only for the copy; the analysis runs beside it, sharing the interpreter.

The socket conflates (ZMQ_CONFLATE on PUB and on every subscriber: a pipe holds one message, the newest;
it takes single-part messages only, which a snapshot is). A slow console therefore skips snapshots and a
stopped or vanished one costs one queued message, never old snapshots and never a blocked send. While a
build is under way the loop gathers nothing new, and the next one waits at least as long as the last build
took (and at least the period): the builds then hold at most about half of the interpreter, whose lock they
share with intake, and a slow build makes snapshots rarer, never a backlog.
"""

from __future__ import annotations

import contextlib
import json
import os
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import zmq

from watchtower.attach import run_dir
from watchtower.snapshot import SnapshotParts, analyse_parts, finish_snapshot

PUBLISH_PERIOD_S = 0.25  # as often as a console draws by default (``watch --interval``)


def figures(parts: SnapshotParts) -> dict[str, Any]:
    """Where a published snapshot's figures come from: the full analysis of collect's store window, as a
    console analysed it before. The one place to switch to the per-step summaries once they give every figure."""
    return analyse_parts(parts)


def encode(snapshot: dict[str, Any]) -> bytes:
    """One snapshot as one message: compact JSON (the snapshot holds no NaN: a missing figure is null)."""
    return json.dumps(snapshot, separators=(",", ":"), allow_nan=False).encode()


@dataclass
class PublisherStats:
    """What publishing cost (``collect`` says so when it stops)."""

    published: int = 0
    gather_s: float = 0.0  # on collect's loop: frame intake waits for this
    build_s: float = 0.0  # on the publisher's thread: analysis, snapshot and JSON
    dropped: int = 0  # sends refused (none expected: a conflating PUB never fills)
    failed: int = 0  # builds that raised


class SnapshotPublisher:
    """Publishes snapshots gathered by ``gather`` (called on collect's loop, via ``tick``)."""

    def __init__(self, gather: Callable[[], SnapshotParts], *, period_s: float = PUBLISH_PERIOD_S,
                 folder: Path | None = None, context: zmq.Context | None = None,
                 on_error: Callable[[str], None] | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.gather, self.period_s, self.clock = gather, period_s, clock
        self.on_error = on_error  # called on the publisher's thread
        self.path = (folder or run_dir()) / f"snapshots-{os.getpid()}.sock"
        self.endpoint = f"ipc://{self.path}"
        self.stats = PublisherStats()
        self._socket = (context or zmq.Context.instance()).socket(zmq.PUB)
        self._socket.setsockopt(zmq.LINGER, 0)
        self._socket.setsockopt(zmq.CONFLATE, 1)
        self._socket.bind(self.endpoint)
        self._cond = threading.Condition()
        self._parts: SnapshotParts | None = None
        self._busy = False
        self._stopped = False
        self._last = -float("inf")
        self._build_s = 0.0  # the last build's wall time
        self._thread = threading.Thread(target=self._run, name="snapshot-publisher", daemon=True)
        self._thread.start()  # from here on only that thread uses the socket, until close() has joined it

    def tick(self) -> None:
        """On collect's loop, between drains: gather a snapshot's parts for the thread when one is due."""
        with self._cond:
            if self._busy or self.clock() - self._last < max(self.period_s, self._build_s):
                return
            self._busy = True
        started = time.perf_counter()
        parts = self.gather()
        self.stats.gather_s += time.perf_counter() - started
        with self._cond:
            self._parts = parts
            self._cond.notify()

    def _run(self) -> None:
        while True:
            with self._cond:
                while self._parts is None and not self._stopped:
                    self._cond.wait()
                if self._stopped:
                    return
                parts, self._parts = self._parts, None
            started = time.perf_counter()
            try:
                self._publish(parts)
            except Exception as exc:  # a failed build must not stop collection: say so once
                self.stats.failed += 1
                if self.stats.failed == 1 and self.on_error is not None:
                    self.on_error(f"building a snapshot failed ({type(exc).__name__}: {exc}); "
                                  "collection goes on, consoles keep the last snapshot")
            with self._cond:
                self._busy = False
                self._last = self.clock()
                self._build_s = time.perf_counter() - started

    def _publish(self, parts: SnapshotParts) -> None:
        started = time.perf_counter()
        snapshot = finish_snapshot(parts, figures(parts))
        message = encode(snapshot)
        try:
            self._socket.send(message, flags=zmq.NOBLOCK)
            self.stats.published += 1
        except zmq.Again:
            self.stats.dropped += 1
        self.stats.build_s += time.perf_counter() - started

    def summary(self) -> str:
        """One line: how many snapshots, and what they cost the loop and the thread."""
        stats, n = self.stats, max(1, self.stats.published + self.stats.failed)
        return (f"{stats.published} snapshots published to consoles ({stats.gather_s / n * 1e3:.1f} ms each on the "
                f"receiving loop, {stats.build_s / n:.2f} s each on the publisher's thread)"
                + (f"; {stats.failed} builds failed" if stats.failed else ""))

    def close(self) -> None:
        with self._cond:
            self._stopped = True
            self._cond.notify()
        self._thread.join()
        self._socket.close()
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()

"""Sources that ingest and analyse in the console's own process: a live collector (``watch --listen``), a
recording followed as a collector appends to it (``watch --follow``), a recording replayed.

Each feed runs in the console's thread worker: it ingests frames through the same ``Ingest`` path, builds
a snapshot at most every ``period_s`` and hands it to ``deliver``. ``start`` returns soon after ``stop``.
Live and replay differ only in where the frames come from. A console attached to a running ``collect``
ingests nothing: it draws the snapshots collect publishes (``watchtower.subscribe``).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from agent import wire
from watchtower.cluster import Cluster
from watchtower.collector import Collector
from watchtower.console.feed import Deliver, FeedEnded, ReportSeek
from watchtower.ingest import Ingest
from watchtower.recording import RecordingError, RecordingReader, Tail, read_meta, resume_records
from watchtower.snapshot import build_snapshot, cluster_for

SNAPSHOT_PERIOD_S = 0.25
ASK_PERIOD_S = 1.0  # how often an attached console asks its collector for what the file cannot say
CONSOLE_WINDOW_STEPS = 120  # the console's figures cover the recent steps, so a change shows soon


class _Snapshots:
    """Builds snapshots from an ingest no more often than ``period_s`` (and always when forced)."""

    def __init__(self, ingest: Ingest, cluster: Cluster | None, meta: dict, source: dict[str, str],
                 security: dict[str, Any] | None, window_steps: int | None, period_s: float,
                 clock: Callable[[], float], wall: Callable[[], int] | None = None) -> None:
        self.ingest, self.meta, self.source, self.security = ingest, meta, source, security
        self.wall = wall  # live sources: ages are measured against the wall clock, growing while nobody speaks
        self.cluster = cluster_for(meta, cluster)
        self.window_steps, self.period_s, self.clock = window_steps, period_s, clock
        self._last = -float("inf")

    def due(self) -> bool:
        return self.clock() - self._last >= self.period_s

    def build(self, replay: dict[str, Any] | None = None, recorder: dict[str, Any] | None = None) -> dict[str, Any]:
        """The period runs from the end of a build: on a loaded machine a build slower than the period would
        otherwise make every record ingested after it due for another build, and the feed would crawl."""
        snapshot = build_snapshot(self.ingest, self.cluster, source=self.source, meta=self.meta,
                                  security=self.security, window_steps=self.window_steps, replay=replay,
                                  recorder=recorder, now_ns=None if self.wall is None else self.wall())
        self._last = self.clock()
        return snapshot


class LiveFeed:
    """Collector and console in one process (``watchtower watch --listen``)."""

    controls = None

    def __init__(self, collector: Collector, *, cluster: Cluster | None = None, security: dict[str, Any] | None,
                 window_steps: int | None = CONSOLE_WINDOW_STEPS, period_s: float = SNAPSHOT_PERIOD_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.collector = collector
        self._stop = threading.Event()
        self._snapshots = _Snapshots(collector.ingest, cluster, {}, {"kind": "live", "where": collector.bound},
                                     security, window_steps, period_s, clock, time.time_ns)

    def start(self, deliver: Deliver) -> None:
        deliver(self._snapshots.build(recorder=self._recorder()))
        try:
            while not self._stop.is_set():
                self.collector.drain(50)
                self.collector.tick()
                if self._snapshots.due():
                    deliver(self._snapshots.build(recorder=self._recorder()))
        finally:
            self.collector.close()

    def _recorder(self) -> dict[str, Any] | None:
        recorder = self.collector.recorder
        return None if recorder is None else recorder.status()

    def stop(self) -> None:
        self._stop.set()


class AttachFeed:
    """Follows the recording of a ``watchtower collect`` that keeps running after the console closes
    (``watch --follow``, or a collect that publishes no snapshots).

    It reads the whole history first, then picks up each record as the collector appends it. It only
    reads: closing the console never stops collection, and any number of consoles can follow one run.
    """

    controls = None

    def __init__(self, recording: Path, *, security: dict[str, Any] | None, cluster: Cluster | None = None,
                 window_steps: int | None = CONSOLE_WINDOW_STEPS, period_s: float = SNAPSHOT_PERIOD_S,
                 poll_s: float = 0.1, clock: Callable[[], float] = time.monotonic,
                 ask: Callable[[], dict[str, Any] | None] | None = None) -> None:
        self.recording = recording
        self.poll_s = poll_s
        self._ask, self._asked, self._recorder = ask, -float("inf"), None
        self.clock = clock
        self._stop = threading.Event()
        with open(recording, "rb") as stream:
            meta = read_meta(stream)
            self._offset = stream.tell()
        self.ingest = Ingest()
        self._snapshots = _Snapshots(self.ingest, cluster, meta, {"kind": "attached", "where": str(recording)},
                                     security, window_steps, period_s, clock, time.time_ns)

    def start(self, deliver: Deliver) -> None:
        while not self._stop.is_set():
            self.catch_up()
            deliver(self._snapshots.build(recorder=self._recorder_state()))
            self._stop.wait(max(self.poll_s, self._snapshots.period_s))

    def _recorder_state(self) -> dict[str, Any] | None:
        """The collector's recorder state (a full disk does not show in the file), asked at most once a
        second; the last answer stands while the collector does not answer."""
        if self._ask is not None and self.clock() - self._asked >= ASK_PERIOD_S:
            self._asked = self.clock()
            info = self._ask()
            if info is not None:
                self._recorder = info.get("recorder")
        return self._recorder

    def catch_up(self) -> int:
        """Ingest every complete record appended since the last call; returns how many. Raises
        ``FeedEnded`` when the recording is gone or was cut shorter than what was read."""
        try:
            if self.recording.stat().st_size < self._offset:
                raise FeedEnded(f"the recording {self.recording} was truncated while being followed")
            tail = Tail(consumed=self._offset)
            count = self.ingest.feed_all(resume_records(self.recording, tail))
        except OSError as exc:
            raise FeedEnded(f"the recording {self.recording} is gone ({exc.strerror}); "
                            "was its collector stopped and the file removed?") from None
        self._offset = tail.consumed  # a half-written last record is read again next time, whole
        return count

    def stop(self) -> None:
        self._stop.set()


class ReplayFeed:
    """A recording through the console at ``speed`` times its recorded pace, steerable by its controls.

    Seeking forward fast-forwards; seeking backward starts again from the top (the store is built up in
    order), so memory stays bounded by the store, never by the file.
    """

    def __init__(self, path: Path, *, cluster: Cluster | None = None, speed: float = 1.0, from_step: int = 0,
                 window_steps: int | None = CONSOLE_WINDOW_STEPS, period_s: float = SNAPSHOT_PERIOD_S,
                 clock: Callable[[], float] = time.monotonic, where: str | None = None) -> None:
        self.path, self.cluster, self.window_steps = path, cluster, window_steps
        self.where = str(path) if where is None else where  # what the header names as the source
        self.period_s, self.clock = period_s, clock
        self.controls = self
        self.first_step, self.last_step, self.meta = _scan(path)
        self._cond = threading.Condition()
        self._stopped = False
        self._paused = False
        self._speed = speed
        self._target: int | None = min(max(from_step, self.first_step), self.last_step)  # first thing shown
        self._rewind = False
        self._report_seek: ReportSeek | None = None
        self.tail: Tail | None = None
        self._open()

    # ------------------------------------------------------------------ controls (called from the UI)
    def pause(self) -> None:
        with self._cond:
            self._paused = True
            self._cond.notify_all()

    def resume(self) -> None:
        with self._cond:
            self._paused = False
            self._anchor = None
            self._cond.notify_all()

    def step(self, n: int = 1) -> None:
        with self._cond:
            self._paused = True
            self._target = self.position + n
            self._cond.notify_all()

    def seek(self, step: int) -> None:
        with self._cond:
            step = min(max(step, self.first_step), self.last_step)
            self._rewind = step < self.position
            self._target = step
            self._cond.notify_all()

    def set_speed(self, x: float) -> None:
        with self._cond:
            self._speed = x
            self._anchor = None
            self._cond.notify_all()

    def stop(self) -> None:
        with self._cond:
            self._stopped = True
            self._cond.notify_all()

    def report_seeks_to(self, report: ReportSeek) -> None:
        self._report_seek = report

    # ------------------------------------------------------------------ the feed's thread
    @property
    def position(self) -> int:
        return self.ingest.store.newest_complete_step()

    def _open(self) -> None:
        self._reader = RecordingReader(self.path)
        self._records: Iterator[tuple[int, list[bytes]]] = iter(self._reader)
        self.ingest = Ingest()
        self._snapshots = _Snapshots(self.ingest, self.cluster, self.meta, {"kind": "replay", "where": self.where},
                                     None, self.window_steps, self.period_s, self.clock)
        self._anchor: tuple[float, int] | None = None
        self._pending: tuple[int, list[bytes]] | None = None
        self._finished = False

    def _state(self) -> dict[str, Any]:
        return {"step": self.position, "first_step": self.first_step, "last_step": self.last_step,
                "speed": self._speed, "paused": self._paused or self._finished}

    def start(self, deliver: Deliver) -> None:
        try:
            while True:
                with self._cond:
                    if self._stopped:
                        return
                    if self._rewind:
                        self._reader.close()
                        self._open()
                        self._rewind = False
                    target = self._target
                    idle = self._finished or (self._paused and target is None)
                    if idle:
                        self._cond.wait(0.25)
                        continue
                if target is not None:
                    self._fast_forward(target)
                    with self._cond:
                        if self._target != target:
                            continue  # a newer seek replaced this one: no snapshot of a place nobody wants
                        self._target = None
                    deliver(self._snapshots.build(self._state()))
                    continue
                if self._play_one() and self._snapshots.due():
                    deliver(self._snapshots.build(self._state()))
                if self._finished:
                    self.tail = self._reader.tail
                    deliver(self._snapshots.build(self._state()))
        finally:
            self._reader.close()

    def _fast_forward(self, target: int) -> None:
        """Read up to ``target`` without building snapshots, saying how far it has come once a period; a newer
        seek or a stop cuts it short."""
        start, reported = self.position, self.clock()
        while self.position < target and not self._finished and not self._stopped and self._target == target:
            now = self.clock()
            if self._report_seek is not None and now - reported >= self.period_s:
                reported = now
                self._report_seek({**self._state(), "seek": (target, start)})
            self._next_record()
        self._anchor = None

    def _play_one(self) -> bool:
        """Ingest the next record when its time has come at the current speed; False while waiting."""
        record = self._peek()
        if record is None:
            return False
        received_ns = record[0]
        now = self.clock()
        if self._anchor is None:
            self._anchor = (now, received_ns)
        due = self._anchor[0] + (received_ns - self._anchor[1]) * 1e-9 / self._speed
        if due > now:
            with self._cond:
                self._cond.wait(min(due - now, self.period_s))
            return False
        self._next_record()
        return True

    def _peek(self) -> tuple[int, list[bytes]] | None:
        if self._pending is None and not self._finished:
            self._pending = next(self._records, None)
            if self._pending is None:
                self._finished = True
        return self._pending

    def _next_record(self) -> None:
        record = self._peek()
        if record is not None:
            self._pending = None
            self.ingest.feed(*record)


def _scan(path: Path) -> tuple[int, int, dict]:
    """First and last step in a recording, from the step frames' fixed parts alone (no full decode)."""
    first, last = None, -1
    with RecordingReader(path) as reader:
        for _, frames in reader:
            if len(frames) == 4 and wire.peek_kind(frames[0]) == wire.Kind.STEP and \
                    len(frames[1]) == wire.STEP_META.size:
                step = wire.STEP_META.unpack(frames[1])[0]
                first = step if first is None else min(first, step)
                last = max(last, step)
        meta = reader.meta
    if first is None:
        raise RecordingError(f"{path} holds no steps to replay")
    return first, last, meta

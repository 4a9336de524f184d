"""A long seek in a real replay, through the Pilot: the bar moves with the seek as the feed reads, the views
wait for the place asked for, and pause/play and speed keep working afterwards."""

from __future__ import annotations

import re
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from agent import Probe
from agent.clock import ManualClock
from watchtower.console import ConsoleApp, StaticFeed
from watchtower.console.replaybar import ReplayBar
from watchtower.feeds import SNAPSHOT_PERIOD_S, ReplayFeed
from watchtower.recording import Recorder

from .conftest import FakeClock, RecordingControls, settle
from .scenario import make_snapshot

STEPS = 400
RECORDS_PER_REPORT = 20
RECORD_GAP_NS = 50_000_000  # between records as they arrived: playing at 2x reads about 40 a second


class TickingClock:
    """A monotonic clock that moves a fixed amount each time it is read, so how often a seek reports depends
    only on how many records it reads, never on how fast the machine is."""

    def __init__(self, tick_s: float) -> None:
        self.now, self.tick_s = 1000.0, tick_s
        self._wall_from: float | None = None
        self._lock = threading.Lock()

    def follow_the_wall(self) -> None:
        """From now on move with real time: playing then goes at its real pace (seconds to the end of the
        recording), so a key pressed meanwhile lands before the end, however often the feed reads the clock."""
        with self._lock:
            self._wall_from = time.monotonic() - self.now

    def __call__(self) -> float:
        with self._lock:
            if self._wall_from is not None:
                return time.monotonic() - self._wall_from
            self.now += self.tick_s
            return self.now


@pytest.fixture(scope="module")
def recording(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A seeded two-rank job of STEPS steps, the ranks' messages interleaved as they would arrive."""
    rng = np.random.default_rng(20261202)
    clocks = [ManualClock(), ManualClock()]
    probes = [Probe(rank, 2, f"n{rank}", None, clock=clocks[rank]) for rank in range(2)]
    for _ in range(STEPS):
        for probe, clock in zip(probes, clocks, strict=True):
            for layer in ("embed", "mlp", "head"):
                with probe.compute(layer):
                    clock.advance(int(rng.uniform(1e6, 2e6)))
                with probe.exchange(layer, peer=1 - probe.rank, nbytes=1 << 20):
                    clock.advance(int(rng.uniform(3e6, 4e6)))
            probe.end_step()
    path = tmp_path_factory.mktemp("seek") / "job.wtrace"
    recorder = Recorder(path)
    messages = [frames for pair in zip(*(p.sent_frames for p in probes), strict=True) for frames in pair]
    for arrival, frames in enumerate(messages):
        recorder.write(1_000_000_000 + arrival * RECORD_GAP_NS, frames)
    recorder.close()
    return path


async def until(pilot: Any, condition: Callable[[], bool], timeout_s: float = 30.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        assert time.monotonic() < deadline, "the console did not get there in time"
        await pilot.pause(0.02)


def bar_text(app: ConsoleApp) -> str:
    return app.query_one(ReplayBar).render().plain


async def test_a_long_seek_moves_the_bar_as_the_feed_reads(recording: Path) -> None:
    clock = TickingClock(SNAPSHOT_PERIOD_S / RECORDS_PER_REPORT + 1e-9)
    feed = ReplayFeed(recording, clock=clock)
    feed.pause()
    first, last = feed.first_step, feed.last_step
    target = first + (last - first) // 2  # one `]`: half the recording to read
    app = ConsoleApp(feed, seek_steps=target - first)
    async with app.run_test(size=(100, 30)) as pilot:
        await until(pilot, lambda: app.snapshot is not None)
        shown: list[str] = []  # the bar's text each time it changed, as the user saw it
        app.watch(app.query_one(ReplayBar), "position", lambda: shown.append(bar_text(app)), init=False)
        await pilot.press("right_square_bracket")
        await until(pilot, lambda: app.snapshot["replay"]["step"] == target and "SEEKING" not in bar_text(app))
        landed = bar_text(app)

        seeking = [re.search(r"SEEKING to ([\d,]+) .* step ([\d,]+) of ([\d,]+)", text) for text in shown]
        assert all(m[1] == m[3] == f"{target:,}" for m in seeking if m is not None), shown
        reached = [int(m[2].replace(",", "")) for m in seeking if m is not None]
        moving = sorted(set(reached) - {first})
        # Two messages a step (one per rank), a report every RECORDS_PER_REPORT records read: about
        # (target - first) * 2 / RECORDS_PER_REPORT reports on the way, each further along than the one before.
        assert len(moving) >= (target - first) * 2 // RECORDS_PER_REPORT - 2, shown
        assert reached == sorted(reached) and all(first < step < target for step in moving)
        assert f"step {target:,}" in landed and "PAUSED" in landed

        clock.follow_the_wall()  # playing at 2×: about 40 records a second, 5 s to the end of the recording
        await pilot.press("plus", "plus", "minus")  # every press counts while paused: 1 → 2 → 4 → 2
        await pilot.pause()
        assert "×2 " in bar_text(app) and "PAUSED" in bar_text(app)
        await pilot.press("space")
        await until(pilot, lambda: app.snapshot["replay"]["step"] > target)  # the feed plays again...
        assert app.snapshot["replay"]["speed"] == 2.0 and not app.snapshot["replay"]["paused"]  # ...at 2×
        assert "PLAYING" in bar_text(app)
        await pilot.press("space")
        await pilot.pause()
        assert "PAUSED" in bar_text(app)
        await pilot.press("full_stop")  # one step on: the paused feed answers with where it is, still paused
        await until(pilot, lambda: app.snapshot["replay"]["paused"])
        assert "PAUSED" in bar_text(app) and app.snapshot["replay"]["step"] < last


async def test_seek_progress_is_shown_until_the_seek_lands(clock: FakeClock, controls: RecordingControls) -> None:
    feed_snapshots = [make_snapshot(1210, replay=True), make_snapshot(2000, replay=True)]
    feed = StaticFeed(feed_snapshots, controls=controls)
    app = ConsoleApp(feed, clock=clock, seek_steps=790)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("right_square_bracket")
        assert controls.report_seek is not None
        for step in (1400, 1700, 1900):
            controls.report_seek({**feed_snapshots[0]["replay"], "step": step, "seek": (2000, 1210)})
            await pilot.pause()
            assert "SEEKING to 2,000" in bar_text(app) and f"step {step:,} of 2,000" in bar_text(app)
        clock.advance(1.0)
        feed.advance()
        await pilot.pause()
        assert "SEEKING" not in bar_text(app) and "step 2,000" in bar_text(app)


def test_a_newer_seek_cuts_a_long_one_short(recording: Path) -> None:
    # Asked mid-way through a seek to the end, a seek back to near the start is where the replay goes next,
    # without first reading the rest of the file or drawing the place nobody wants any more.
    feed = ReplayFeed(recording, clock=TickingClock(SNAPSHOT_PERIOD_S / RECORDS_PER_REPORT + 1e-9))
    feed.pause()
    reports: list[dict[str, Any]] = []
    delivered: list[dict[str, Any]] = []
    back = feed.first_step + 5

    def report(position: dict[str, Any]) -> None:
        reports.append(position)
        if len(reports) == 2:
            feed.seek(back)  # from the feed's own thread: deterministic, mid-way through the first seek

    feed.report_seeks_to(report)
    thread = threading.Thread(target=feed.start, args=(delivered.append,), daemon=True)
    thread.start()
    try:
        deadline = time.monotonic() + 30
        while len(delivered) < 1:
            assert time.monotonic() < deadline, "the replay never showed its first step"
            time.sleep(0.01)
        feed.seek(feed.last_step)
        while len(delivered) < 2:
            assert time.monotonic() < deadline, "the replay never got back"
            time.sleep(0.01)
    finally:
        feed.stop()
        thread.join(timeout=10)
    assert [d["replay"]["step"] for d in delivered] == [feed.first_step, back]
    assert reports[0]["seek"][0] == reports[1]["seek"][0] == feed.last_step
    assert all(r["seek"][0] == back for r in reports[2:])  # cut short: nothing more read towards the end

"""The real sources of snapshots: a replayed recording, a live collector, a followed recording, discovery."""

from __future__ import annotations

import queue
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
import zmq

from agent import Probe
from agent.clock import ManualClock
from tests.demo_story import generator
from watchtower.attach import Beacon, find_collectors
from watchtower.collector import Collector
from watchtower.console import ConsoleApp
from watchtower.demo import DEMO_RECORDING
from watchtower.feeds import AttachFeed, LiveFeed, ReplayFeed
from watchtower.ingest import Ingest
from watchtower.recording import Recorder, encode_record

from .conftest import screen_text


class Running:
    """A feed started on its own thread, with every delivered snapshot queued for the test."""

    def __init__(self, feed: Any) -> None:
        self.feed = feed
        self.delivered: queue.Queue[dict[str, Any]] = queue.Queue()
        self.thread = threading.Thread(target=feed.start, args=(self.delivered.put,), daemon=True)
        self.thread.start()

    def until(self, condition: Callable[[dict[str, Any]], bool], timeout_s: float = 20.0) -> dict[str, Any]:
        """The first delivered snapshot that satisfies ``condition``; the deadline only bounds a broken test."""
        deadline = time.monotonic() + timeout_s
        while True:
            snapshot = self.delivered.get(timeout=max(0.01, deadline - time.monotonic()))
            if condition(snapshot):
                return snapshot

    def close(self) -> None:
        self.feed.stop()
        self.thread.join(timeout=10)
        assert not self.thread.is_alive(), "a feed must return from start() soon after stop()"


@pytest.fixture
def replay() -> Iterator[Running]:
    feed = ReplayFeed(DEMO_RECORDING, speed=1.0)
    feed.pause()
    running = Running(feed)
    yield running
    running.close()


def test_replay_knows_its_extent_and_seeks_both_ways(replay: Running) -> None:
    feed = replay.feed
    assert (feed.first_step, feed.last_step) == (0, 419)
    feed.seek(300)
    forward = replay.until(lambda s: s["replay"]["step"] >= 300)
    assert forward["replay"]["step"] == 300 and forward["replay"]["paused"]
    assert any(a["step_detected"] <= 300 for a in forward["alerts"])  # the degrading way out (generator.DEGRADE_AT)
    feed.seek(50)
    back = replay.until(lambda s: s["replay"]["step"] < 300)
    assert back["replay"]["step"] == 50 and back["alerts"] == []
    feed.step(1)
    assert replay.until(lambda s: s["replay"]["step"] != 50)["replay"]["step"] == 51


def test_replay_plays_at_speed_and_ends_paused(replay: Running) -> None:
    feed = replay.feed
    feed.seek(415)
    replay.until(lambda s: s["replay"]["step"] == 415)
    feed.set_speed(64.0)
    feed.resume()
    end = replay.until(lambda s: s["replay"]["step"] == 419 and s["replay"]["paused"])
    assert end["replay"]["speed"] == 64.0 and end["steps"] == 420
    assert feed.tail is not None and feed.tail.clean


async def test_console_on_a_real_replay_seeks_to_the_end_with_a_key() -> None:
    feed = ReplayFeed(DEMO_RECORDING, speed=1.0)
    feed.pause()
    app = ConsoleApp(feed)
    async with app.run_test(size=(80, 24)) as pilot:
        await _until(pilot, lambda: app.snapshot is not None)
        await pilot.press(">")
        await _until(pilot, lambda: app.snapshot["replay"]["step"] == 419)
        await pilot.press("4")
        await _until(pilot, lambda: generator().DEGRADING_NODE in screen_text(app))
        text = screen_text(app)
    assert "step time" in text and "INVENTED SCENARIO" in text


async def _until(pilot: Any, condition: Callable[[], bool], timeout_s: float = 20.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        assert time.monotonic() < deadline, "the console did not get there in time"
        await pilot.pause(0.05)


def test_live_feed_shows_ranks_as_their_frames_arrive(endpoint: str, zmq_context: zmq.Context) -> None:
    collector = Collector(endpoint, Ingest(), context=zmq_context)
    running = Running(LiveFeed(collector, security={"mode": "loopback", "warning": None}, period_s=0.05))
    try:
        assert running.until(lambda s: True)["ranks"] == 0
        clocks = [ManualClock(), ManualClock()]
        probes = [Probe(r, 2, f"node{r}", collector.bound, clock=clocks[r], context=zmq_context) for r in range(2)]
        for _ in range(5):
            for probe, clock in zip(probes, clocks, strict=True):
                with probe.compute("mlp"):
                    clock.advance(1_000_000)
                with probe.exchange("mlp", peer=1 - probe.rank, nbytes=1 << 20):
                    clock.advance(3_000_000)
                probe.end_step()
        snapshot = running.until(lambda s: s["steps"] == 5 and s["ranks"] == 2)
        assert snapshot["source"]["kind"] == "live"
        assert snapshot["layers"][0]["name"] == "mlp" and snapshot["layers"][0]["comm_bound"]
        assert snapshot["loss"]["missing"] == 0
        for probe in probes:
            probe.close()
    finally:
        running.close()


def test_following_a_recording_picks_up_appended_records_whole(tmp_path: Path) -> None:
    probe = Probe(0, 1, "n0", None, clock=ManualClock())
    for _ in range(4):
        probe.end_step()
    frames = probe.sent_frames
    path = tmp_path / "run.wtrace"
    recorder = Recorder(path)
    recorder.write(1, frames[0])
    recorder.write(2, frames[1])
    feed = AttachFeed(path, security=None)
    assert feed.catch_up() == 2
    half = encode_record(3, frames[2])
    with open(path, "ab") as stream:
        stream.write(half[:10])  # the collector is in the middle of writing a record
    assert feed.catch_up() == 0
    with open(path, "ab") as stream:
        stream.write(half[10:])
    recorder.write(4, frames[3])
    assert feed.catch_up() == 2 and feed.ingest.steps == 3  # schema + 3 steps in 4 frames
    recorder.close()


def test_a_running_collect_is_found_and_a_stale_socket_removed(tmp_path: Path, endpoint: str) -> None:
    run = tmp_path / "run"
    run.mkdir(mode=0o700)
    (run / "collect-999999999.sock").touch()  # left behind by a collector that died
    process = subprocess.Popen([sys.executable, "-m", "watchtower.cli", "collect", "--listen", endpoint,
                                "--record", str(tmp_path / "live.wtrace")],
                               env={**_env(), "WATCHTOWER_RUN_DIR": str(run)}, stdout=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 20
        found = []
        while not found:
            assert time.monotonic() < deadline and process.poll() is None
            found = find_collectors(run)
            time.sleep(0.05)
        assert found[0].pid == process.pid and found[0].recording == tmp_path / "live.wtrace"
        assert found[0].security["mode"] == "loopback"
        assert not (run / "collect-999999999.sock").exists()
    finally:
        process.terminate()
        out, _ = process.communicate(timeout=20)
    assert process.returncode == 0 and "0 missing" in out
    assert list(run.glob("*.sock")) == []  # the collector took its socket away


def test_beacon_answers_with_what_it_was_given(tmp_path: Path, zmq_context: zmq.Context) -> None:
    beacon = Beacon({"recording": "/x.wtrace", "listen": "tcp://127.0.0.1:1", "security": {"mode": "keys"}},
                    zmq_context, tmp_path)
    answering = threading.Event()

    def serve() -> None:
        while not answering.is_set():
            beacon.answer()
            time.sleep(0.005)

    thread = threading.Thread(target=serve)
    thread.start()
    try:
        (found,) = find_collectors(tmp_path, zmq_context)
    finally:
        answering.set()
        thread.join()
        beacon.close()
    assert found.recording == Path("/x.wtrace") and found.security == {"mode": "keys"}


def _env() -> dict[str, str]:
    import os

    return dict(os.environ)


async def test_console_on_a_live_collector_shows_the_ranks_as_they_report(endpoint: str,
                                                                        zmq_context: zmq.Context) -> None:
    collector = Collector(endpoint, Ingest(), context=zmq_context)
    app = ConsoleApp(LiveFeed(collector, security={"mode": "loopback", "warning": None}, period_s=0.05))
    async with app.run_test(size=(80, 24)) as pilot:
        await _until(pilot, lambda: app.snapshot is not None)
        clocks = [ManualClock(), ManualClock()]
        probes = [Probe(r, 2, f"host-{r}", collector.bound, clock=clocks[r], context=zmq_context) for r in range(2)]
        for _ in range(3):
            for probe, clock in zip(probes, clocks, strict=True):
                with probe.compute("[red]attn[/]"):  # markup from the wire stays text
                    clock.advance(2_000_000)
                probe.end_step()
        await _until(pilot, lambda: app.snapshot["ranks"] == 2 and app.snapshot["steps"] == 3)
        await pilot.pause(0.3)  # one redraw period
        text = screen_text(app)
        for probe in probes:
            probe.close()
    assert "2/2" in text and "[red]attn[/]" in text


def test_live_demo_watches_real_ranks_and_stops_them_on_exit() -> None:
    import psutil

    from watchtower.demo import run_demo

    seen: dict[str, Any] = {}

    def console(feed: Any) -> int:
        running = Running(feed)
        try:
            seen["snapshot"] = running.until(lambda s: s["ranks"] == 3 and s["steps"] >= 3, timeout_s=60)
            seen["children"] = len(psutil.Process().children())
        finally:
            running.close()
        return 0

    assert run_demo(live=True, speed=1.0, ranks=3, window=120, run_console=console) == 0
    assert seen["children"] == 3 and {link["src"] for link in seen["snapshot"]["links"]} == {
        "local-0", "local-1", "local-2"}
    assert psutil.Process().children() == []  # every rank it started is gone


def test_a_run_folder_open_to_others_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from watchtower.attach import run_dir
    from watchtower.errors import UsageError

    folder = tmp_path / "run"
    folder.mkdir(mode=0o777)
    folder.chmod(0o777)  # as a stranger could leave it in a shared /tmp
    monkeypatch.setenv("WATCHTOWER_RUN_DIR", str(folder))
    with pytest.raises(UsageError, match="private"):
        run_dir()
    folder.chmod(0o700)
    assert run_dir() == folder

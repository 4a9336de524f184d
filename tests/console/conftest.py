"""Shared pieces for the console tests: a clock that moves only when told, recording replay controls."""

from __future__ import annotations

import io
from collections.abc import Callable
from typing import Any

import pytest
from rich.console import Console
from textual.app import App
from textual.pilot import Pilot

from watchtower.console import ConsoleApp, StaticFeed

from .scenario import make_snapshot


class FakeClock:
    """A monotonic clock for the redraw throttle that advances only when a test says so."""

    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now

    def advance(self, seconds: float) -> None:
        """Let `seconds` pass."""
        self.now += seconds


class RecordingControls:
    """Replay controls that remember every call, in order."""

    def __init__(self) -> None:
        self.calls: list[tuple[str, Any]] = []
        self.report_seek: Callable[[dict[str, Any]], None] | None = None  # the console's, once it has started

    def pause(self) -> None:
        self.calls.append(("pause", None))

    def resume(self) -> None:
        self.calls.append(("resume", None))

    def step(self, n: int = 1) -> None:
        self.calls.append(("step", n))

    def seek(self, step: int) -> None:
        self.calls.append(("seek", step))

    def set_speed(self, x: float) -> None:
        self.calls.append(("set_speed", x))

    def report_seeks_to(self, report: Callable[[dict[str, Any]], None]) -> None:
        self.report_seek = report


async def settle(pilot: Pilot[Any]) -> None:
    """Wait until the feed's thread has delivered and the app has drawn what it delivered."""
    await pilot.app.workers.wait_for_complete()
    await pilot.pause()
    await pilot.pause()


def screen_text(app: App[Any]) -> str:
    """The screen as plain text, the way a user would read it."""
    width, height = app.size
    console = Console(width=width, height=height, file=io.StringIO(), force_terminal=True, record=True)
    console.print(app.screen._compositor.render_update(full=True, screen_stack=app._background_screens))
    return console.export_text(styles=False)


@pytest.fixture
def clock() -> FakeClock:
    return FakeClock()


@pytest.fixture
def controls() -> RecordingControls:
    return RecordingControls()


@pytest.fixture
def live_app(clock: FakeClock) -> ConsoleApp:
    """The console on a live feed holding the scenario at step 1210, then at 1300."""
    return ConsoleApp(StaticFeed([make_snapshot(1210), make_snapshot(1300)]), clock=clock)


@pytest.fixture
def replay_app(clock: FakeClock, controls: RecordingControls) -> ConsoleApp:
    """The console on a replay of the scenario, with controls that record what the keys ask for."""
    return ConsoleApp(StaticFeed([make_snapshot(1210, replay=True)], controls=controls), clock=clock)

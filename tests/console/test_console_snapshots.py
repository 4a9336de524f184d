"""How each view looks, from the deterministic scenario, at the smallest supported size and a large one.

Baselines live in __snapshots__/; after a reviewed change regenerate them with `--snapshot-update`.
"""

from __future__ import annotations

from typing import Any

import pytest
from textual.pilot import Pilot

from watchtower.console import ConsoleApp, StaticFeed

from .conftest import FakeClock, RecordingControls, settle
from .scenario import make_snapshot

VIEW_KEYS = {
    "layers": [],
    "ranks": ["down", "enter"],
    "links": ["2"],
    "nodes": ["3"],
    "alerts": ["4", "down"],
    "how": ["2", "question_mark"],
    "replay": [],
    "keys": ["k"],
    "frozen": ["space"],
    "filtered": ["slash", *"block", "enter"],
}
SIZES = [(80, 24), (160, 48)]


@pytest.mark.parametrize("size", SIZES, ids=lambda size: f"{size[0]}x{size[1]}")
@pytest.mark.parametrize("view", list(VIEW_KEYS))
def test_view_looks_right(snap_compare: Any, view: str, size: tuple[int, int]) -> None:
    snapshot = make_snapshot(1210, replay=view == "replay")
    controls = RecordingControls() if view == "replay" else None
    app = ConsoleApp(StaticFeed([snapshot], controls=controls), clock=FakeClock())

    async def run_before(pilot: Pilot[Any]) -> None:
        await settle(pilot)
        await pilot.press(*VIEW_KEYS[view])
        await pilot.pause()

    assert snap_compare(app, terminal_size=size, run_before=run_before)

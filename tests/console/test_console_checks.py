"""The Links view labels links measured by the node daemons' pair checks (a collective-only job)."""

from __future__ import annotations

from watchtower.console import ConsoleApp, StaticFeed
from watchtower.console.links import CHECK_MARK

from .conftest import FakeClock, screen_text, settle
from .scenario import make_snapshot


async def test_checked_links_are_labelled_in_the_links_view(clock: FakeClock) -> None:
    snapshot = make_snapshot()
    for link in snapshot["links"]:
        link.update(measured_by="check", check_every_s=5.3, of_nominal=None, hours_at_stake=None)
    app = ConsoleApp(StaticFeed([snapshot]), clock=clock)
    async with app.run_test(size=(160, 30)) as pilot:
        await settle(pilot)
        await pilot.press("2")
        await pilot.pause()
        text = screen_text(app)
    assert "measured by check every 5 s" in text
    assert f" {CHECK_MARK} " in text


async def test_job_links_carry_no_check_label(clock: FakeClock) -> None:
    app = ConsoleApp(StaticFeed([make_snapshot()]), clock=clock)
    async with app.run_test(size=(160, 30)) as pilot:
        await settle(pilot)
        await pilot.press("2")
        await pilot.pause()
        text = screen_text(app)
    assert "measured by check" not in text

"""Names from the wire reach the screen as the characters they are: no markup, no terminal escapes."""

from __future__ import annotations

import unicodedata

from hypothesis import given
from hypothesis import strategies as st

from watchtower.console import ConsoleApp, StaticFeed
from watchtower.console.format import literal, visible

from .conftest import FakeClock, screen_text, settle
from .scenario import make_snapshot

MARKUP = "[bold red]x[/]"
ESCAPE = "\x1b[31mred\x1b[0m"


def hostile_snapshot() -> dict:
    snapshot = make_snapshot(1210)
    snapshot["job"] = "[link=http://x]job[/link]"
    layer = snapshot["layers"][11]  # grad.allreduce: first row by exchange
    layer["name"] = MARKUP
    for rank in layer["worst_ranks"]:
        rank["node"] = ESCAPE
    snapshot["nodes"][0]["name"] = ESCAPE
    return snapshot


async def test_markup_and_escapes_in_names_are_shown_literally(clock: FakeClock) -> None:
    app = ConsoleApp(StaticFeed([hostile_snapshot()]), clock=clock)
    async with app.run_test(size=(120, 36)) as pilot:
        await settle(pilot)
        layers = screen_text(app)
        await pilot.press("enter")
        await pilot.pause()
        drill = screen_text(app)
        await pilot.press("escape", "3")
        await pilot.pause()
        nodes = screen_text(app)
    assert "[link=http://x]job[/link]" in layers
    assert MARKUP in layers  # in the table and, whole, in the detail line
    assert MARKUP in drill
    shown_escape = "\\x1b[31mred\\x1b[0m"
    assert shown_escape in nodes
    assert "\\x1b[31mred" in drill
    for text in (layers, drill, nodes):
        assert "\x1b" not in text


@given(st.text())
def test_visible_leaves_no_control_or_format_characters(raw: str) -> None:
    shown = visible(raw)
    assert not [ch for ch in shown if unicodedata.category(ch) in {"Cc", "Cf", "Cs", "Co", "Zl", "Zp"}]


def test_visible_spells_out_escapes_and_bidi_overrides() -> None:
    assert visible("a\x1b[31mb\nc\u202ed") == "a\\x1b[31mb\\nc\\u202ed"


def test_literal_does_not_parse_markup() -> None:
    text = literal(MARKUP)
    assert text.plain == MARKUP and not text.spans

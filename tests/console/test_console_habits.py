"""Terminal habits and figures that must never mislead, driven through the Pilot: replay keys that never
wedge, a frozen live view, filtering at scale, writing the view, the size limits, and cells never cut."""

from __future__ import annotations

import csv
import json
from pathlib import Path
from typing import Any

import pytest
from textual.widgets import DataTable

from watchtower.console import ConsoleApp, StaticFeed
from watchtower.console.header import JobHeader
from watchtower.console.replaybar import ReplayBar

from .conftest import FakeClock, RecordingControls, screen_text, settle
from .scenario import make_snapshot


def column(app: ConsoleApp, selector: str, label: str) -> list[str]:
    """The plain text of the column headed `label`, top to bottom."""
    table = app.screen.query_one(selector, DataTable)
    keys = [c.key for c in table.columns.values() if c.label.plain == label]
    assert keys, f"no column {label!r}"
    return [table.get_cell_at((row, list(table.columns).index(keys[0]))).plain for row in range(table.row_count)]


async def test_pause_then_play_never_wedges_when_the_feed_goes_quiet(clock: FakeClock,
                                                                      controls: RecordingControls) -> None:
    # A paused feed delivers nothing more, so its last snapshot still says "playing"; the bar used to keep
    # "▶ PLAYING" and every further space asked to pause again.
    app = ConsoleApp(StaticFeed([make_snapshot(1210, replay=True)], controls=controls), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("space")
        await pilot.pause()
        assert "PAUSED" in screen_text(app)
        await pilot.press("space")
        await pilot.pause()
        assert "PLAYING" in screen_text(app)
        await pilot.press("space")
        await pilot.pause()
    assert controls.calls == [("pause", None), ("resume", None), ("pause", None)]


async def test_every_speed_press_counts_while_paused(clock: FakeClock, controls: RecordingControls) -> None:
    paused = make_snapshot(1210, replay=True)
    paused["replay"]["paused"] = True  # speed 2×; no further snapshot arrives while paused
    app = ConsoleApp(StaticFeed([paused], controls=controls), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("plus", "plus", "plus", "minus")
        await pilot.pause()
        assert "×8" in screen_text(app)
    assert controls.calls == [("set_speed", 4.0), ("set_speed", 8.0), ("set_speed", 16.0), ("set_speed", 8.0)]


async def test_a_long_seek_shows_where_it_goes_until_it_gets_there(clock: FakeClock,
                                                                  controls: RecordingControls) -> None:
    feed = StaticFeed([make_snapshot(1210, replay=True), make_snapshot(2400, replay=True)], controls=controls)
    app = ConsoleApp(feed, clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("greater_than_sign")
        await pilot.pause()
        bar = app.query_one(ReplayBar).render().plain
        assert "SEEKING to 2,400" in bar and "▒" in bar  # the stretch still to read
        clock.advance(1.0)
        feed.advance()
        await pilot.pause()
        assert "SEEKING" not in app.query_one(ReplayBar).render().plain
    assert controls.calls == [("seek", 2400)]


async def test_space_freezes_a_live_view_while_the_feed_keeps_ingesting(clock: FakeClock) -> None:
    later = make_snapshot(1300)
    later["layers"][9]["per_step"]["exchange_s"] = 1.0  # "norm" would jump to the top by exchange
    feed = StaticFeed([make_snapshot(1210), later])
    app = ConsoleApp(feed, clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        before = column(app, "#layers-table", "layer")
        await pilot.press("down", "down", "space")
        await pilot.pause()
        clock.advance(1.0)
        feed.advance()
        await pilot.pause()
        frozen = screen_text(app)
        assert column(app, "#layers-table", "layer") == before  # no re-sort under the cursor
        assert app.query_one(DataTable).cursor_row == 2
        assert "FROZEN" in frozen and "feed at step 1,300" in frozen and "step 1,210" in frozen
        await pilot.press("space")
        await pilot.pause()
        assert column(app, "#layers-table", "layer")[0] == "norm"
        assert "FROZEN" not in screen_text(app)


async def test_ctrl_c_quits(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("ctrl+c")
        await pilot.pause()
    assert not live_app.is_running


async def test_too_small_terminal_says_so_instead_of_drawing(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(40, 12)) as pilot:
        await settle(pilot)
        small = screen_text(live_app)
        await pilot.resize_terminal(80, 24)
        await pilot.pause()
        normal = screen_text(live_app)
    assert "terminal too small: 40×12" in small and "▸1 Layers" not in small and "░" not in small
    assert "terminal too small" not in normal and "▸1 Layers" in normal


@pytest.mark.parametrize(("size", "folded"), [((80, 24), True), ((100, 29), True), ((100, 30), False)])
async def test_header_folds_below_30_rows(live_app: ConsoleApp, size: tuple[int, int], folded: bool) -> None:
    async with live_app.run_test(size=size) as pilot:
        await settle(pilot)
        text = screen_text(live_app)
        assert live_app.query_one(JobHeader).folded == folded
    assert ("= balance" not in text) == folded  # the efficiency breakdown is the unfolded header's
    assert "24/24" in text and "at stake" in text


def _big(layers: int, nodes: int, ranks_per_node: int) -> dict[str, Any]:
    """The scenario at scale: `layers` layers and `nodes` × `ranks_per_node` ranks."""
    snapshot = make_snapshot()
    template = snapshot["layers"][1]
    snapshot["layers"] = [{**template, "name": f"block{i}.{'attn' if i % 2 else 'mlp'}"} for i in range(layers)]
    node = snapshot["nodes"][0]
    snapshot["nodes"] = [{**node, "name": f"gpu-{i:04d}", "ranks": list(range(i * ranks_per_node,
                                                                                (i + 1) * ranks_per_node))}
                         for i in range(nodes)]
    snapshot["ranks"] = snapshot["world"] = nodes * ranks_per_node
    return snapshot


async def test_slash_filters_rows_by_name_at_256_layers_and_4096_ranks(clock: FakeClock) -> None:
    app = ConsoleApp(StaticFeed([_big(256, 512, 8)]), clock=clock)
    async with app.run_test(size=(100, 30)) as pilot:
        await settle(pilot)
        assert app.query_one("#layers-table", DataTable).row_count == 256
        await pilot.press("slash", *"block17")
        await pilot.pause()
        assert sorted(column(app, "#layers-table", "layer")) == ["block17.attn", "block170.mlp", "block171.attn",
                                                                 "block172.mlp", "block173.attn", "block174.mlp",
                                                                 "block175.attn", "block176.mlp", "block177.attn",
                                                                 "block178.mlp", "block179.attn"]
        assert "11 layers" in screen_text(app)
        await pilot.press("enter", "3", "slash", *"GPU-0042")  # any case
        await pilot.pause()
        assert column(app, "#nodes-table", "node") == ["gpu-0042"]
        await pilot.press("escape")
        await pilot.pause()
        assert app.query_one("#nodes-table", DataTable).row_count == 512
        await pilot.press("1")
        await pilot.pause()
        assert app.query_one("#layers-table", DataTable).row_count == 11  # enter kept the layers' filter


async def test_w_writes_the_view_as_shown_to_csv_and_json(clock: FakeClock, tmp_path: Path) -> None:
    app = ConsoleApp(StaticFeed([make_snapshot(1210)]), clock=clock, export_dir=tmp_path)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("2", "w")
        await pilot.pause()
        shown = column(app, "#links-table", "link")
    with (tmp_path / "watchtower-links-step1210.csv").open(newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    saved = json.loads((tmp_path / "watchtower-links-step1210.json").read_text(encoding="utf-8"))
    assert rows[0][:4] == ["mark", "link", "port", "β"] and "α" in rows[0]  # columns a narrow screen leaves out
    assert [row[1] for row in rows[1:]] == shown  # the order on screen
    assert rows[1][0] == "! SLOW" and rows[1][2] == "c out"
    assert saved["rows"][0]["bandwidth_Bps"] == 2.1e9  # the figure itself, not its rounded text


@pytest.mark.parametrize("size", [(160, 48), (100, 30), (80, 24), (60, 18)], ids=lambda s: f"{s[0]}x{s[1]}")
@pytest.mark.parametrize("view", ["1", "2", "3"])
async def test_no_cell_is_cut_at_any_supported_width(live_app: ConsoleApp, size: tuple[int, int], view: str) -> None:
    # A column is never narrower than its widest cell: a figure keeps its unit ("3.76 ms", not "3.76 m")
    # and a name, the culprit's above all, is never cut; columns that do not fit are left out whole.
    async with live_app.run_test(size=size) as pilot:
        await settle(pilot)
        await pilot.press(view)
        await pilot.pause()
        table = next(t for t in live_app.query(DataTable) if t.display and t.parent.display)
        for index, col in enumerate(table.columns.values()):
            cells = [table.get_cell_at((row, index)) for row in range(table.row_count)]
            assert all("…" not in cell.plain for cell in cells), col.label
            assert max((cell.cell_len for cell in cells), default=0) <= col.width, col.label
        text = screen_text(live_app)
        assert text.count("\n") <= size[1]
    if view == "2":
        assert "c out" in text  # the port behind the slow link survives every width


async def test_links_question_mark_explains_the_link_score_from_the_real_definitions(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(100, 30)) as pilot:
        await settle(pilot)
        await pilot.press("2", "question_mark")
        await pilot.pause()
        text = screen_text(live_app)
        topics = live_app.query_one("#how-topics")
        seen = []
        for _ in range(topics.option_count):
            seen.append(screen_text(live_app))
            await pilot.press("down")
            await pilot.pause()
    assert "Link score" in text and "Iglewicz" in text and "Port score" not in text.split("Link score")[1][:40]
    for page in seen:
        assert "{'definition'" not in page and "'source'" not in page  # prose, never a Python dict
    assert "links.score" not in text and "ports.sc" not in text  # human titles, not code keys


async def test_no_color_keeps_the_selected_row_reversed(monkeypatch: pytest.MonkeyPatch, clock: FakeClock) -> None:
    monkeypatch.setenv("NO_COLOR", "1")
    app = ConsoleApp(StaticFeed([make_snapshot(1210)]), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        table = app.query_one("#layers-table", DataTable)
        style = table.get_component_styles("datatable--cursor")
    assert app.no_color
    assert style.text_style.reverse  # readable without colour: the selection is reversed, not tinted


async def test_seek_presses_during_a_seek_add_up(clock: FakeClock, controls: RecordingControls) -> None:
    app = ConsoleApp(StaticFeed([make_snapshot(1210, replay=True)], controls=controls), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("right_square_bracket", "right_square_bracket", "right_square_bracket")
        await pilot.pause()
    assert controls.calls == [("seek", 1310), ("seek", 1410), ("seek", 1510)]


async def test_space_at_the_end_of_a_replay_plays_it_again(clock: FakeClock, controls: RecordingControls) -> None:
    # At the end the feed reports itself paused and idles: a resume alone would leave "▶ PLAYING" on a
    # recording that never moves again.
    ended = make_snapshot(2400, replay=True)
    ended["replay"]["paused"] = True
    app = ConsoleApp(StaticFeed([ended], controls=controls), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("space")
        await pilot.pause()
        assert "SEEKING to 0" in app.query_one(ReplayBar).render().plain
    assert controls.calls == [("seek", 0), ("resume", None)]


async def test_sixteen_colours_keep_the_lightest_shade_off_the_background(clock: FakeClock) -> None:
    # TERM=xterm gives 16 colours: rich's own downgrade (the reference) must not map the lightest heat-map
    # shade onto the colour of the background it is drawn on, nor the selected row's text onto its own.
    from rich.color import Color as RichColor
    from rich.color import ColorSystem

    from watchtower.console.matrix import LinkMatrix

    app = ConsoleApp(StaticFeed([make_snapshot(1210)]), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("2")
        await pilot.pause()
        matrix = app.query_one(LinkMatrix)
        lightest = matrix.get_component_rich_style("matrix--l0")
        background = matrix.background_colors[1].rich_color

    def sixteen(color: RichColor | None) -> str:
        assert color is not None
        return str(color.downgrade(ColorSystem.STANDARD).number)

    assert sixteen(lightest.color) != sixteen(background)
    assert sixteen(lightest.color) not in {"0", "8"}  # black or dark grey on a dark screen: unreadable


async def test_links_detail_explains_a_beta_above_nominal_and_a_clamped_alpha(clock: FakeClock) -> None:
    snapshot = make_snapshot(1210)
    fast = snapshot["links"][1]
    fast.update(bandwidth_Bps=13.0e9, score=-9.0)  # sorted first by score; 4 % above 12.5 GB/s
    app = ConsoleApp(StaticFeed([snapshot]), clock=clock)
    async with app.run_test(size=(160, 48)) as pilot:
        await settle(pilot)
        await pilot.press("2")
        await pilot.pause()
        above = " ".join(screen_text(app).split())
        await pilot.press("down")
        await pilot.pause()
        clamped = " ".join(screen_text(app).split())
        alphas = column(app, "#links-table", "α")
    assert "β 13.0 GB/s (4% above nominal: the fit's error" in above
    assert "α clamped to 0" in clamped and alphas[1] == "clamped" and "clamped" not in alphas[0]

"""The console driven by keys through the Pilot, fed by a StaticFeed and a clock that moves on request."""

from __future__ import annotations

import pytest
from textual.widgets import ContentSwitcher, DataTable

from watchtower.console import ConsoleApp, StaticFeed
from watchtower.console.drilldown import WorstRanksScreen
from watchtower.console.header import JobHeader
from watchtower.console.keys import KeysScreen

from .conftest import FakeClock, RecordingControls, screen_text, settle
from .scenario import make_snapshot


def first_column(app: ConsoleApp, selector: str, column: int = 1) -> list[str]:
    """The plain text of one column of a table, top to bottom."""
    table = app.screen.query_one(selector, DataTable)
    return [table.get_row_at(row)[column].plain for row in range(table.row_count)]


async def test_first_snapshot_fills_header_with_standing_markers(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        text = screen_text(live_app)
    assert "llm-pretrain-7b" in text
    assert "INVENTED SCENARIO" in text
    assert "INSECURE TRANSPORT" in text
    assert "24/24" in text and "1,210" in text
    assert "missing ▲3" in text and "bad ▲2" in text


async def test_no_insecure_line_with_keys(clock: FakeClock) -> None:
    secure = make_snapshot(security={"mode": "keys", "warning": None}, invented=False)
    app = ConsoleApp(StaticFeed([secure]), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        text = screen_text(app)
    assert "INSECURE" not in text and "INVENTED" not in text
    assert "CURVE keys" in text


async def test_number_keys_and_tab_move_between_views(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        switcher = live_app.query_one(ContentSwitcher)
        seen = []
        for key in ["2", "3", "4", "5", "1", "tab", "tab", "shift+tab"]:
            await pilot.press(key)
            await pilot.pause()
            seen.append(switcher.current)
        assert seen == ["links", "nodes", "alerts", "how", "layers", "links", "nodes", "links"]
        assert "node-c→node-d" in screen_text(live_app)


async def test_sort_keys_change_row_order(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        by_exchange = first_column(live_app, "#layers-table")
        assert by_exchange[0] == "grad.allreduce"
        await pilot.press("s", "s", "s")  # exchange → comm share → worst rank → compute, per step
        await pilot.pause()
        by_compute = first_column(live_app, "#layers-table")
        assert by_compute[:2] != by_exchange[:2]
        assert by_compute[-1] == "norm"
        assert "by comp/step ▼" in screen_text(live_app)
        await pilot.press("r")
        await pilot.pause()
        flipped = first_column(live_app, "#layers-table")
        assert flipped[0] == "norm" and sorted(flipped) == sorted(by_compute)
        assert "by comp/step ▲" in screen_text(live_app)


async def test_links_sorted_by_score_put_the_slow_link_first(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("2")
        await pilot.pause()
        assert first_column(live_app, "#links-table", column=0)[0] == "! SLOW"
        text = screen_text(live_app)
    assert "limited by port node-c out" in text
    assert "!░░" in text  # the slow cell of the heat map, marked without colour


async def test_enter_drills_down_to_worst_ranks_of_selected_layer(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("down", "enter")  # second row by exchange: block2.mlp
        await pilot.pause()
        screen = live_app.screen
        assert isinstance(screen, WorstRanksScreen)
        assert screen.layer_name == "block2.mlp"
        expected = [r["rank"] for r in make_snapshot(1210)["layers"][6]["worst_ranks"]]
        ranks = first_column(live_app, "#ranks-table", column=0)
        assert sorted(ranks) == sorted(str(rank) for rank in expected)
        assert "worst ranks of layer block2.mlp" in screen_text(live_app)
        await pilot.press("escape")
        await pilot.pause()
        assert not isinstance(live_app.screen, WorstRanksScreen)


async def test_second_snapshot_updates_figures(live_app: ConsoleApp, clock: FakeClock) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        assert "1,210" in screen_text(live_app)
        clock.advance(1.0)
        assert isinstance(live_app.feed, StaticFeed) and live_app.feed.advance()
        await pilot.pause()
        text = screen_text(live_app)
    assert "1,300" in text and "1,210" not in text
    # grad.allreduce's exchange per step (window sum 4.21 s, then 4.20 s, over 200 steps) changed with the step
    assert "21.0 ms" in text and "21.1 ms" not in text


async def test_burst_is_coalesced_to_newest(clock: FakeClock) -> None:
    feed = StaticFeed([make_snapshot(1210), make_snapshot(1300), make_snapshot(1350)])
    app = ConsoleApp(feed, clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        feed.advance()
        feed.advance()
        await pilot.pause()
        assert app.query_one(JobHeader).snapshot["last_step"] == 1210  # within the interval: held back
        clock.advance(0.3)
        app.draw_due()
        await pilot.pause()
        assert app.query_one(JobHeader).snapshot["last_step"] == 1350  # newest drawn, 1300 skipped


async def test_replay_keys_call_feed_controls(replay_app: ConsoleApp, controls: RecordingControls) -> None:
    async with replay_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        assert "PLAYING" in screen_text(replay_app)
        await pilot.press("space", "full_stop", "right_square_bracket", "left_square_bracket")
        await pilot.press("less_than_sign", "greater_than_sign", "plus", "minus")
        await pilot.pause()
    assert controls.calls == [
        ("pause", None),
        ("step", 1),
        ("seek", 1310),
        ("seek", 1210),  # "[" counts from the 1,310 just asked for
        ("seek", 0),
        ("seek", 2400),
        ("set_speed", 4.0),
        ("set_speed", 2.0),  # from the 4× just asked for, not from the snapshot's stale 2×
    ]


async def test_space_resumes_a_paused_replay(clock: FakeClock, controls: RecordingControls) -> None:
    paused = make_snapshot(1210, replay=True)
    paused["replay"]["paused"] = True
    app = ConsoleApp(StaticFeed([paused], controls=controls), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        assert "PAUSED" in screen_text(app)
        await pilot.press("space")
        await pilot.pause()
    assert controls.calls == [("resume", None)]


async def test_replay_keys_absent_when_live(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        text = screen_text(live_app)
        await pilot.press("space", "right_square_bracket")
        await pilot.pause()
    assert "pause" not in text and "PLAYING" not in text


async def test_question_mark_explains_the_figure_in_use(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("question_mark")
        await pilot.pause()
        assert live_app.query_one(ContentSwitcher).current == "how"
        text = screen_text(live_app)
        assert "Layer times per step" in text and "Source: plain mean" in text  # layers: by exchange per step
        await pilot.press("question_mark", "2", "question_mark")
        await pilot.pause()
        text = screen_text(live_app)
        assert "Link score" in text and "Iglewicz" in text  # links are sorted by score: the link score, not ports
        await pilot.press("escape")
        await pilot.pause()
        assert live_app.query_one(ContentSwitcher).current == "links"


async def test_alert_suggests_a_cautious_check_naming_the_port(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("4", "down")  # newest detection first: the link alert is second
        await pilot.pause()
        text = " ".join(screen_text(live_app).split())  # the panel wraps at the screen's width
    assert "began at step 1180" in text and "detected at step 1204" in text
    assert "node-c out" in text and "operators" in text


async def test_k_toggles_our_own_key_list_that_fits_80x24(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("k")
        await pilot.pause()
        assert isinstance(live_app.screen, KeysScreen)
        text = screen_text(live_app)
        await pilot.press("k")
        await pilot.pause()
        assert not isinstance(live_app.screen, KeysScreen)
    assert "freeze the view" in text and "write the view" in text and "quit" in text
    assert "k or esc closes this list" in text  # the last line: the whole list fits on the screen
    assert "palette" not in text.lower() and "copy" not in text.lower()  # the framework's own keys are not ours
    assert "pause or play" not in text  # replay keys only for a replay


async def test_q_quits_and_stops_the_feed(live_app: ConsoleApp) -> None:
    async with live_app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("q")
        await pilot.pause()
    assert not live_app.is_running
    assert isinstance(live_app.feed, StaticFeed) and live_app.feed.stopped


async def test_no_color_keeps_every_mark_readable(monkeypatch: pytest.MonkeyPatch, clock: FakeClock) -> None:
    monkeypatch.setenv("NO_COLOR", "1")
    app = ConsoleApp(StaticFeed([make_snapshot(1210)]), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        layers = screen_text(app)
        await pilot.press("2")
        await pilot.pause()
        links = screen_text(app)
    assert app.no_color
    assert "◆ COMM" in layers and "INSECURE" in layers and "INVENTED" in layers
    assert "! SLOW" in links and "!░░" in links


async def test_layers_without_figures_yet_are_drawn_not_fatal(clock: FakeClock) -> None:
    early = make_snapshot()
    for layer in early["layers"]:  # schemas arrived, no complete step yet
        layer["compute_s"] = layer["exchange_s"] = layer["comm_fraction"] = None
        layer["per_step"] = {key: None for key in layer["per_step"]}
    app = ConsoleApp(StaticFeed([early]), clock=clock)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("s", "enter")
        await pilot.pause()
        text = screen_text(app)
    assert early["layers"][0]["name"] in text


async def test_a_zero_layer_time_takes_the_unit_of_its_column(clock: FakeClock) -> None:
    """A layer with no compute (a gradient bucket) among milliseconds reads "0.00 ms", in the table and in its
    detail line, never "0.00 s" beside "162 ms"."""
    snap = make_snapshot()
    bucket = max(snap["layers"], key=lambda lay: lay["per_step"]["exchange_s"])
    bucket["per_step"] = {**bucket["per_step"], "compute_s": 0.0, "compute_worst_s": 0.0}
    bucket["compute_s"] = 0.0
    app = ConsoleApp(StaticFeed([snap]), clock=clock)
    async with app.run_test(size=(120, 30)) as pilot:
        await settle(pilot)
        names, computes = first_column(app, "#layers-table", 1), first_column(app, "#layers-table", 2)
        zero = computes[names.index(bucket["name"])]
        assert zero == "0.00 ms" and all(c.endswith(" ms") or c.endswith(" µs") for c in computes)
        view = app.query_one("#layers")
        assert view.detail is not None and bucket["name"] in view.detail.plain  # the cursor's row: the bucket
        assert "compute 0.00 ms (worst rank 0.00 ms)" in view.detail.plain

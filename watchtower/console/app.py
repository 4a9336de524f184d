"""The Watchtower console: one textual App that renders job snapshots from any feed."""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, ClassVar

from textual import events
from textual.app import App, ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.reactive import reactive
from textual.timer import Timer
from textual.widgets import ContentSwitcher, DataTable, Footer, Input, Static

from .alerts import AlertsView
from .culprit import CulpritStrip
from .export import export_view
from .feed import Feed, FeedEnded, ReplayControls, Snapshot
from .header import JobHeader
from .howto import HowView
from .keys import KeysScreen
from .layers import LayersView
from .links import LinksView
from .nodes import NodesView
from .replaybar import ReplayBar
from .throttle import Throttle
from .view import SnapshotView, TableView
from .viewbar import VIEWS, ViewBar

REPLAY_ACTIONS = frozenset({"pause_resume", "step_once", "seek", "seek_edge", "speed"})
VIEW_ACTIONS = frozenset({"show_view", "next_view", "previous_view", "how", "back", "filter", "export"})
SPEED_LIMITS = (1 / 16, 64.0)
MIN_SIZE = (56, 14)
"""Below this many columns and rows the views cannot be drawn without wrapping into nonsense."""
FOLD_BELOW_ROWS = 30
"""Fewer rows than this fold the header to two lines, so the views keep room for rows."""
LOW_BANDWIDTH_INTERVAL_S = 1.0
"""The longest redraw period a low-bandwidth console waits; a slow link gets at most one frame a second."""
_SEEK = Binding.Group("seek", compact=True)
_SPEED = Binding.Group("speed", compact=True)


class ConsoleApp(App[None]):
    """Watch one training job; the feed decides whether it is live or a replay."""

    CSS_PATH = "app.tcss"
    TITLE = "Watchtower"
    BINDINGS: ClassVar[list[BindingType]] = [
        *(Binding(str(n), f"show_view('{view}')", VIEWS[view], show=False) for n, view in enumerate(VIEWS, 1)),
        Binding("tab", "next_view", "views", priority=True),
        Binding("shift+tab", "previous_view", "previous view", show=False, priority=True),
        Binding("question_mark", "how", "how computed"),
        Binding("k", "keys", "keys"),
        Binding("q", "quit", "quit"),
        Binding("ctrl+c", "quit", "quit", show=False, priority=True),
        Binding("slash", "filter", "filter", show=False),
        Binding("w", "export", "write", show=False),
        Binding("space", "pause_resume", "pause/play"),
        Binding("space", "freeze", "freeze"),
        Binding("full_stop", "step_once", "step", show=False),
        Binding("left_square_bracket", "seek(-1)", "back", group=_SEEK),
        Binding("right_square_bracket", "seek(1)", "forward", group=_SEEK),
        Binding("less_than_sign", "seek_edge('start')", "to start", show=False),
        Binding("greater_than_sign", "seek_edge('end')", "to end", show=False),
        Binding("minus", "speed(0.5)", "slower", group=_SPEED),
        Binding("plus,equals_sign", "speed(2)", "faster", group=_SPEED),
    ]

    snapshot: reactive[Snapshot | None] = reactive(None, always_update=True, init=False)
    """The newest snapshot drawn on screen."""
    view: reactive[str] = reactive("layers", init=False)
    """Id of the view filling the main area."""
    frozen: reactive[bool] = reactive(False, init=False)
    """Live only: the view stays as it is while newer snapshots are held back (the feed keeps ingesting)."""

    class SnapshotArrived(Message):
        """A feed delivered a snapshot; posted from the feed's thread, handled on the app's loop."""

        def __init__(self, snapshot: Snapshot) -> None:
            super().__init__()
            self.snapshot = snapshot

    class SeekProgressed(Message):
        """A replay's seek has read up to a step; posted from the feed's thread, handled on the app's loop."""

        def __init__(self, position: dict[str, Any]) -> None:
            super().__init__()
            self.position = position

    def __init__(
        self,
        feed: Feed,
        *,
        clock: Callable[[], float] = time.monotonic,
        redraw_interval_s: float = 0.25,
        seek_steps: int = 100,
        low_bandwidth: bool = False,
        export_dir: Path | None = None,
    ) -> None:
        """`clock` and `redraw_interval_s` set the redraw throttle; `seek_steps` is one `[`/`]` jump.

        `low_bandwidth` redraws at most once a second and leaves out decoration (sparklines, bars, stripes):
        for a console over a slow remote link. `w` writes the view's rows into `export_dir` (default: the
        current folder)."""
        super().__init__()
        self.feed = feed
        self.seek_steps = seek_steps
        self.low_bandwidth = low_bandwidth
        self.export_dir = export_dir or Path.cwd()
        if low_bandwidth:
            redraw_interval_s = max(redraw_interval_s, LOW_BANDWIDTH_INTERVAL_S)
        self._throttle: Throttle[Snapshot] = Throttle(redraw_interval_s, clock)
        self._redraw_timer: Timer | None = None
        self._view_before_how = "layers"
        self._asked: dict[str, Any] = {}  # replay state asked for by keys and not yet confirmed by the feed
        self._held: Snapshot | None = None  # the newest snapshot while frozen
        self._seeking: dict[str, Any] | None = None  # how far the running seek has read; None when none runs
        self.ended: str | None = None  # why the feed ended the console, for the command to print

    def compose(self) -> ComposeResult:
        with Vertical(id="main"):
            yield JobHeader()
            yield CulpritStrip()
            yield ViewBar()
            yield ReplayBar()
            with ContentSwitcher(initial="layers", id="views"):
                yield LayersView()
                yield LinksView()
                yield NodesView()
                yield AlertsView()
                yield HowView()
            with Horizontal(id="filter-bar"):
                yield Static("/ rows named ", id="filter-label")
                yield Input(placeholder="part of a name · enter keeps · esc clears", id="filter")
            yield Static(id="detail")
            yield Footer(compact=True, show_command_palette=False)
        yield Static(id="too-small")

    def on_mount(self) -> None:
        """Start the feed in a thread; it only ever posts messages back."""
        self.query_one(ReplayBar).display = False
        if self.low_bandwidth:
            self.query_one(JobHeader).plain = True
            for view in self.query(SnapshotView):
                view.plain = True
            for table in self.query("RecordTable").results(DataTable):
                table.zebra_stripes = False
        self._fit_terminal(self.size.width, self.size.height)
        self._focus_view()
        if self.feed.controls is not None:
            self.feed.controls.report_seeks_to(self._report_seek)
        self.run_worker(self._run_feed, thread=True, name="feed", group="feed")

    def on_resize(self, event: events.Resize) -> None:
        """Fold the header on short terminals; below the minimum size, say so instead of drawing garbage."""
        self._fit_terminal(event.size.width, event.size.height)

    def _fit_terminal(self, width: int, height: int) -> None:
        small = width < MIN_SIZE[0] or height < MIN_SIZE[1]
        self.query_one("#main").display = not small
        notice = self.query_one("#too-small", Static)
        notice.display = small
        notice.update(f"terminal too small: {width}×{height}\nWatchtower needs at least {MIN_SIZE[0]}×{MIN_SIZE[1]}"
                      "\n\nq quits")
        self.query_one(JobHeader).folded = height < FOLD_BELOW_ROWS

    def on_unmount(self) -> None:
        """Let the feed's thread return so the process can exit."""
        self.feed.stop()

    def _run_feed(self) -> None:
        try:
            self.feed.start(self._deliver)
        except FeedEnded as exc:
            self.ended = str(exc)
            self.call_from_thread(self.exit, return_code=1)

    def _deliver(self, snapshot: Snapshot) -> None:
        """Called on the feed's thread: hand the snapshot to the event loop and nothing else."""
        self.post_message(self.SnapshotArrived(snapshot))

    def _report_seek(self, position: dict[str, Any]) -> None:
        """Called on the feed's thread during a long seek: hand its progress to the event loop."""
        self.post_message(self.SeekProgressed(position))

    def on_console_app_seek_progressed(self, message: SeekProgressed) -> None:
        """Move the replay bar along with the seek; the views keep the last snapshot until it gets there."""
        self._seeking = message.position
        self.query_one(ReplayBar).position = self._shown_position(self._seeking)

    def on_console_app_snapshot_arrived(self, message: SnapshotArrived) -> None:
        """Keep only the newest snapshot and draw it when the throttle allows (held while frozen)."""
        self._seeking = None  # a replay builds no snapshot during a seek: one now means the seek is over
        if self.frozen:
            self._held = message.snapshot
            self.query_one(ReplayBar).newest_step = message.snapshot["last_step"]
            return
        self._throttle.offer(message.snapshot)
        self.draw_due()

    def draw_due(self) -> None:
        """Draw the newest pending snapshot if its turn has come, else make sure a timer tries again."""
        snapshot = self._throttle.take()
        if snapshot is not None:
            self.snapshot = snapshot
        if self._throttle.pending and self._redraw_timer is None:
            self._redraw_timer = self.set_timer(max(self._throttle.wait_s(), 0.01), self._on_redraw_timer)

    def _on_redraw_timer(self) -> None:
        self._redraw_timer = None
        self.draw_due()

    @property
    def current_view(self) -> SnapshotView:
        """The view on screen."""
        return self.query_one(f"#{self.view}", SnapshotView)

    def watch_snapshot(self, snapshot: Snapshot | None) -> None:
        """Hand the snapshot to the header, the strips and the visible view (hidden views catch up when shown)."""
        if snapshot is None:
            return
        self.query_one(JobHeader).snapshot = snapshot
        self.query_one(CulpritStrip).snapshot = snapshot
        self.query_one(ViewBar).alerts = sum(1 for a in snapshot["alerts"] if a.get("step_closed") is None) + \
            len(snapshot.get("standing", []))
        self.query_one(ReplayBar).position = self._shown_position(self._seeking or snapshot["replay"])
        self.current_view.snapshot = snapshot

    def _shown_position(self, position: dict[str, Any] | None) -> dict[str, Any] | None:
        """The replay position with what the keys asked for and the feed has not confirmed yet.

        A paused feed delivers nothing more, so its last word still says "playing": the bar shows what was
        asked and the next key starts from it, so pause/play never wedges and every `+`/`-` counts."""
        if position is None:
            return None
        seeking = self._asked.get("seek")
        if seeking is not None:
            target, start = seeking
            if position["step"] >= target and (target >= start or position["step"] < start):
                del self._asked["seek"]
        for key in ("paused", "speed"):
            if key in self._asked and self._asked[key] == position[key]:
                del self._asked[key]
        return {**position, **self._asked}

    def watch_view(self, view: str) -> None:
        """Switch the main area and bring the new view up to date."""
        self.query_one(ContentSwitcher).current = view
        self.query_one(ViewBar).current = view
        shown = self.current_view
        if self.snapshot is not None:
            shown.snapshot = self.snapshot
        self.query_one("#detail", Static).update(shown.detail)
        wanted = shown.table.filter_text if isinstance(shown, TableView) else ""
        self.query_one("#filter", Input).value = wanted  # each view keeps its own filter
        self.query_one("#filter-bar").display = bool(wanted)
        self._focus_view()

    def _focus_view(self) -> None:
        target = self.current_view.query("RecordTable, OptionList").first()
        target.focus()

    def on_snapshot_view_detail_changed(self, message: SnapshotView.DetailChanged) -> None:
        """Show the whole text of the current selection (tables shorten long names)."""
        if message.view.id == self.view and self.is_running:  # a late message after unmount has nowhere to go
            for detail in self.query("#detail").results(Static):
                detail.update(message.text)

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Replay keys exist only for a replay; view keys only on the main screen and not while typing."""
        if action in REPLAY_ACTIONS:
            return self.feed.controls is not None and self.screen is self.screen_stack[0]
        if action == "freeze":
            return self.feed.controls is None and self.screen is self.screen_stack[0]
        if action in VIEW_ACTIONS:
            return self.screen is self.screen_stack[0] and not isinstance(self.focused, Input)
        return True

    def action_show_view(self, view: str) -> None:
        """Jump to a view by its number key."""
        self.view = view

    def action_next_view(self) -> None:
        """Cycle forward through the views."""
        views = list(VIEWS)
        self.view = views[(views.index(self.view) + 1) % len(views)]

    def action_previous_view(self) -> None:
        """Cycle backward through the views."""
        views = list(VIEWS)
        self.view = views[(views.index(self.view) - 1) % len(views)]

    def action_how(self) -> None:
        """Open the definition of the figure in use, or go back to where the user was."""
        if self.view == "how":
            self.view = self._view_before_how
            return
        topics = self.current_view.how_topics()
        self._view_before_how = self.view
        self.view = "how"
        self.query_one(HowView).choose(topics)

    def action_back(self) -> None:
        """Leave the how-computed view (its escape key lands here)."""
        if self.view == "how":
            self.view = self._view_before_how

    def action_keys(self) -> None:
        """Show our own list of the keys that work here (`k` or escape closes it)."""
        if isinstance(self.screen, KeysScreen):
            self.screen.dismiss()
        else:
            self.push_screen(KeysScreen(replay=self.feed.controls is not None))

    def action_filter(self) -> None:
        """Open the filter line for the view's rows."""
        if not isinstance(self.current_view, TableView):
            self.notify("This view has no rows to filter.")
            return
        box = self.query_one("#filter", Input)
        self.query_one("#filter-bar").display = True
        box.value = self.current_view.table.filter_text
        box.focus()

    def on_input_changed(self, event: Input.Changed) -> None:
        """Filter as the user types."""
        if event.input.id == "filter" and isinstance(self.current_view, TableView):
            self.current_view.table.filter_text = event.value
            self.current_view.on_record_table_sort_changed()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        """Keep the filter and go back to the rows."""
        if event.input.id == "filter":
            self._close_filter(clear=False)

    def on_key(self, event: events.Key) -> None:
        """Escape in the filter line clears the filter."""
        if event.key == "escape" and isinstance(self.focused, Input) and self.focused.id == "filter":
            event.stop()
            self._close_filter(clear=True)

    def _close_filter(self, clear: bool) -> None:
        box = self.query_one("#filter", Input)
        if clear:
            box.value = ""
        self.query_one("#filter-bar").display = bool(box.value)
        self._focus_view()

    def action_export(self) -> None:
        """Write the view's rows as shown (CSV) and as the snapshot has them (JSON)."""
        view = self.current_view
        if not isinstance(view, TableView) or self.snapshot is None:
            self.notify("This view has no rows to write.")
            return
        try:
            paths = export_view(view.table, view.id or "view", self.snapshot["last_step"], self.export_dir)
        except OSError as exc:
            self.notify(f"could not write the view: {exc}", severity="error")
            return
        self.notify("wrote " + " and ".join(str(p) for p in paths))

    def _replay(self) -> tuple[ReplayControls, dict[str, Any] | None]:
        controls = self.feed.controls
        assert controls is not None, "check_action admits replay keys only when the feed has controls"
        position = self._seeking or (None if self.snapshot is None else self.snapshot["replay"])
        if position is None:
            return controls, None
        return controls, {**position, **self._asked}

    def _ask(self, **state: Any) -> None:
        """Remember what a key asked of the replay and show it at once."""
        self._asked.update(state)
        if self._seeking is not None or self.snapshot is not None:
            self.query_one(ReplayBar).position = self._shown_position(self._seeking or self.snapshot["replay"])

    def action_freeze(self) -> None:
        """Live: hold the view still (the feed keeps ingesting), or follow the feed again."""
        self.frozen = not self.frozen

    def action_pause_resume(self) -> None:
        """Pause a playing replay, resume a paused one; at the end, play again from the start."""
        controls, position = self._replay()
        if position is not None and position["paused"] and position["step"] >= position["last_step"]:
            controls.seek(position["first_step"])
            controls.resume()
            self._ask(paused=False, seek=(position["first_step"], position["step"]))
        elif position is not None and position["paused"]:
            controls.resume()
            self._ask(paused=False)
        else:
            controls.pause()
            self._ask(paused=True)

    def watch_frozen(self, frozen: bool) -> None:
        """Say that the view is frozen; on thawing, draw the newest snapshot held meanwhile."""
        bar = self.query_one(ReplayBar)
        bar.frozen_step = self.snapshot["last_step"] if frozen and self.snapshot is not None else None
        bar.newest_step = bar.frozen_step
        if not frozen and self._held is not None:
            held, self._held = self._held, None
            self._throttle.offer(held)
            self.draw_due()

    def action_step_once(self) -> None:
        """Advance a paused replay by one step."""
        controls, _ = self._replay()
        controls.step(1)

    def action_seek(self, jumps: int) -> None:
        """Jump `jumps` × `seek_steps` steps, staying inside the recording."""
        controls, position = self._replay()
        if position is None:
            self.notify("No replay position yet.")
            return
        base = position["seek"][0] if position.get("seek") else position["step"]  # presses during a seek add up
        target = min(max(base + jumps * self.seek_steps, position["first_step"]), position["last_step"])
        controls.seek(target)
        self._ask(seek=(target, position["step"]))

    def action_seek_edge(self, edge: str) -> None:
        """Jump to the first or the last step of the recording."""
        controls, position = self._replay()
        if position is None:
            self.notify("No replay position yet.")
            return
        target = position["first_step"] if edge == "start" else position["last_step"]
        controls.seek(target)
        self._ask(seek=(target, position["step"]))

    def action_speed(self, factor: float) -> None:
        """Multiply the replay speed, within 1/16× and 64×."""
        controls, position = self._replay()
        speed = 1.0 if position is None else position["speed"]
        low, high = SPEED_LIMITS
        speed = min(max(speed * factor, low), high)
        controls.set_speed(speed)
        self._ask(speed=speed)

"""The Watchtower console: one textual App that renders job snapshots from any feed."""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any, ClassVar

from textual.app import App, ComposeResult
from textual.binding import Binding, BindingType
from textual.message import Message
from textual.reactive import reactive
from textual.timer import Timer
from textual.widgets import ContentSwitcher, Footer, Static

from .alerts import AlertsView
from .feed import Feed, ReplayControls, Snapshot
from .header import JobHeader
from .howto import HowView
from .layers import LayersView
from .links import LinksView
from .nodes import NodesView
from .replaybar import ReplayBar
from .throttle import Throttle
from .view import SnapshotView
from .viewbar import VIEWS, ViewBar

REPLAY_ACTIONS = frozenset({"pause_resume", "step_once", "seek", "seek_edge", "speed"})
VIEW_ACTIONS = frozenset({"show_view", "next_view", "previous_view", "how", "back"})
SPEED_LIMITS = (1 / 16, 64.0)
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
        Binding("space", "pause_resume", "pause/play"),
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

    class SnapshotArrived(Message):
        """A feed delivered a snapshot; posted from the feed's thread, handled on the app's loop."""

        def __init__(self, snapshot: Snapshot) -> None:
            super().__init__()
            self.snapshot = snapshot

    def __init__(
        self,
        feed: Feed,
        *,
        clock: Callable[[], float] = time.monotonic,
        redraw_interval_s: float = 0.25,
        seek_steps: int = 100,
    ) -> None:
        """`clock` and `redraw_interval_s` set the redraw throttle; `seek_steps` is one `[`/`]` jump."""
        super().__init__()
        self.feed = feed
        self.seek_steps = seek_steps
        self._throttle: Throttle[Snapshot] = Throttle(redraw_interval_s, clock)
        self._redraw_timer: Timer | None = None
        self._view_before_how = "layers"

    def compose(self) -> ComposeResult:
        yield JobHeader()
        yield ViewBar()
        yield ReplayBar()
        with ContentSwitcher(initial="layers", id="views"):
            yield LayersView()
            yield LinksView()
            yield NodesView()
            yield AlertsView()
            yield HowView()
        yield Static(id="detail")
        yield Footer(compact=True, show_command_palette=False)

    def on_mount(self) -> None:
        """Start the feed in a thread; it only ever posts messages back."""
        self.query_one(ReplayBar).display = False
        self._focus_view()
        self.run_worker(self._run_feed, thread=True, name="feed", group="feed")

    def on_unmount(self) -> None:
        """Let the feed's thread return so the process can exit."""
        self.feed.stop()

    def _run_feed(self) -> None:
        self.feed.start(self._deliver)

    def _deliver(self, snapshot: Snapshot) -> None:
        """Called on the feed's thread: hand the snapshot to the event loop and nothing else."""
        self.post_message(self.SnapshotArrived(snapshot))

    def on_console_app_snapshot_arrived(self, message: SnapshotArrived) -> None:
        """Keep only the newest snapshot and draw it when the throttle allows."""
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
        self.query_one(ViewBar).alerts = sum(1 for a in snapshot["alerts"] if a.get("step_closed") is None) + \
            len(snapshot.get("standing", []))
        self.query_one(ReplayBar).position = snapshot["replay"]
        self.current_view.snapshot = snapshot

    def watch_view(self, view: str) -> None:
        """Switch the main area and bring the new view up to date."""
        self.query_one(ContentSwitcher).current = view
        self.query_one(ViewBar).current = view
        shown = self.current_view
        if self.snapshot is not None:
            shown.snapshot = self.snapshot
        self.query_one("#detail", Static).update(shown.detail)
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
        """Replay keys exist only for a replay; view keys only on the main screen."""
        if action in REPLAY_ACTIONS:
            return self.feed.controls is not None
        if action in VIEW_ACTIONS:
            return self.screen is self.screen_stack[0]
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
        """Toggle the panel listing every key that works here."""
        if self.screen.query("HelpPanel"):
            self.action_hide_help_panel()
        else:
            self.action_show_help_panel()

    def _replay(self) -> tuple[ReplayControls, dict[str, Any] | None]:
        controls = self.feed.controls
        assert controls is not None, "check_action admits replay keys only when the feed has controls"
        return controls, None if self.snapshot is None else self.snapshot["replay"]

    def action_pause_resume(self) -> None:
        """Pause a playing replay, resume a paused one."""
        controls, position = self._replay()
        if position is not None and position["paused"]:
            controls.resume()
        else:
            controls.pause()

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
        target = position["step"] + jumps * self.seek_steps
        controls.seek(min(max(target, position["first_step"]), position["last_step"]))

    def action_seek_edge(self, edge: str) -> None:
        """Jump to the first or the last step of the recording."""
        controls, position = self._replay()
        if position is None:
            self.notify("No replay position yet.")
            return
        controls.seek(position["first_step"] if edge == "start" else position["last_step"])

    def action_speed(self, factor: float) -> None:
        """Multiply the replay speed, within 1/16× and 64×."""
        controls, position = self._replay()
        speed = 1.0 if position is None else position["speed"]
        low, high = SPEED_LIMITS
        controls.set_speed(min(max(speed * factor, low), high))

"""The common shape of the console's views: a snapshot goes in, a detail line comes out."""

from __future__ import annotations

from typing import ClassVar

from rich.style import Style
from rich.text import Text
from textual.containers import Vertical
from textual.message import Message
from textual.reactive import reactive

from .feed import Snapshot


class SnapshotView(Vertical):
    """A view of one part of the snapshot; subclasses draw it in `show`."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {
        "view--bad",
        "view--quiet",
        "view--compute",
        "view--exchange",
        "view--title",
    }

    snapshot: reactive[Snapshot | None] = reactive(None, always_update=True, init=False)
    """The snapshot this view shows; set by the app only while the view is on screen."""

    class DetailChanged(Message):
        """The whole, untruncated text of what is selected in a view, for the detail line."""

        def __init__(self, view: SnapshotView, text: Text) -> None:
            super().__init__()
            self.view = view
            self.text = text

    def __init__(self, *, id: str) -> None:
        super().__init__(id=id)
        self.detail = Text()

    def watch_snapshot(self, snapshot: Snapshot | None) -> None:
        """Redraw when a new snapshot is handed over."""
        if snapshot is not None:
            self.show(snapshot)

    def show(self, snapshot: Snapshot) -> None:
        """Draw `snapshot`; every view overrides this."""
        raise NotImplementedError

    def paint(self, name: str) -> Style:
        """The style app.tcss gives component class `view--<name>`."""
        return self.get_component_rich_style(f"view--{name}", partial=True)

    def how_topics(self) -> tuple[str, ...]:
        """Names of the figures the user is looking at, most specific first, for the how-computed view."""
        return ()

    def set_detail(self, text: Text) -> None:
        """Remember and announce the detail of the current selection."""
        self.detail = text
        self.post_message(self.DetailChanged(self, text))

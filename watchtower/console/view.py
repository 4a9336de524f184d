"""The common shape of the console's views: a snapshot goes in, a detail line comes out."""

from __future__ import annotations

from typing import ClassVar

from rich.style import Style
from rich.text import Text
from textual.containers import Vertical
from textual.message import Message
from textual.reactive import reactive

from .feed import Snapshot
from .table import RecordTable


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
        self.plain = False  # low-bandwidth mode: leave out decoration (bars) that costs a redraw per change

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


class TableView(SnapshotView):
    """A view built around one record table (``#<id>-table``): the sort order names the figure in use, and
    the title and the detail line follow the order and the cursor."""

    @property
    def table(self) -> RecordTable:
        """The view's table."""
        return self.query_one(f"#{self.id}-table", RecordTable)

    def how_topics(self) -> tuple[str, ...]:
        """The figure the rows are ordered by."""
        return self.table.sort_key.how

    def on_record_table_sort_changed(self) -> None:
        """Relabel the title with the new order."""
        self._retitle()

    def on_data_table_row_highlighted(self) -> None:
        """Follow the cursor in the detail line."""
        self._describe()

    def _retitle(self) -> None:
        raise NotImplementedError

    def _title_width(self) -> int:
        """Cells the one-line title has (its padding taken off); unbounded before the first layout."""
        return self.size.width - 2 if self.size.width else 1 << 16

    def _describe(self) -> None:
        raise NotImplementedError

"""A data table whose rows are snapshot records, sortable by named figures, steady under updates."""

from __future__ import annotations

from collections.abc import Callable, Sequence, Set
from dataclasses import dataclass
from typing import Any, ClassVar

from rich.text import Text
from textual.binding import Binding, BindingType
from textual.message import Message
from textual.reactive import reactive
from textual.widgets import DataTable

Record = dict[str, Any]


@dataclass(frozen=True)
class SortKey:
    """One way to order the rows: a label for the screen, how to read the value, which figure it is."""

    label: str
    value: Callable[[Record], Any]
    descending: bool = True
    how: tuple[str, ...] = ()


@dataclass(frozen=True)
class ColumnSpec:
    """A column: its header and a fixed width, so the layout does not jump between updates.

    ``drop`` orders the columns a narrow terminal gives up, highest first (0: never dropped), so figures
    are left out whole rather than cut, and the culprit's name keeps its room.
    """

    label: str
    width: int
    drop: int = 0

    @property
    def key(self) -> str:
        """Column key; the unlabelled mark column still needs one."""
        return self.label or "mark"


def fit_columns(columns: Sequence[ColumnSpec], width: int) -> list[ColumnSpec]:
    """The columns that fit in `width` cells (two of padding each), dropping the most dispensable first."""
    kept = list(columns)
    droppable = sorted((c for c in kept if c.drop), key=lambda c: -c.drop)
    while sum(c.width + 2 for c in kept) > width and droppable:
        kept.remove(droppable.pop(0))
    return kept


class RecordTable(DataTable[Text]):
    """Rows built from records; `s` cycles the order, `r` reverses it, the cursor follows its record.

    `cells` gives one cell per column of `all_columns`; only the columns in use are shown. `match` is
    the text the `/` filter searches (a record's name).
    """

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("s", "cycle_sort", "sort"),
        Binding("r", "reverse_sort", "reverse", show=False),
    ]

    sort_index: reactive[int] = reactive(0, init=False)
    """Position in `sort_keys` of the order in use."""
    flipped: reactive[bool] = reactive(False, init=False)
    """True when the order is the reverse of the sort key's natural direction."""
    filter_text: reactive[str] = reactive("", init=False)
    """Only records whose name holds this text (any case) are shown; empty: all."""

    class SortChanged(Message):
        """The order changed; the owning view relabels its title line."""

        def __init__(self, table: RecordTable, key: SortKey, flipped: bool) -> None:
            super().__init__()
            self.table = table
            self.key = key
            self.flipped = flipped

    def __init__(
        self,
        sort_keys: Sequence[SortKey],
        row_key: Callable[[Record], str],
        cells: Callable[[Record], list[Text]],
        *,
        match: Callable[[Record], str] | None = None,
        id: str | None = None,
    ) -> None:
        super().__init__(id=id, cursor_type="row", zebra_stripes=True)
        self.sort_keys = list(sort_keys)
        self._row_key = row_key
        self._cells = cells
        self._match = match or row_key
        self._records: list[Record] = []
        self._order: list[str] = []
        self._columns: list[ColumnSpec] = []
        self._all_columns: list[ColumnSpec] = []
        self._shown: list[int] = []

    @property
    def hidden_columns(self) -> list[str]:
        """Labels of the columns left out for want of width."""
        return [c.label for c in self._all_columns if c not in self._columns]

    @property
    def shown_records(self) -> int:
        """How many records pass the filter."""
        return len(self._order)

    @property
    def sort_key(self) -> SortKey:
        """The order in use."""
        return self.sort_keys[self.sort_index]

    def set_columns(self, columns: Sequence[ColumnSpec], width: int | None = None,
                    hide: Set[str] = frozenset()) -> None:
        """Replace the columns when their widths change (on resize), keeping the rows; with `width`, leave
        out the most dispensable columns that do not fit; `hide` names columns not to show at all."""
        shown = [c for c in columns if c.label not in hide]
        kept = shown if width is None else fit_columns(shown, width)
        if kept == self._columns and list(columns) == self._all_columns:
            return
        self._all_columns = list(columns)
        self._columns = kept
        self._shown = [i for i, spec in enumerate(columns) if spec in kept]
        self.clear(columns=True)
        for spec in self._columns:
            self.add_column(Text(spec.label), width=spec.width, key=spec.key)
        self._order = []
        self._fill()

    def set_records(self, records: Sequence[Record]) -> None:
        """Show these records in the current order, updating cells in place when the order is unchanged."""
        self._records = list(records)
        self._fill()

    def rows_as_shown(self) -> tuple[list[str], list[list[str]], list[Record]]:
        """Headers and plain cells of every column (shown or not), in the order and filter on screen, and the
        records behind the rows."""
        records = self._sorted()
        headers = [spec.label or "mark" for spec in self._all_columns]
        return headers, [[cell.plain for cell in self._cells(record)] for record in records], records

    def record_at_cursor(self) -> Record | None:
        """The record under the cursor, if any."""
        if not self._order or not 0 <= self.cursor_row < len(self._order):
            return None
        key = self._order[self.cursor_row]
        return next((r for r in self._records if self._row_key(r) == key), None)

    def action_cycle_sort(self) -> None:
        """Order by the next figure."""
        self.sort_index = (self.sort_index + 1) % len(self.sort_keys)

    def action_reverse_sort(self) -> None:
        """Flip the order."""
        self.flipped = not self.flipped

    def watch_sort_index(self) -> None:
        """Reorder and tell the view."""
        self._reordered()

    def watch_flipped(self) -> None:
        """Reorder and tell the view."""
        self._reordered()

    def watch_filter_text(self) -> None:
        """Show only the matching rows."""
        self._fill()

    def _reordered(self) -> None:
        self._fill()
        self.post_message(self.SortChanged(self, self.sort_key, self.flipped))

    def _sorted(self) -> list[Record]:
        key = self.sort_key
        wanted = self.filter_text.casefold()
        records = [r for r in self._records if wanted in self._match(r).casefold()] if wanted else self._records
        known = [r for r in records if key.value(r) is not None]
        unknown = [r for r in records if key.value(r) is None]
        known.sort(key=key.value, reverse=key.descending != self.flipped)
        return known + unknown

    def _fill(self) -> None:
        if not self._columns:
            return
        rows = self._sorted()
        order = [self._row_key(r) for r in rows]
        column_keys = [spec.key for spec in self._columns]
        if order == self._order:
            for row_key, record in zip(order, rows, strict=True):
                for column_key, cell in zip(column_keys, self._shown_cells(record), strict=True):
                    if self.get_cell(row_key, column_key) != cell:
                        self.update_cell(row_key, column_key, cell)
            return
        selected = self._order[self.cursor_row] if 0 <= self.cursor_row < len(self._order) else None
        self.clear()
        for row_key, record in zip(order, rows, strict=True):
            self.add_row(*self._shown_cells(record), key=row_key)
        self._order = order
        if selected in order:
            self.move_cursor(row=order.index(selected), animate=False)

    def _shown_cells(self, record: Record) -> list[Text]:
        cells = self._cells(record)
        return [cells[i] for i in self._shown]

"""Drill-down from a layer to its worst ranks: which rank and node make the layer communication-bound."""

from __future__ import annotations

from typing import Any, ClassVar

from rich.style import Style
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Footer, Static

from . import format as fmt
from .feed import Snapshot
from .table import ColumnSpec, Record, RecordTable, SortKey

SORT_KEYS = (
    SortKey("comm share", lambda r: r["comm_fraction"], how=("comm_fraction_worst", "comm_fraction")),
    SortKey("exchange", lambda r: r["exchange_s"], how=("exchange_s",)),
    SortKey("compute", lambda r: r["compute_s"], how=("compute_s",)),
    SortKey("rank", lambda r: r["rank"], descending=False, how=("worst_ranks",)),
)
BAR_WIDTH = 14


class WorstRanksScreen(ModalScreen[None]):
    """The worst ranks of one layer, kept current while new snapshots arrive."""

    BINDINGS: ClassVar[list[Binding]] = [
        Binding("escape", "dismiss", "back"),
        Binding("backspace", "dismiss", "back", show=False),
    ]
    COMPONENT_CLASSES: ClassVar[set[str]] = {"ranks--compute", "ranks--exchange", "ranks--quiet"}

    def __init__(self, index: int, name: str) -> None:
        super().__init__()
        self.layer_index = index
        self.layer_name = name
        self._scale = 0.0

    def compose(self) -> ComposeResult:
        with Vertical(id="ranks-box"):
            yield Static(id="ranks-title")
            yield RecordTable(SORT_KEYS, lambda r: str(r["rank"]), self._cells, id="ranks-table")
            yield Static(id="ranks-help")
        yield Footer(compact=True, show_command_palette=False)

    def on_mount(self) -> None:
        """Draw from the app's newest snapshot now and whenever it changes."""
        table = self.query_one(RecordTable)
        table.set_columns(
            [
                ColumnSpec("rank", 5),
                ColumnSpec("node", 12),
                ColumnSpec("compute", 8),
                ColumnSpec("exchange", 8),
                ColumnSpec("time", BAR_WIDTH),
                ColumnSpec("comm", 4),
            ]
        )
        self.watch(self.app, "snapshot", self._show)
        table.focus()

    def _paint(self, name: str) -> Style:
        return self.get_component_rich_style(f"ranks--{name}", partial=True)

    def _layer(self, snapshot: Snapshot) -> dict[str, Any] | None:
        """The same layer in a newer snapshot: by name, else by position."""
        layers = snapshot["layers"]
        found = next((layer for layer in layers if layer["name"] == self.layer_name), None)
        if found is None and self.layer_index < len(layers):
            found = layers[self.layer_index]
        return found

    def _show(self, snapshot: Snapshot | None) -> None:
        layer = None if snapshot is None else self._layer(snapshot)
        title = self.query_one("#ranks-title", Static)
        table = self.query_one(RecordTable)
        if layer is None:
            title.update(Text.assemble("layer ", fmt.literal(self.layer_name), " is no longer reported"))
            table.set_records([])
            return
        ranks = layer["worst_ranks"]
        self._scale = max(((r["compute_s"] or 0.0) + (r["exchange_s"] or 0.0) for r in ranks), default=0.0)
        title.update(
            Text.assemble(
                ("worst ranks of layer ", self._paint("quiet")),
                fmt.literal(layer["name"]),
                f"\ncomm {fmt.percent(layer['comm_fraction'])} on the mean rank, "
                f"{fmt.percent(layer['comm_fraction_worst'])} on the worst",
                " · COMM-BOUND" if layer["comm_bound"] else "",
            )
        )
        table.set_records(ranks)
        self._describe()

    def _describe(self) -> None:
        """The selected rank's node in full (the table shortens it), then the keys."""
        rank = self.query_one(RecordTable).record_at_cursor()
        line = Text()
        if rank is not None:
            line = Text.assemble(f"rank {rank['rank']} on ", fmt.literal(rank["node"]), " · ")
        line.append("█ compute ░ exchange · s: sort · r: reverse · esc: back to layers", self._paint("quiet"))
        self.query_one("#ranks-help", Static).update(line)

    def on_data_table_row_highlighted(self) -> None:
        """Follow the cursor in the help line."""
        self._describe()

    def _cells(self, rank: Record) -> list[Text]:
        compute_bar, exchange_bar = fmt.split_bar(rank["compute_s"] or 0.0, rank["exchange_s"] or 0.0, self._scale,
                                                  BAR_WIDTH)
        return [
            Text(str(rank["rank"]), justify="right"),
            fmt.fit(fmt.literal(rank["node"]), 12),
            Text(fmt.seconds(rank["compute_s"]), justify="right"),
            Text(fmt.seconds(rank["exchange_s"]), justify="right"),
            Text.assemble((compute_bar, self._paint("compute")), (exchange_bar, self._paint("exchange"))),
            Text(fmt.percent(rank["comm_fraction"]), justify="right"),
        ]

"""Layers view: compute against exchange per layer, comm-bound layers called out, enter for worst ranks."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.widgets import DataTable, Static

from . import format as fmt
from .drilldown import WorstRanksScreen
from .feed import Snapshot
from .table import ColumnSpec, Record, RecordTable, SortKey
from .view import TableView

COMM_MARK = "◆ COMM"
"""Symbol and word for a comm-bound layer, so it does not rely on colour."""

SORT_KEYS = (
    SortKey("exchange", lambda r: r["exchange_s"], how=("exchange_s", "comm_fraction")),
    SortKey("comm share", lambda r: r["comm_fraction"], how=("comm_fraction", "comm_bound")),
    SortKey("worst rank", lambda r: r["comm_fraction_worst"], how=("comm_fraction_worst", "comm_fraction")),
    SortKey("compute", lambda r: r["compute_s"], how=("compute_s",)),
    SortKey("model order", lambda r: r["index"], descending=False, how=("layers", "comm_fraction")),
    SortKey("name", lambda r: r["name"], descending=False, how=("layers",)),
)


class LayersView(TableView):
    """One row per layer over the analysis window."""

    def __init__(self) -> None:
        super().__init__(id="layers")
        self._scale = 0.0
        self._bar_width = 10
        self._name_width = 14

    def compose(self) -> ComposeResult:
        yield Static(id="layers-title", classes="view-title")
        yield RecordTable(SORT_KEYS, lambda r: str(r["index"]), self._cells, id="layers-table")


    def show(self, snapshot: Snapshot) -> None:
        """Rescale the bars to the largest layer and refill the table."""
        records = [{"index": i, **layer} for i, layer in enumerate(snapshot["layers"])]
        self._scale = max(((r["compute_s"] or 0.0) + (r["exchange_s"] or 0.0) for r in records), default=0.0)
        self._layout_columns()
        self.table.set_records(records)
        self._retitle()
        self._describe()

    def on_resize(self) -> None:
        """Give spare width to the bar first, then to the names."""
        if self.snapshot is not None:
            self._layout_columns()

    def _layout_columns(self) -> None:
        spare = self.size.width - 63
        self._bar_width = min(max(spare, 8), 40)
        self._name_width = 14 + min(max(spare - self._bar_width, 0), 26)
        self.table.set_columns(
            [
                ColumnSpec("", len(COMM_MARK)),
                ColumnSpec("layer", self._name_width),
                ColumnSpec("compute", 8),
                ColumnSpec("exchange", 8),
                ColumnSpec("time", self._bar_width),
                ColumnSpec("comm", 4),
                ColumnSpec("worst", 5),
            ]
        )

    def _cells(self, layer: Record) -> list[Text]:
        bound = layer["comm_bound"]
        compute_bar, exchange_bar = fmt.split_bar(layer["compute_s"] or 0.0, layer["exchange_s"] or 0.0, self._scale,
                                                  self._bar_width)  # null before the first complete step
        return [
            Text(COMM_MARK if bound else "", self.paint("bad")),
            fmt.fit(fmt.literal(layer["name"]), self._name_width),
            Text(fmt.seconds(layer["compute_s"]), justify="right"),
            Text(fmt.seconds(layer["exchange_s"]), justify="right"),
            Text.assemble((compute_bar, self.paint("compute")), (exchange_bar, self.paint("exchange"))),
            Text(fmt.percent(layer["comm_fraction"]), self.paint("bad") if bound else "", justify="right"),
            Text(fmt.percent(layer["comm_fraction_worst"]), justify="right"),
        ]

    def _retitle(self) -> None:
        table = self.table
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        count = len(self.snapshot["layers"]) if self.snapshot else 0
        title = Text.assemble(
            (f"{count} layers", self.paint("title")),
            f" by {table.sort_key.label} {arrow}",
            " · ",
            ("█", self.paint("compute")),
            " compute ",
            ("░", self.paint("exchange")),
            " exchange · ",
            (COMM_MARK, self.paint("bad")),
            " comm-bound",
        )
        self.query_one("#layers-title", Static).update(title)

    def _describe(self) -> None:
        layer = self.table.record_at_cursor()
        if layer is None:
            self.set_detail(Text("no layers reported yet"))
            return
        self.set_detail(
            Text.assemble(
                ("layer ", self.paint("quiet")),
                fmt.literal(layer["name"]),
                f" · compute {fmt.seconds(layer['compute_s'])} · exchange {fmt.seconds(layer['exchange_s'])}",
                f" · comm {fmt.percent(layer['comm_fraction'])},",
                f" worst rank {fmt.percent(layer['comm_fraction_worst'])}",
                (" · COMM-BOUND" if layer["comm_bound"] else "", self.paint("bad")),
                *((" · gradients of ", fmt.literal(layer["carries"])) if layer.get("carries") else ()),
                (" · enter: worst ranks", self.paint("quiet")),
            )
        )




    def on_data_table_row_selected(self, event: DataTable.RowSelected) -> None:
        """Drill down to the worst ranks of the chosen layer."""
        event.stop()
        layer = self.table.record_at_cursor()
        if layer is not None:
            self.app.push_screen(WorstRanksScreen(layer["index"], layer["name"]))

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
    SortKey("exch/step", lambda r: _step(r, "exchange_s"), how=("layers.per_step",)),
    SortKey("comm share", lambda r: r["comm_fraction"], how=("layers.comm_fraction", "layers.comm_bound")),
    SortKey("worst rank's comm share", lambda r: r["comm_fraction_worst"], how=("layers.comm_fraction_worst",)),
    SortKey("comp/step", lambda r: _step(r, "compute_s"), how=("layers.per_step",)),
    SortKey("model order", lambda r: r["index"], descending=False, how=("layers.comm_fraction",)),
    SortKey("name", lambda r: r["name"], descending=False, how=("layers.comm_fraction",)),
)


def _step(layer: Record, key: str) -> float | None:
    """A layer's time per step (mean rank), from `per_step`; None when the snapshot has none."""
    return (layer.get("per_step") or {}).get(key)


class LayersView(TableView):
    """One row per layer over the analysis window."""

    def __init__(self) -> None:
        super().__init__(id="layers")
        self._scale = 0.0
        self._bar_width = 10
        self._name_width = 14

    def compose(self) -> ComposeResult:
        yield Static(id="layers-title", classes="view-title")
        yield RecordTable(SORT_KEYS, lambda r: str(r["index"]), self._cells, match=lambda r: r["name"],
                          id="layers-table")


    def show(self, snapshot: Snapshot) -> None:
        """Rescale the bars to the largest layer and refill the table."""
        records = [{"index": i, **layer} for i, layer in enumerate(snapshot["layers"])]
        self._scale = max(((_step(r, "compute_s") or 0.0) + (_step(r, "exchange_s") or 0.0) for r in records),
                          default=0.0)
        self._layout_columns()
        self.table.set_records(records)
        self._retitle()
        self._describe()

    def on_resize(self) -> None:
        """Give spare width to the bar first, then to the names."""
        if self.snapshot is not None:
            self._layout_columns()
            self._retitle()

    def _layout_columns(self) -> None:
        """Names whole and figures whole: a narrow terminal leaves out the bar, then the worst rank's figures."""
        longest = max((fmt.literal(r["name"]).cell_len for r in self.snapshot["layers"]), default=5) \
            if self.snapshot else 14
        self._name_width = min(max(longest, 5), 40)
        fixed = len(COMM_MARK) + self._name_width + 9 + 9 + 10 + fmt.PERCENT_WIDTH + 5 + 7 * 2 + 2
        self._bar_width = min(max(self.size.width - fixed - 2, 0), 40)
        columns = [
            ColumnSpec("", len(COMM_MARK)),
            ColumnSpec("layer", self._name_width),
            ColumnSpec("comp/step", 9, drop=2),
            ColumnSpec("exch/step", 9),
            ColumnSpec("worst/step", 10, drop=3),
            ColumnSpec("time", max(self._bar_width, 6), drop=4),
            ColumnSpec("comm", fmt.PERCENT_WIDTH),
            ColumnSpec("worst", fmt.PERCENT_WIDTH + 1, drop=1),
        ]
        self.table.set_columns(columns, self.size.width - 2, hide={"time"} if self.plain else set())

    def _cells(self, layer: Record) -> list[Text]:
        bound = layer["comm_bound"]
        per_step = layer.get("per_step") or {}
        compute, exchange = per_step.get("compute_s"), per_step.get("exchange_s")
        compute_bar, exchange_bar = fmt.split_bar(compute or 0.0, exchange or 0.0, self._scale,
                                                  max(self._bar_width, 6))  # null before the first complete step
        return [
            Text(COMM_MARK if bound else "", self.paint("bad")),
            fmt.fit(fmt.literal(layer["name"]), self._name_width),
            Text(fmt.seconds(compute, self._scale), justify="right"),
            Text(fmt.seconds(exchange, self._scale), justify="right"),
            Text(fmt.seconds(per_step.get("exchange_worst_s"), self._scale), justify="right"),
            Text.assemble((compute_bar, self.paint("compute")), (exchange_bar, self.paint("exchange"))),
            Text(fmt.percent(layer["comm_fraction"]), self.paint("bad") if bound else "", justify="right"),
            Text(fmt.percent(layer["comm_fraction_worst"]), justify="right"),
        ]

    def _retitle(self) -> None:
        table = self.table
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        title = fmt.clauses(
            Text.assemble((fmt.counted(table.shown_records, "layer"), self.paint("title")),
                          f" by {table.sort_key.label} {arrow}"),
            [Text.assemble(("█", self.paint("compute")), " compute ", ("░", self.paint("exchange")), " exchange"),
             Text.assemble((COMM_MARK, self.paint("bad")), " comm-bound"),
             "per step: mean rank, worst: the rank with the most"],
            self._title_width(),
        )
        self.query_one("#layers-title", Static).update(title)

    def _describe(self) -> None:
        layer = self.table.record_at_cursor()
        if layer is None:
            self.set_detail(Text("no layers reported yet"))
            return
        per_step = layer.get("per_step") or {}
        self.set_detail(
            Text.assemble(
                ("layer ", self.paint("quiet")),
                fmt.literal(layer["name"]),
                f" · per step: compute {fmt.seconds(per_step.get('compute_s'), self._scale)}"
                f" (worst rank {fmt.seconds(per_step.get('compute_worst_s'), self._scale)}),"
                f" exchange {fmt.seconds(per_step.get('exchange_s'), self._scale)}"
                f" (worst rank {fmt.seconds(per_step.get('exchange_worst_s'), self._scale)})",
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

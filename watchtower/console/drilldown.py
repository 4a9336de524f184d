"""Drill-down from a layer to its worst ranks: which rank and node make the layer communication-bound, and
whom each of them waits on, so a victim points to its cause (a slow port, a straggler)."""

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
    SortKey("comm share", lambda r: r["comm_fraction"], how=("layers.comm_fraction_worst",)),
    SortKey("exch/step", lambda r: r.get("exchange_step_s"), how=("layers.per_step",)),
    SortKey("comp/step", lambda r: r.get("compute_step_s"), how=("layers.per_step",)),
    SortKey("rank", lambda r: r["rank"], descending=False, how=("layers.comm_fraction_worst",)),
)
BAR_WIDTH = 14


def waiting_on(rank: Record, snapshot: Snapshot) -> str:
    """Whom a rank waits on, named by the cause: the slow port on the sender's path, a straggler sender,
    a slow link no port explains, else just the sender; empty when it received nothing in the layer."""
    peer = rank.get("waits_on")
    if not peer:
        return ""
    if any(st["rank"] == peer["rank"] for st in snapshot.get("stragglers", [])):
        return f"rank {peer['rank']}, straggler"
    link = next((lk for lk in snapshot["links"] if (lk["src"], lk["dst"]) == (peer["node"], rank["node"])), None)
    if link is not None and link["slow"]:
        return f"port {link['port']}" if link["port"] else f"slow link {fmt.link(link['src'], link['dst'])}"
    return f"rank {peer['rank']} on {peer['node']}"


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
        self.watch(self.app, "snapshot", self._show)
        self.query_one(RecordTable).focus()

    def on_resize(self) -> None:
        """Lay the columns out again for the new width."""
        snapshot = getattr(self.app, "snapshot", None)
        if snapshot is not None:
            self._show(snapshot)

    def _columns(self, ranks: list[Record]) -> list[ColumnSpec]:
        """Names whole (the node and the cause are what the reader came for); the bar goes first."""
        node_width = max((fmt.literal(r["node"]).cell_len for r in ranks), default=4)
        cause_width = max((fmt.literal(r["_waits"]).cell_len for r in ranks), default=0)
        return [
            ColumnSpec("rank", 5),
            ColumnSpec("node", max(node_width, 4)),
            ColumnSpec("comp/step", 9),
            ColumnSpec("exch/step", 9),
            ColumnSpec("comm", fmt.PERCENT_WIDTH),
            ColumnSpec("waiting on", max(cause_width, 10)),
            ColumnSpec("time", BAR_WIDTH, drop=1),
        ]

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
        ranks = [{**r, "_waits": waiting_on(r, snapshot)} for r in layer["worst_ranks"]]
        self._scale = max(((r.get("compute_step_s") or 0.0) + (r.get("exchange_step_s") or 0.0) for r in ranks),
                          default=0.0)
        table.set_columns(self._columns(ranks), self.query_one("#ranks-box").content_size.width - 2)
        title.update(
            Text.assemble(
                ("worst ranks of layer ", self._paint("quiet")),
                fmt.literal(layer["name"]),
                "\ntimes per step · ",
                f"comm {fmt.percent(layer['comm_fraction'])} on the mean rank, "
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
            line = Text.assemble(f"rank {rank['rank']} on ", fmt.literal(rank["node"]))
            if rank["_waits"]:
                line.append_text(Text.assemble(" waits on ", fmt.literal(rank["_waits"])))
            line.append(" · ")
        line.append("█ compute ░ exchange · s: sort · r: reverse · esc: back to layers", self._paint("quiet"))
        self.query_one("#ranks-help", Static).update(line)

    def on_data_table_row_highlighted(self) -> None:
        """Follow the cursor in the help line."""
        self._describe()

    def _cells(self, rank: Record) -> list[Text]:
        compute, exchange = rank.get("compute_step_s"), rank.get("exchange_step_s")
        compute_bar, exchange_bar = fmt.split_bar(compute or 0.0, exchange or 0.0, self._scale, BAR_WIDTH)
        return [
            Text(str(rank["rank"]), justify="right"),
            fmt.literal(rank["node"]),
            Text(fmt.seconds(compute, self._scale), justify="right"),
            Text(fmt.seconds(exchange, self._scale), justify="right"),
            Text(fmt.percent(rank["comm_fraction"]), justify="right"),
            fmt.literal(rank["_waits"]),
            Text.assemble((compute_bar, self._paint("compute")), (exchange_bar, self._paint("exchange"))),
        ]

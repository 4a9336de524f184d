"""Links view: the β heat map beside a table of every directed node pair's fitted link model."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal, ScrollableContainer
from textual.widgets import Static

from . import format as fmt
from .feed import Snapshot
from .matrix import LEGEND_WIDTH, Grid, LinkMatrix, matrix_width
from .table import ColumnSpec, Record, RecordTable, SortKey
from .view import TableView

SLOW_MARK = "! SLOW"
"""Symbol and word for a slow link, so it does not rely on colour."""
ARROW = "→"

SORT_KEYS = (
    SortKey("score", lambda r: r["score"], descending=False, how=("score", "slow")),
    SortKey("hours at stake", lambda r: r["hours_at_stake"], how=("hours_at_stake",)),
    SortKey("β", lambda r: r["bandwidth_Bps"], descending=False, how=("bandwidth_Bps", "link_model")),
    SortKey("utilisation", lambda r: r["utilisation"], descending=False, how=("utilisation",)),
    SortKey("α", lambda r: r["latency_s"], how=("latency_s", "link_model")),
    SortKey("pair", lambda r: (r["src"], r["dst"]), descending=False, how=("link_model",)),
)

FIXED_COLUMNS = (
    ColumnSpec("", len(SLOW_MARK)),
    ColumnSpec("link", 15),
    ColumnSpec("β", 9),
    ColumnSpec("use", 4),
    ColumnSpec("α", 8),
    ColumnSpec("score", 5),
    ColumnSpec("stake", 6),
)
FIXED_WIDTH = sum(spec.width + 2 for spec in FIXED_COLUMNS) + 4
"""Cells the fixed columns take, with cell padding and room for the scroll bar."""


def link_key(link: Record) -> str:
    """A row key that stays the same across snapshots for the same directed pair."""
    return f"{link['src']}\x00{link['dst']}"


def link_name(link: Record, short: dict[str, str] | None = None) -> Text:
    """`src→dst` with both names shown literally (``short``: the tails that tell nodes apart)."""
    short = short or {}
    src, dst = link["src"], link["dst"]
    return Text.assemble(fmt.literal(short.get(src, src)), ARROW, fmt.literal(short.get(dst, dst)))


class LinksView(TableView):
    """Heat map on the left, table on the right; the table's cursor is reversed in the map."""

    def __init__(self) -> None:
        super().__init__(id="links")
        self._port_width = 14
        self._short: dict[str, str] = {}

    def compose(self) -> ComposeResult:
        yield Static(id="links-title", classes="view-title")
        with Horizontal():
            with ScrollableContainer(id="matrix-box"):
                yield LinkMatrix()
            yield RecordTable(SORT_KEYS, link_key, self._cells, id="links-table")

    def _layout_columns(self, box_width: int) -> None:
        """Give the port column what the heat map leaves; long names are whole in the detail line."""
        self._port_width = min(max(self.size.width - box_width - FIXED_WIDTH, 14), 40)
        self.table.set_columns([*FIXED_COLUMNS, ColumnSpec("port", self._port_width)])

    def on_resize(self) -> None:
        """Redraw the heat map and the columns for the new width."""
        if self.snapshot is not None:
            self.show(self.snapshot)


    def show(self, snapshot: Snapshot) -> None:
        """Refill the map and the table."""
        links = snapshot["links"]
        names = [node["name"] for node in snapshot["nodes"]]
        for link in links:
            names.extend(n for n in (link["src"], link["dst"]) if n not in names)
        self._short = fmt.short_names(names)
        box = self.query_one("#matrix-box", ScrollableContainer)
        box_width = min(matrix_width(len(names)) + 1, max(self.size.width // 2, LEGEND_WIDTH + 1))
        box.styles.width = box_width
        self._layout_columns(box_width)
        self.query_one(LinkMatrix).grid = Grid(
            tuple(names),
            {(link["src"], link["dst"]): link["bandwidth_Bps"] for link in links},
            frozenset((link["src"], link["dst"]) for link in links if link["slow"]),
        )
        self.table.set_records(links)
        self._retitle()
        self._describe()

    def _cells(self, link: Record) -> list[Text]:
        slow = link["slow"]
        bad = self.paint("bad")
        return [
            Text(SLOW_MARK if slow else "", bad),
            fmt.fit(link_name(link, self._short), 15),
            Text(fmt.rate(link["bandwidth_Bps"]), bad if slow else "", justify="right"),
            Text(fmt.percent(link["utilisation"]), justify="right"),
            Text(fmt.seconds(link["latency_s"]), justify="right"),
            Text(fmt.number(link["score"]), justify="right"),
            Text(fmt.hours(link["hours_at_stake"]), justify="right"),
            fmt.fit(fmt.literal(self._short_port(link["port"])), self._port_width) if link["port"] is not None
            else Text(""),
        ]

    def _short_port(self, port: str) -> str:
        """"kestrel-04 out" as "04 out" when the node names share a prefix."""
        node, _, direction = port.rpartition(" ")
        return f"{self._short.get(node, node)} {direction}" if node else port

    def _retitle(self) -> None:
        table = self.table
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        slow = sum(1 for link in self.snapshot["links"] if link["slow"]) if self.snapshot else 0
        fixed = next((w for w in self.snapshot.get("whatif", []) if w.get("slow_fixed")), None) \
            if self.snapshot else None
        title = Text.assemble(
            (f"{len(table.rows)} links", self.paint("title")),
            f" by {table.sort_key.label} {arrow} · ",
            (SLOW_MARK, self.paint("bad")),
            f" {slow} slow",
            f" (fixed: step {fmt.seconds(fixed['step_s'])}, speedup {fmt.number(fixed['speedup'])})"
            if fixed is not None and slow else "",
            " · use = throughput/nominal · ←→ scroll",
        )
        self.query_one("#links-title", Static).update(title)

    def _describe(self) -> None:
        link = self.table.record_at_cursor()
        self.query_one(LinkMatrix).selected = None if link is None else (link["src"], link["dst"])
        if link is None:
            self.set_detail(Text("no links measured yet"))
            return
        port = Text("no single port explains it") if link["port"] is None else fmt.literal(link["port"])
        self.set_detail(
            Text.assemble(
                link_name(link),
                (" SLOW" if link["slow"] else "", self.paint("bad")),
                f" · α {fmt.seconds(link['latency_s'])} · β {fmt.rate(link['bandwidth_Bps'])}",
                f" · throughput {fmt.rate(link['throughput_Bps'])} = {fmt.percent(link['utilisation'])}",
                f" of nominal {fmt.rate(link['nominal_Bps'])} · score {fmt.number(link['score'])}",
                f" · {fmt.hours(link['hours_at_stake'])} at stake · {fmt.count(link['transfers'])} transfers,",
                f" {fmt.count(link['bytes'])} B · port ",
                port,
            )
        )




"""Nodes view: NIC throughput, CPU, memory, clock offset and freshness per node; stragglers called out."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.widgets import Static

from . import format as fmt
from .feed import Snapshot
from .table import ColumnSpec, Record, RecordTable, SortKey
from .view import TableView

STRAGGLER_MARK = "◆ LAG"
"""Symbol and word for a node hosting a straggler rank, so it does not rely on colour."""

SORT_KEYS = (
    SortKey("name", lambda r: r["name"], descending=False, how=("nodes",)),
    SortKey("NIC out", lambda r: r["nic_out_Bps"], how=("nic_out_Bps", "nic")),
    SortKey("NIC in", lambda r: r["nic_in_Bps"], how=("nic_in_Bps", "nic")),
    SortKey("CPU", lambda r: r["cpu_percent"], how=("cpu_percent",)),
    SortKey("memory", lambda r: r["memory_percent"], how=("memory_percent",)),
    SortKey(
        "clock offset",
        lambda r: abs(r["clock_offset_s"]) if r["clock_offset_s"] is not None else None,
        how=("clock_offset_s",),
    ),
    SortKey("last heard", lambda r: r["last_heard_s"], how=("last_heard_s",)),
    SortKey("straggler", lambda r: r["straggler"], how=("straggler", "stragglers")),
)

COLUMNS = (
    ColumnSpec("", len(STRAGGLER_MARK)),
    ColumnSpec("node", 10),
    ColumnSpec("ranks", 6),
    ColumnSpec("NIC out", 9),
    ColumnSpec("NIC in", 9),
    ColumnSpec("CPU", 4),
    ColumnSpec("mem", 4),
    ColumnSpec("clock", 8),
    ColumnSpec("heard", 6),
)


class NodesView(TableView):
    """One row per node, then the straggler ranks the analysis picked out."""

    def __init__(self) -> None:
        super().__init__(id="nodes")

    def compose(self) -> ComposeResult:
        yield Static(id="nodes-title", classes="view-title")
        yield RecordTable(SORT_KEYS, lambda r: r["name"], self._cells, id="nodes-table")
        yield Static(id="stragglers", classes="view-foot")

    def on_mount(self) -> None:
        """Columns are fixed; long names are shown whole in the detail line."""
        self.table.set_columns(COLUMNS)


    def show(self, snapshot: Snapshot) -> None:
        """Refill the table and the straggler line."""
        self.table.set_records(snapshot["nodes"])
        self._retitle()
        self._describe()
        stragglers = snapshot["stragglers"]
        line = Text.assemble((STRAGGLER_MARK, self.paint("bad")), " stragglers: ")
        if not stragglers:
            line.append("none", self.paint("quiet"))
        for number, straggler in enumerate(stragglers):
            line.append(", " if number else "")
            line.append_text(
                Text.assemble(
                    f"rank {straggler['rank']} on ",
                    fmt.literal(straggler["node"]),
                    f" (compute {fmt.seconds(straggler['compute_s'])}, score {fmt.number(straggler['score'])})",
                )
            )
        self.query_one("#stragglers", Static).update(line)

    def _cells(self, node: Record) -> list[Text]:
        bad = self.paint("bad")
        return [
            Text(STRAGGLER_MARK if node["straggler"] else "", bad),
            fmt.fit(fmt.literal(node["name"]), 10),
            fmt.fit(Text(fmt.ranges(node["ranks"])), 6),
            Text(fmt.rate(node["nic_out_Bps"]), justify="right"),
            Text(fmt.rate(node["nic_in_Bps"]), justify="right"),
            Text(fmt.plain_percent(node["cpu_percent"]), justify="right"),
            Text(fmt.plain_percent(node["memory_percent"]), justify="right"),
            Text(fmt.signed_seconds(node["clock_offset_s"]), justify="right"),
            Text(("▲" if node.get("silent") else "") + fmt.seconds(node["last_heard_s"]),
                 bad if node.get("silent") else "", justify="right"),
        ]

    def _retitle(self) -> None:
        table = self.table
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        title = Text.assemble(
            (f"{len(table.rows)} nodes", self.paint("title")),
            f" by {table.sort_key.label} {arrow} · ",
            (STRAGGLER_MARK, self.paint("bad")),
            " hosts a straggler · heard = age of newest frame",
        )
        self.query_one("#nodes-title", Static).update(title)

    def _describe(self) -> None:
        node = self.table.record_at_cursor()
        if node is None:
            self.set_detail(Text("no nodes heard from yet"))
            return
        self.set_detail(
            Text.assemble(
                ("node ", self.paint("quiet")),
                fmt.literal(node["name"]),
                (" hosts a STRAGGLER" if node["straggler"] else "", self.paint("bad")),
                (" is SILENT" if node.get("silent") else "", self.paint("bad")),
                f" · ranks {fmt.ranges(node['ranks'])} · NIC out {fmt.rate(node['nic_out_Bps'])}",
                f" in {fmt.rate(node['nic_in_Bps'])} · CPU {fmt.plain_percent(node['cpu_percent'])}",
                f" · memory {fmt.plain_percent(node['memory_percent'])}",
                f" · clock {fmt.signed_seconds(node['clock_offset_s'])}",
                f" · heard {fmt.seconds(node['last_heard_s'])} ago",
            )
        )




"""Nodes view: each node's way out and in (capacity and verdict), NIC throughput, CPU, memory, clock offset and
freshness; stragglers called out."""

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

LOWER_BOUND = "≥"
"""Before a capacity the port never showed its limit at (every link through it ran at its other end's)."""


def _capacity(node: Record, direction: str) -> float | None:
    port = node["ports"].get(direction)
    return None if port is None else port["capacity_Bps"]


def verdict(port: Record | None) -> str:
    """One word for a port: SLOW, held (its shortfall is the other direction's doing), ok, or unknown."""
    if port is None:
        return fmt.MISSING
    if port["slow"]:
        return "SLOW"
    return "held" if port.get("shadowed_by") else "ok"


def capacity(port: Record | None) -> str:
    """A port's capacity, marked as a lower bound when the port never showed its own limit."""
    if port is None:
        return fmt.MISSING
    return (LOWER_BOUND if port.get("lower_bound") else "") + fmt.rate(port["capacity_Bps"])


SORT_KEYS = (
    SortKey("name", lambda r: r["name"], descending=False, how=("ports.capacity_Bps",)),
    SortKey("way out", lambda r: _capacity(r, "out"), descending=False, how=("ports.capacity_Bps", "ports.slow")),
    SortKey("way in", lambda r: _capacity(r, "in"), descending=False, how=("ports.capacity_Bps", "ports.slow")),
    SortKey("NIC out", lambda r: r["nic_out_Bps"], how=("ports.nic_Bps",)),
    SortKey("NIC in", lambda r: r["nic_in_Bps"], how=("ports.nic_Bps",)),
    SortKey("CPU", lambda r: r["cpu_percent"]),
    SortKey("memory", lambda r: r["memory_percent"]),
    SortKey("clock offset", lambda r: abs(r["clock_offset_s"]) if r["clock_offset_s"] is not None else None),
    SortKey("last heard", lambda r: r["last_heard_s"]),
    SortKey("straggler", lambda r: r["straggler"], how=("stragglers",)),
)


class NodesView(TableView):
    """One row per node, then the straggler ranks the analysis picked out."""

    def __init__(self) -> None:
        super().__init__(id="nodes")
        self._widest_offset = 0.0  # the clock column's largest offset: the unit a zero offset is shown in

    def compose(self) -> ComposeResult:
        yield Static(id="nodes-title", classes="view-title")
        yield RecordTable(SORT_KEYS, lambda r: r["name"], self._cells, match=lambda r: r["name"], id="nodes-table")
        yield Static(id="stragglers", classes="view-foot")

    def on_resize(self) -> None:
        """Drop the least telling columns first when the terminal narrows."""
        if self.snapshot is not None:
            self.show(self.snapshot)

    def _columns(self, nodes: list[Record]) -> list[ColumnSpec]:
        """The node's name whole (it may be the culprit); the rest keep their widths or drop out whole."""
        name_width = max((fmt.literal(n["name"]).cell_len for n in nodes), default=4)
        return [
            ColumnSpec("", len(STRAGGLER_MARK)),
            ColumnSpec("node", max(name_width, 4)),
            ColumnSpec("way out", fmt.RATE_WIDTH + 1),
            ColumnSpec("out", 4),
            ColumnSpec("way in", fmt.RATE_WIDTH + 1),
            ColumnSpec("in", 4),
            ColumnSpec("heard", fmt.SECONDS_WIDTH, drop=1),
            ColumnSpec("ranks", 6, drop=5),
            ColumnSpec("NIC out", fmt.RATE_WIDTH, drop=3),
            ColumnSpec("NIC in", fmt.RATE_WIDTH, drop=4),
            ColumnSpec("CPU", fmt.PERCENT_WIDTH, drop=6),
            ColumnSpec("mem", fmt.PERCENT_WIDTH, drop=7),
            ColumnSpec("clock", fmt.SIGNED_SECONDS_WIDTH, drop=2),
        ]

    def show(self, snapshot: Snapshot) -> None:
        """Refill the table and the straggler line."""
        ports: dict[str, dict[str, Record]] = {}
        for port in snapshot.get("ports", []):
            ports.setdefault(port["node"], {})[port["direction"]] = port
        nodes = [{**node, "ports": ports.get(node["name"], {})} for node in snapshot["nodes"]]
        self._widest_offset = max((abs(n["clock_offset_s"] or 0.0) for n in nodes), default=0.0)
        self.table.set_columns(self._columns(nodes), self.size.width - 2)
        self.table.set_records(nodes)
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
                    f" (compute {fmt.seconds(straggler['compute_s'])} in the window,"
                    f" score {fmt.number(straggler['score'])})",
                )
            )
        self.query_one("#stragglers", Static).update(line)

    def _cells(self, node: Record) -> list[Text]:
        bad = self.paint("bad")
        out, in_ = node["ports"].get("out"), node["ports"].get("in")
        return [
            Text(STRAGGLER_MARK if node["straggler"] else "", bad),
            fmt.literal(node["name"]),
            Text(capacity(out), bad if out and out["slow"] else "", justify="right"),
            Text(verdict(out), bad if out and out["slow"] else self.paint("quiet")),
            Text(capacity(in_), bad if in_ and in_["slow"] else "", justify="right"),
            Text(verdict(in_), bad if in_ and in_["slow"] else self.paint("quiet")),
            Text(("▲" if node.get("silent") else "") + fmt.seconds(node["last_heard_s"]),
                 bad if node.get("silent") else "", justify="right"),
            fmt.fit(Text(fmt.ranges(node["ranks"])), 6),
            Text(fmt.rate(node["nic_out_Bps"]), justify="right"),
            Text(fmt.rate(node["nic_in_Bps"]), justify="right"),
            Text(fmt.plain_percent(node["cpu_percent"]), justify="right"),
            Text(fmt.plain_percent(node["memory_percent"]), justify="right"),
            Text(fmt.signed_seconds(node["clock_offset_s"], self._widest_offset), justify="right"),
        ]

    def _retitle(self) -> None:
        table = self.table
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        title = Text.assemble(
            (fmt.counted(table.shown_records, "node"), self.paint("title")),
            f" by {table.sort_key.label} {arrow} · ",
            (STRAGGLER_MARK, self.paint("bad")),
            f" straggler · way out/in: port capacity ({LOWER_BOUND}: lower bound) · heard: age of newest frame",
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
                self._port_detail(node, "out"),
                self._port_detail(node, "in"),
                f" · ranks {fmt.ranges(node['ranks'])} · NIC out {fmt.rate(node['nic_out_Bps'])}",
                f" in {fmt.rate(node['nic_in_Bps'])} · CPU {fmt.plain_percent(node['cpu_percent'])}",
                f" · memory {fmt.plain_percent(node['memory_percent'])}",
                f" · clock {fmt.signed_seconds(node['clock_offset_s'])}",
                f" · heard {fmt.seconds(node['last_heard_s'])} ago",
            )
        )

    def _port_detail(self, node: Record, direction: str) -> Text:
        port = node["ports"].get(direction)
        if port is None:
            return Text(f" · way {direction} not measured")
        line = Text(f" · way {direction} {capacity(port)} ")
        if port["slow"]:
            line.append(f"SLOW ({port.get('reason') or 'slow'})", self.paint("bad"))
        elif port.get("shadowed_by"):
            line.append(f"held back by its way {port['shadowed_by'].rpartition(' ')[2]}")
        else:
            line.append("ok")
        return line

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
ARROW = fmt.ARROW
CLAMPED = "clamped"
"""Shown for α when the fit's intercept came out below zero and α was taken as 0."""
UNEXPLAINED = "path?"
"""Port cell of a slow link no slow port explains (the path between the ends, or the pair itself)."""
CHECK_MARK = "chk"
"""In the "%nom" column of a link measured by the node daemons' pair checks (the job sends nothing over it)."""


def checked_label(link: Record) -> str:
    """"measured by check every N s" for a link the pair checks measured, else ""."""
    if link.get("measured_by") != "check":
        return ""
    every = link.get("check_every_s")
    return "measured by check" + ("" if every is None else f" every {every:.0f} s")


SORT_KEYS = (
    SortKey("score", lambda r: r["score"], descending=False, how=("links.score", "links.slow")),
    SortKey("hours at stake", lambda r: r["hours_at_stake"], how=("links.hours_at_stake",)),
    SortKey("β", lambda r: r["bandwidth_Bps"], descending=False, how=("links.bandwidth_Bps",)),
    SortKey("of nominal", lambda r: r["of_nominal"], descending=False, how=("links.of_nominal",)),
    SortKey("α", lambda r: r["latency_s"], how=("links.latency_s",)),
    SortKey("pair", lambda r: (r["src"], r["dst"]), descending=False, how=("links.bandwidth_Bps",)),
)
TABLE_CORE = 40
"""Cells the table needs for mark, link, port and β; below this beside the heat map, the map gives way."""


def link_key(link: Record) -> str:
    """A row key that stays the same across snapshots for the same directed pair."""
    return f"{link['src']}\x00{link['dst']}"


def link_name(link: Record, short: dict[str, str] | None = None) -> Text:
    """`src→dst` with both names shown literally (``short``: the tails that tell nodes apart)."""
    short = short or {}
    src, dst = link["src"], link["dst"]
    return Text.assemble(fmt.literal(short.get(src, src)), ARROW, fmt.literal(short.get(dst, dst)))


def latency(link: Record) -> str:
    """α, or the word saying it was clamped rather than measured."""
    return CLAMPED if link.get("latency_clamped") else fmt.seconds(link["latency_s"])


class LinksView(TableView):
    """Heat map on the left, table on the right; the table's cursor is reversed in the map."""

    def __init__(self) -> None:
        super().__init__(id="links")
        self._short: dict[str, str] = {}

    def compose(self) -> ComposeResult:
        yield Static(id="links-title", classes="view-title")
        with Horizontal():
            with ScrollableContainer(id="matrix-box"):
                yield LinkMatrix()
            yield RecordTable(SORT_KEYS, link_key, self._cells, match=lambda r: f"{r['src']} {r['dst']}",
                              id="links-table")

    def on_resize(self) -> None:
        """Redraw the heat map and the columns for the new width."""
        if self.snapshot is not None:
            self.show(self.snapshot)

    def _columns(self, links: list[Record]) -> list[ColumnSpec]:
        """Widths from the names shown, so the culprit's name is never cut; figures drop out whole."""
        link_width = max((link_name(lk, self._short).cell_len for lk in links), default=4)
        port_width = max((len(self._short_port(lk["port"])) for lk in links if lk["port"]), default=0)
        return [
            ColumnSpec("", len(SLOW_MARK)),
            ColumnSpec("link", max(link_width, 4)),
            ColumnSpec("port", max(port_width, len(UNEXPLAINED))),
            ColumnSpec("β", fmt.RATE_WIDTH),
            ColumnSpec("%nom", fmt.PERCENT_WIDTH, drop=1),
            ColumnSpec("stake", fmt.HOURS_WIDTH, drop=2),
            ColumnSpec("score", 5, drop=3),
            ColumnSpec("α", fmt.SECONDS_WIDTH, drop=4),
        ]

    def show(self, snapshot: Snapshot) -> None:
        """Refill the map and the table."""
        links = snapshot["links"]
        names = [node["name"] for node in snapshot["nodes"]]
        for link in links:
            names.extend(n for n in (link["src"], link["dst"]) if n not in names)
        short = fmt.short_names(names)
        box = self.query_one("#matrix-box", ScrollableContainer)
        box_width = min(matrix_width(len(names)) + 1, max(self.size.width // 2, LEGEND_WIDTH + 1))
        box.display = self.size.width - box_width >= TABLE_CORE
        room = self.size.width - (box_width if box.display else 0) - 2  # the table's scroll bar
        box.styles.width = box_width
        self._short = {}  # whole names when every column fits with them, else the tails that tell nodes apart
        if sum(spec.width + 2 for spec in self._columns(links)) > room:
            self._short = short
        self.table.set_columns(self._columns(links), room)
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
        if link["port"] is not None:
            port = fmt.literal(self._short_port(link["port"]), bad)
        else:
            port = Text(UNEXPLAINED if slow and link.get("unexplained") else "")
        return [
            Text(SLOW_MARK if slow else "", bad),
            link_name(link, self._short),
            port,
            Text(fmt.rate(link["bandwidth_Bps"]), bad if slow else "", justify="right"),
            Text(CHECK_MARK if link.get("measured_by") == "check" else fmt.percent(link["of_nominal"]),
                 justify="right"),
            Text(fmt.hours(link["hours_at_stake"]), justify="right"),
            Text(fmt.number(link["score"]), justify="right"),
            Text(latency(link), self.paint("quiet") if link.get("latency_clamped") else "", justify="right"),
        ]

    def _short_port(self, port: str) -> str:
        """"<node> out" as "<tail> out" when the node names share a prefix."""
        node, _, direction = port.rpartition(" ")
        return f"{self._short.get(node, node)} {direction}" if node else port

    def _retitle(self) -> None:
        table = self.table
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        links = self.snapshot["links"] if self.snapshot else []
        slow = sum(1 for link in links if link["slow"])
        checked = next((label for link in links if (label := checked_label(link))), "")
        hidden = table.hidden_columns
        fixed = next((w for w in self.snapshot.get("whatif", []) if w.get("slow_fixed")), None) \
            if self.snapshot else None
        title = Text.assemble(
            (fmt.counted(table.shown_records, "link"), self.paint("title")),
            f" by {table.sort_key.label} {arrow} · ",
            (SLOW_MARK, self.paint("bad")),
            f" {slow} slow",
            f" ({CHECK_MARK}: {checked})" if checked else "",
            f" (fixed: step {fmt.seconds(fixed['step_s'])}, speedup {fmt.number(fixed['speedup'])})"
            if fixed is not None and slow else "",
        )
        optional = [] if "%nom" in hidden else ["%nom = throughput ÷ nominal"]
        optional += [f"{', '.join(hidden)}: in the detail line"] if hidden else []
        self.query_one("#links-title", Static).update(fmt.clauses(title, optional, self._title_width()))

    def _describe(self) -> None:
        link = self.table.record_at_cursor()
        self.query_one(LinkMatrix).selected = None if link is None else (link["src"], link["dst"])
        if link is None:
            self.set_detail(Text("no links measured yet"))
            return
        if link["port"] is not None:
            port = Text.assemble(" · limited by port ", fmt.literal(link["port"], self.paint("bad")))
        elif link["slow"] and link.get("unexplained"):
            port = Text(" · no slow port explains it: the path between the ends, or the pair itself")
        else:
            port = Text()
        beta, nominal = link["bandwidth_Bps"], link["nominal_Bps"]
        above = (f" ({fmt.percent(beta / nominal - 1)} above nominal: the fit's error, no card beats its rate)"
                 if beta is not None and nominal and beta > nominal else "")
        alpha = ("α clamped to 0 (fit below zero: too small to measure)"
                 if link.get("latency_clamped") else f"α {fmt.seconds(link['latency_s'])}")
        self.set_detail(
            Text.assemble(
                link_name(link),
                (" SLOW" if link["slow"] else "", self.paint("bad")),
                port,
                f" · β {fmt.rate(beta)}{above} · throughput {fmt.rate(link['throughput_Bps'])}",
                f" = {fmt.percent(link['of_nominal'])} of nominal {fmt.rate(link['nominal_Bps'])}",
                f" · {alpha} · score {fmt.number(link['score'])}",
                f" · {fmt.hours(link['hours_at_stake'])} at stake · {fmt.counted(link['transfers'], 'transfer')},",
                f" {fmt.size(link['bytes'])}",
                f" · {label}" if (label := checked_label(link)) else "",
            )
        )

"""Alerts view: each degradation, since when, what it puts at stake, and a cautious next check."""

from __future__ import annotations

import re
from typing import Any

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import VerticalScroll
from textual.widgets import Static

from . import format as fmt
from .feed import Snapshot
from .table import ColumnSpec, Record, RecordTable, SortKey
from .view import TableView

SORT_KEYS = (
    SortKey("detected", lambda r: r["step_detected"], how=("alerts", "degradation")),
    SortKey("began", lambda r: r["step_began"], how=("alerts", "degradation")),
    SortKey("hours at stake", lambda r: r["hours"], how=("hours_at_stake",)),
    SortKey("kind", lambda r: r["kind"], descending=False, how=("alerts",)),
)

COLUMNS = (
    ColumnSpec("kind", 16),
    ColumnSpec("subject", 17),
    ColumnSpec("began", 7),
    ColumnSpec("detected", 8),
    ColumnSpec("stake", 6),
)

_LINK_SUBJECT = re.compile(r"^\s*(?P<src>.+?)\s*(?:→|->)\s*(?P<dst>.+?)\s*$")


def subject_link(alert: Record, links: list[dict[str, Any]]) -> dict[str, Any] | None:
    """The link an alert is about, when its subject reads `src→dst` (or `src->dst`)."""
    match = _LINK_SUBJECT.match(alert["subject"])
    if match is None:
        return None
    pair = (match["src"], match["dst"])
    return next((link for link in links if (link["src"], link["dst"]) == pair), None)


def next_check(alert: Record, link: dict[str, Any] | None) -> Text:
    """A cautious first step that gathers evidence and leaves any change to the site's operators."""
    began = f"step {alert['step_began']}"
    if link is not None and link["port"] is not None:
        return Text.assemble(
            "Compare the error and discard counters of port ",
            fmt.literal(link["port"]),
            f" from before and after {began} with your network operators before anyone re-cables, "
            "reseats or changes a link setting; follow their and the vendor's guidance.",
        )
    if link is not None:
        return Text.assemble(
            "Ask your network operators to look at the counters on both ends of ",
            fmt.literal(link["src"]),
            "→",
            fmt.literal(link["dst"]),
            f" since {began}; leave any re-cabling or setting change to them and the vendor's guidance.",
        )
    if "step" in alert["kind"]:
        return Text(
            f"See whether the slowdown since {began} follows one link (view 2) or one node (view 3), "
            "then share those steps with your operators before changing hardware or settings."
        )
    return Text(
        f"Look at the subject's figures in the other views since {began} and talk to your site's "
        "operators before changing hardware or settings."
    )


class AlertsView(TableView):
    """A table of alerts; the selected one is explained in full below it."""

    def __init__(self) -> None:
        super().__init__(id="alerts")

    def compose(self) -> ComposeResult:
        yield Static(id="alerts-title", classes="view-title")
        yield RecordTable(
            SORT_KEYS, lambda r: f"{r['kind']}\x00{r['subject']}\x00{r['step_began']}", self._cells, id="alerts-table"
        )
        with VerticalScroll(id="alert-box"):
            yield Static(id="alert-text")

    def on_mount(self) -> None:
        """Columns are fixed; the full alert is in the panel below the table."""
        self.table.set_columns(COLUMNS)


    def show(self, snapshot: Snapshot) -> None:
        """Refill the table, attaching to each alert its link and the hours at stake."""
        records = []
        for alert in snapshot["alerts"]:
            link = subject_link(alert, snapshot["links"])
            hours = link["hours_at_stake"] if link is not None else snapshot["hours_at_stake"]
            records.append({**alert, "link": link, "hours": hours})
        self.table.set_records(records)
        self._retitle()
        self._describe()

    def _cells(self, alert: Record) -> list[Text]:
        return [
            Text.assemble(("▲ ", self.paint("bad")), fmt.fit(fmt.literal(alert["kind"]), 14)),
            fmt.fit(fmt.literal(alert["subject"]), 17),
            Text(str(alert["step_began"]), justify="right"),
            Text(str(alert["step_detected"]), justify="right"),
            Text(fmt.hours(alert["hours"]), justify="right"),
        ]

    def _retitle(self) -> None:
        table = self.table
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        title = Text.assemble(
            (fmt.counted(len(table.rows), "alert"), self.paint("title")),
            f" by {table.sort_key.label} {arrow} · steps when the drift began and when it was detected",
        )
        self.query_one("#alerts-title", Static).update(title)

    def _describe(self) -> None:
        alert = self.table.record_at_cursor()
        panel = self.query_one("#alert-text", Static)
        if alert is None:
            panel.update(Text("No degradation detected in this run so far.", self.paint("quiet")))
            self.set_detail(Text("no alerts"))
            return
        scope = "on this link" if alert["link"] is not None else "for the job (all slow links)"
        panel.update(
            Text.assemble(
                ("▲ ", self.paint("bad")),
                fmt.literal(alert["kind"]),
                " on ",
                fmt.literal(alert["subject"]),
                f" — began at step {alert['step_began']}, detected at step {alert['step_detected']}, "
                f"{fmt.hours(alert['hours'])} at stake {scope}.\n",
                fmt.literal(alert["message"]),
                ("\nnext check: ", self.paint("title")),
                next_check(alert, alert["link"]),
            )
        )
        self.set_detail(Text.assemble(fmt.literal(alert["kind"]), " · ", fmt.literal(alert["subject"])))




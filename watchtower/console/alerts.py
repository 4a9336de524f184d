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

# Standing faults first, then open alerts, closed ones and recoveries (in the default order of every key).
_GROUP = {"standing": 3, "open": 2, "closed": 1, "recovered": 0}

SORT_KEYS = (
    SortKey("detected", lambda r: (_GROUP[r["state"]], r["step_detected"] or -1), how=("alerts", "degradation")),
    SortKey("began", lambda r: (_GROUP[r["state"]], r["step_began"] or -1), how=("alerts", "degradation")),
    SortKey("hours at stake", lambda r: (_GROUP[r["state"]], r["hours"] or 0.0), how=("hours_at_stake",)),
    SortKey("kind", lambda r: (-_GROUP[r["state"]], r["kind"]), descending=False, how=("alerts",)),
)

MARK = {"standing": "■", "open": "▲", "closed": "✓", "recovered": "↺"}


def columns(records: list[Record]) -> tuple[ColumnSpec, ...]:
    """Kind, subject and culprit as wide as their longest value: a name that names the culprit is never cut
    (the table scrolls sideways instead)."""

    def widest(label: str, values: list[str]) -> int:
        return max([len(label), *map(len, values)])

    return (
        ColumnSpec("", 1),
        ColumnSpec("kind", widest("kind", [r["kind"] for r in records])),
        ColumnSpec("subject", widest("subject", [r["subject"] for r in records])),
        ColumnSpec("culprit", widest("culprit", [r["port"] or "" for r in records])),
        ColumnSpec("span", widest("span", [span(r) for r in records])),
        ColumnSpec("stake", 6),
    )


def span(record: Record) -> str:
    """Steps the finding covers: the whole window, from its onset (still open), or onset to return."""
    if record["state"] == "standing":
        return "whole window"
    if record["state"] == "recovered":
        return f"back {record['step_began']}"
    end = record.get("step_closed")
    return f"{record['step_began']}–{'' if end is None else end}"


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
    if alert.get("state") == "standing":
        return Text.assemble(
            "Compare the negotiated speed and the error counters of ",
            fmt.literal(alert["port"] or alert["subject"]),
            " with its peers together with your network operators before anyone re-cables, reseats or changes "
            "a link setting; follow their and the vendor's guidance.",
        )
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
    """Standing faults above the change alerts, open and closed; the selected one explained below."""

    def __init__(self) -> None:
        super().__init__(id="alerts")
        self._records: list[Record] = []

    def compose(self) -> ComposeResult:
        yield Static(id="alerts-title", classes="view-title")
        yield RecordTable(
            SORT_KEYS, lambda r: f"{r['state']}\x00{r['kind']}\x00{r['subject']}\x00{r['step_began']}", self._cells,
            id="alerts-table"
        )
        with VerticalScroll(id="alert-box"):
            yield Static(id="alert-text")

    def on_mount(self) -> None:
        """Columns follow the widest name; the full alert is in the panel below the table."""
        self.table.set_columns(columns([]))

    def show(self, snapshot: Snapshot) -> None:
        """Refill the table: standing findings, then alerts (each with its own stake) and recoveries."""
        records = [{"kind": f["kind"], "subject": f["subject"], "port": f["culprit"], "state": "standing",
                    "step_began": None, "step_detected": None, "step_closed": None, "hours": f["hours_at_stake"],
                    "hours_once_others_fixed": f.get("hours_once_others_fixed"),
                    "message": f["message"], "link": None, "links": f["links"]}
                   for f in snapshot.get("standing", [])]
        for alert in snapshot["alerts"]:
            link = subject_link(alert, snapshot["links"])
            state = "open" if alert.get("step_closed") is None else "closed"
            hours = alert.get("hours_at_stake", link["hours_at_stake"] if link is not None else None)
            port = alert.get("port") or (link["port"] if link is not None else None)
            records.append({**alert, "port": port, "link": link, "hours": hours, "state": state})
        for event in snapshot.get("recoveries", []):
            records.append({**event, "link": None, "hours": None, "state": "recovered"})
        self._records = records
        self.table.set_columns(columns(records))
        self.table.set_records(records)
        self._retitle()
        self._describe()

    def _cells(self, record: Record) -> list[Text]:
        bad = record["state"] in ("standing", "open")
        return [
            Text(MARK[record["state"]], self.paint("bad" if bad else "quiet")),
            fmt.literal(record["kind"]),
            fmt.literal(record["subject"]),
            fmt.literal(record["port"] or ""),
            Text(span(record)),
            Text(fmt.hours(record["hours"]), justify="right"),
        ]

    def _retitle(self) -> None:
        table = self.table
        counts = {state: 0 for state in MARK}
        for record in self._records:
            counts[record["state"]] += 1
        arrow = "▼" if table.sort_key.descending != table.flipped else "▲"
        title = Text.assemble(
            (f"{counts['standing']} standing · {counts['open']} open · {counts['closed']} closed", self.paint("title")),
            f" by {table.sort_key.label} {arrow} · span: steps from onset to return",
        )
        self.query_one("#alerts-title", Static).update(title)

    def _describe(self) -> None:
        alert = self.table.record_at_cursor()
        panel = self.query_one("#alert-text", Static)
        if alert is None:
            panel.update(Text("No standing fault and no degradation in this run so far.", self.paint("quiet")))
            self.set_detail(Text("no alerts"))
            return
        if alert["state"] == "standing":
            about = Text.assemble(
                ("■ ", self.paint("bad")), fmt.literal(alert["subject"]), " — slow for the whole window; fixing it "
                f"alone would save {fmt.hours(alert['hours'])} of the remaining run, "
                f"{fmt.hours(alert.get('hours_once_others_fixed'))} once the other slow links are fixed (links held "
                f"back: {', '.join(alert['links'])}).\n", fmt.literal(alert["message"]))
        elif alert["state"] == "recovered":
            about = Text.assemble(("↺ ", self.paint("quiet")), fmt.literal(alert["message"]))
        else:
            end = alert.get("step_closed")
            closed = "" if end is None else f", back to its earlier level from step {end}"
            about = Text.assemble(
                (f"{MARK[alert['state']]} ", self.paint("bad" if alert["state"] == "open" else "quiet")),
                fmt.literal(alert["kind"]), " on ", fmt.literal(alert["subject"]),
                f" — began at step {alert['step_began']}, detected at step {alert['step_detected']}{closed}; "
                f"{fmt.hours(alert['hours'])} at stake (the step-time change since then, over the remaining steps).\n",
                fmt.literal(alert["message"]))
        panel.update(Text.assemble(about, ("\nnext check: ", self.paint("title")), next_check(alert, alert["link"])))
        self.set_detail(Text.assemble(fmt.literal(alert["kind"]), " · ", fmt.literal(alert["subject"])))

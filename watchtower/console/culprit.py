"""The culprit strip: one line under the header naming what slows the job down, in the words of the figures.

"qvx-04 out/in at 1.22 GB/s vs 3.11 GB/s peers → 4 links, 40 h" says which node, which way, how slow
against whom, and what it costs; a degradation alert adds since when; a straggler rank is named too.
"""

from __future__ import annotations

import statistics
from dataclasses import dataclass
from typing import Any, ClassVar

from rich.cells import cell_len
from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget

from . import format as fmt
from .feed import Snapshot

LABEL = "likely cause: "
SHORT_LABEL = "cause: "
CLEAR = "no culprit: every port and rank within its peers"


@dataclass(frozen=True)
class Suspect:
    """One cause: a node's slow way(s) or a straggler rank, with what it costs and since when."""

    node: str
    what: str  # "out", "in", "out/in", or "rank 9"
    rate_Bps: float | None = None
    peers_Bps: float | None = None
    links: int = 0
    hours: float | None = None
    since: int | None = None

    def phrase(self, short: dict[str, str], terse: int = 0) -> str:
        """The suspect in words, with the node's name shortened through `short` (never cut); `terse` 1 drops
        the peers' rate and shortens the onset, 2 keeps only name, way, rate and hours."""
        name = fmt.visible(short.get(self.node, self.node))
        if self.what.startswith("rank"):
            return f"{self.what} on {name} computes slowly" if terse < 2 else f"{self.what} on {name} slow"
        text = f"{name} {self.what}"
        if self.rate_Bps is not None:
            text += f" at {fmt.rate(self.rate_Bps)}" if terse < 2 else f" {fmt.rate(self.rate_Bps)}"
            if not terse and self.peers_Bps is not None:
                text += f" vs {fmt.rate(self.peers_Bps)} peers"
        if self.since is not None and (terse < 2 or self.rate_Bps is None):
            text += f", degraded since step {self.since:,}" if not terse else f" since step {self.since:,}"
        cost = [fmt.counted(self.links, "link")] if self.links and terse < 2 else []
        if self.hours:
            cost.append(fmt.hours(self.hours))
        return text + (f" → {', '.join(cost)}" if cost else "")


def suspects(snapshot: Snapshot) -> list[Suspect]:
    """Slow ports grouped by node (costliest first), ports degrading without being slow, then stragglers."""
    ports = snapshot.get("ports") or []
    since: dict[str, int] = {}
    for alert in snapshot.get("alerts", []):
        if alert.get("port"):
            since[alert["port"]] = min(since.get(alert["port"], alert["step_began"]), alert["step_began"])
    by_node: dict[str, list[dict[str, Any]]] = {}
    for port in ports:
        if port["slow"] and not port.get("shadowed_by"):
            by_node.setdefault(port["node"], []).append(port)
    found = []
    for node, slow in by_node.items():
        directions = [p["direction"] for p in slow]
        labels = {f"{node} {d}" for d in directions}
        peers = [p["capacity_Bps"] for p in ports if p["direction"] in directions and not p["slow"]
                 and p["capacity_Bps"] is not None]
        links = [lk for lk in snapshot["links"] if lk.get("port") in labels]
        began = [since[label] for label in labels if label in since]
        found.append(Suspect(node, "/".join(directions), min(p["capacity_Bps"] or 0.0 for p in slow),
                             statistics.median(peers) if peers else None, len(links),
                             _stake(snapshot, node, labels, links), min(began) if began else None))
    found.sort(key=lambda s: -(s.hours or 0.0))
    named = {f"{s.node} {d}" for s in found for d in s.what.split("/")}
    for label, step in sorted(since.items(), key=lambda item: item[1]):
        if label not in named:
            node, _, direction = label.rpartition(" ")
            found.append(Suspect(node, direction, since=step))
    found += [Suspect(st["node"], f"rank {st['rank']}") for st in snapshot.get("stragglers", [])]
    return found


def _stake(snapshot: Snapshot, node: str, labels: set[str], links: list[dict[str, Any]]) -> float | None:
    """What the node's slow ports cost: its standing finding's stake (all its links fixed together), else the
    stake of the alerts that name its ports, else its links' own stakes added up. Each link's own stake is
    what fixing that link alone buys, which is nothing while the node's other links hold the step."""
    for finding in snapshot.get("standing", []):
        if finding.get("culprit") and finding["culprit"].split(" ")[0] == node:
            return finding["hours_at_stake"]
    alerted = [a["hours_at_stake"] for a in snapshot.get("alerts", [])
               if a.get("port") in labels and a.get("hours_at_stake") is not None]
    if alerted:
        return max(alerted)
    hours = [lk["hours_at_stake"] for lk in links if lk["hours_at_stake"] is not None]
    return sum(hours) if hours else None


def culprit_line(snapshot: Snapshot, width: int) -> str:
    """The suspects in `width` cells: full names, else the names' telling tails, else without the peers'
    rate, else as many whole suspects as fit and how many more; a name is never cut."""
    found = suspects(snapshot)
    if not found:
        return CLEAR
    names = [node["name"] for node in snapshot["nodes"]]
    short = fmt.short_names(names)
    for names_used, terse in (({}, 0), (short, 0), (short, 1)):
        line = LABEL + "; ".join(s.phrase(names_used, terse) for s in found)
        if cell_len(line) <= width:
            return line
    label = LABEL if width >= 100 else SHORT_LABEL
    for terse in (1, 2):
        line = label + "; ".join(s.phrase(short, terse) for s in found)
        if cell_len(line) <= width:
            return line
    kept: list[str] = []
    for number, suspect in enumerate(found):
        phrase = suspect.phrase(short, 2)
        more = len(found) - number - 1
        if kept and cell_len(label + "; ".join([*kept, phrase]) + (f"; +{more} more" if more else "")) > width:
            break
        kept.append(phrase)
    more = len(found) - len(kept)
    return label + "; ".join(kept) + (f"; +{more} more" if more else "")


class CulpritStrip(Widget):
    """One line naming the likely causes; the detail is in Nodes, Links and Alerts."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"culprit--label", "culprit--bad", "culprit--quiet"}

    snapshot: reactive[Snapshot | None] = reactive(None, always_update=True)
    """The snapshot whose suspects are named."""

    def render(self) -> Text:
        """The line for the current width."""
        if self.snapshot is None:
            return Text()
        line = culprit_line(self.snapshot, max(self.size.width, 20))
        style = self.get_component_rich_style
        if line == CLEAR:
            return Text(line, style("culprit--quiet", partial=True), no_wrap=True, overflow="ellipsis")
        label = LABEL if line.startswith(LABEL) else SHORT_LABEL
        text = Text(no_wrap=True, overflow="ellipsis")
        text.append(label, style("culprit--label", partial=True))
        text.append(line[len(label):], style("culprit--bad", partial=True))
        return text

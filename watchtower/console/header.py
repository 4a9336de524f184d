"""The job header: who is heard from, how fast, how efficiently, what the interconnect costs, how safe."""

from __future__ import annotations

from typing import ClassVar

from rich.style import Style
from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget

from . import format as fmt
from .feed import Snapshot

SEPARATOR = " · "


class JobHeader(Widget):
    """Five lines of job-wide figures, plus a standing sixth line while the transport is insecure."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {
        "header--title",
        "header--label",
        "header--bad",
        "header--marker",
        "header--alarm",
    }

    snapshot: reactive[Snapshot | None] = reactive(None, always_update=True, layout=True)
    """The snapshot whose job-wide figures are shown."""

    def _style(self, name: str) -> Style:
        return self.get_component_rich_style(f"header--{name}", partial=True)

    def render(self) -> Text:
        """Lay the figures out for the current width; long lines end in an ellipsis (full text in `how`)."""
        width = max(self.size.width, 20)
        snap = self.snapshot
        if snap is None:
            return Text.assemble(("WATCHTOWER", self._style("title")), "  waiting for the first snapshot…")
        lines = [
            self._identity(snap, width),
            self._pace(snap, width),
            self._efficiency(snap),
            self._speedup(snap),
            self._stakes(snap),
        ]
        if snap["security"]["mode"] == "insecure":
            lines.append(self._insecure(snap, width))
        for line in lines:
            line.no_wrap = True
            line.overflow = "ellipsis"
            line.truncate(width, overflow="ellipsis")
        return Text("\n").join(lines)

    def _figure(self, label: str, value: str, bad: bool = False) -> Text:
        """A label in a quiet style and its value, marked with ▲ and a warning style when it is bad."""
        value_style = self._style("bad") if bad else Style()
        line = Text(label + " " if label else "", self._style("label"))
        line.append(("▲" if bad else "") + value, value_style)
        return line

    def _identity(self, snap: Snapshot, width: int) -> Text:
        job = snap["job"]
        source = snap["source"]
        left = Text.assemble(
            ("WATCHTOWER ", self._style("title")),
            ("job ", self._style("label")),
            fmt.literal(job) if job else Text("(unnamed)", self._style("label")),
            SEPARATOR,
            fmt.literal(source["kind"]),
            " ",
            fmt.literal(source["where"]),
        )
        right = Text()
        if snap["invented"]:
            right.append(" ◆ INVENTED SCENARIO ", self._style("marker"))
        mode = snap["security"]["mode"]
        if mode != "insecure":
            state = {"loopback": "loopback only", "keys": "CURVE keys"}.get(mode, mode)
            right.append_text(Text("  ") + fmt.literal(state, self._style("label")))
        left.truncate(max(1, width - right.cell_len - 1), overflow="ellipsis")
        gap = width - left.cell_len - right.cell_len
        return Text.assemble(left, " " * max(1, gap), right)

    def _pace(self, snap: Snapshot, width: int) -> Text:
        step_time = snap["step_time"]
        line = Text.assemble(
            self._figure("ranks", f"{snap['ranks']}/{snap['world']}", bad=snap["ranks"] < snap["world"]),
            " ",
            self._figure("on", f"{len(snap['nodes'])} nodes"),
            SEPARATOR,
            self._figure("step", fmt.count(snap["last_step"])),
            SEPARATOR,
            self._figure("", _rate(snap["steps_per_s"])),
            SEPARATOR,
            self._figure("step time", fmt.seconds(step_time["recent_s"])),
            " ",
        )
        room = min(24, width - line.cell_len)
        line.append(fmt.sparkline(step_time["trend"], room), self._style("title"))
        return line

    def _efficiency(self, snap: Snapshot) -> Text:
        eff = snap["efficiency"]
        return Text.assemble(
            self._figure("efficiency", fmt.percent(eff["parallel"])),
            self._figure(" = balance", fmt.percent(eff["load_balance"])),
            self._figure(" × comm", fmt.percent(eff["communication"])),
            SEPARATOR,
            self._figure("serialisation", fmt.percent(eff["serialisation"])),
            self._figure(" × transfer", fmt.percent(eff["transfer"])),
        )

    def _speedup(self, snap: Snapshot) -> Text:
        speed = snap["speedup"]
        lost = speed["lost_to_interconnect"]
        return Text.assemble(
            self._figure("speedup", f"{fmt.number(speed['achieved'])} of {speed['workers']} workers"),
            SEPARATOR,
            self._figure("lost to interconnect", fmt.number(lost), bad=lost is not None and lost >= 0.5),
            SEPARATOR,
            self._figure("to imbalance", fmt.number(speed["lost_to_imbalance"])),
        )

    def _stakes(self, snap: Snapshot) -> Text:
        loss = snap["loss"]
        stake = snap["hours_at_stake"]
        fixed = next((w for w in snap.get("whatif", []) if w.get("slow_fixed")), None)
        return Text.assemble(
            self._figure("ETA", fmt.duration(snap["eta_s"])),
            SEPARATOR,
            self._figure("at stake", fmt.hours(stake), bad=stake is not None and stake > 0),
            self._figure(" · slow links fixed", f"{fmt.seconds(fixed['step_s'])}/step")
            if fixed is not None and stake else "",
            SEPARATOR,
            self._figure("frames", fmt.count(loss["frames"])),
            self._figure(" missing", fmt.count(loss["missing"]), bad=loss["missing"] > 0),
            self._figure(" bad", fmt.count(loss["bad"]), bad=loss["bad"] > 0),
            self._figure(" dropped", fmt.count(loss["dropped_at_senders"]), bad=loss["dropped_at_senders"] > 0),
        )

    def _insecure(self, snap: Snapshot, width: int) -> Text:
        warning = snap["security"]["warning"] or "frames are accepted from anyone who can reach the port"
        line = Text.assemble("▲ INSECURE TRANSPORT: ", fmt.literal(warning), style=self._style("alarm"))
        line.pad_right(max(0, width - line.cell_len))
        return line


def _rate(steps_per_s: float | None) -> str:
    return f"{fmt.number(steps_per_s, 2)} steps/s"

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
    """Five lines of job-wide figures, plus standing lines while the transport is insecure, recording has
    stopped, ranks are silent or the attached collector has stopped."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {
        "header--title",
        "header--label",
        "header--bad",
        "header--marker",
        "header--alarm",
    }

    snapshot: reactive[Snapshot | None] = reactive(None, always_update=True, layout=True)
    """The snapshot whose job-wide figures are shown."""
    folded: reactive[bool] = reactive(False, layout=True)
    """Two lines instead of five, for short terminals (the standing insecure line stays)."""
    plain: reactive[bool] = reactive(False)
    """Low-bandwidth mode: no sparkline, whose every change costs a redraw of its line."""

    def _style(self, name: str) -> Style:
        return self.get_component_rich_style(f"header--{name}", partial=True)

    def render(self) -> Text:
        """Lay the figures out for the current width: whole figures, as many as fit (all of them in `how`)."""
        width = max(self.size.width, 20)
        snap = self.snapshot
        if snap is None:
            return Text.assemble(("WATCHTOWER", self._style("title")), "  waiting for the first snapshot…")
        if self.folded:
            lines = [self._identity(snap, width), _join(self._summary(snap), width)]
        else:
            lines = [
                self._identity(snap, width),
                self._pace(snap, width),
                _join(self._efficiency(snap), width),
                _join(self._speedup(snap), width),
                _join(self._stakes(snap), width),
            ]
        if snap["security"]["mode"] == "insecure":
            lines.append(self._insecure(snap, width))
        silence = _silence(snap)
        if silence:
            lines.append(self._alarm(silence, width))
        recorder = snap.get("recorder")
        if recorder and recorder["state"] == "stopped":
            lines.append(self._alarm(f"{recorder['message']} · {fmt.count(recorder['unrecorded'])} messages not "
                                     "recorded (still received and shown)", width))
        attached = snap.get("attached")
        if attached and attached.get("state") == "stopped":
            lines.append(self._alarm(attached["message"], width))
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
        rejected = snap["loss"].get("rejected", 0)
        if rejected:
            right.append_text(Text("  ") + self._figure("refused", fmt.count(rejected), bad=True))
        state = {"loopback": "loopback only", "keys": "CURVE keys"}.get(mode)
        if state:  # insecure has a standing line of its own; an older recording's unknown mode is left unsaid
            right.append_text(Text("  ") + fmt.literal(state, self._style("label")))
        left.truncate(max(1, width - right.cell_len - 1), overflow="ellipsis")
        gap = width - left.cell_len - right.cell_len
        return Text.assemble(left, " " * max(1, gap), right)

    def _pace(self, snap: Snapshot, width: int) -> Text:
        step_time = snap["step_time"]
        liveness = snap.get("liveness", {})
        live = snap["ranks"] - len(liveness.get("silent_ranks", ()))
        stalled = bool(liveness.get("stalled"))
        line = _join([
            Text.assemble(
                self._figure("ranks", f"{live}/{snap['world']}", bad=live < snap["world"]),
                " ",
                self._figure("on", fmt.counted(len(snap["nodes"]), "node")),
            ),
            self._figure("step", fmt.count(snap["last_step"])),
            self._figure("step time", fmt.seconds(step_time["recent_s"])),
            self._figure("", "stalled" if stalled else "finished" if liveness.get("finished")
                         else _rate(snap["steps_per_s"]), bad=stalled),
        ], width)
        line.append(" ")
        if not self.plain:
            room = min(24, width - line.cell_len)
            line.append(fmt.sparkline(step_time["trend"], room), self._style("title"))
        return line

    def _summary(self, snap: Snapshot) -> list[Text]:
        """The folded header's second line: the figures a glance needs, most telling first."""
        lost = snap["speedup"]["lost_to_interconnect"]
        stake = snap["hours_at_stake"]
        loss = snap["loss"]
        liveness = snap.get("liveness", {})
        live = snap["ranks"] - len(liveness.get("silent_ranks", ()))
        pace = "stalled" if liveness.get("stalled") else "finished" if liveness.get("finished") \
            else fmt.seconds(snap["step_time"]["recent_s"]) + "/step"
        return [
            Text.assemble(self._figure("step", fmt.count(snap["last_step"])), " ",
                          self._figure("", pace, bad=bool(liveness.get("stalled")))),
            Text.assemble(
                self._figure("ranks", f"{live}/{snap['world']}", bad=live < snap["world"]),
                self._figure(" missing", fmt.count(loss["missing"]), bad=loss["missing"] > 0),
                self._figure(" bad", fmt.count(loss["bad"]), bad=loss["bad"] > 0),
            ),
            self._figure("at stake", fmt.hours(stake), bad=stake is not None and stake > 0),
            self._figure("efficiency", fmt.percent(snap["efficiency"]["parallel"])),
            self._figure("lost to interconnect", fmt.number(lost), bad=lost is not None and lost >= 0.5),
            self._figure("ETA", fmt.duration(snap["eta_s"])),
        ]

    def _efficiency(self, snap: Snapshot) -> list[Text]:
        eff = snap["efficiency"]
        return [
            Text.assemble(
                self._figure("efficiency", fmt.percent(eff["parallel"])),
                self._figure(" = balance", fmt.percent(eff["load_balance"])),
                self._figure(" × comm", fmt.percent(eff["communication"])),
            ),
            Text.assemble(
                self._figure("serialisation", fmt.percent(eff["serialisation"])),
                self._figure(" × transfer", fmt.percent(eff["transfer"])),
            ),
        ]

    def _speedup(self, snap: Snapshot) -> list[Text]:
        speed = snap["speedup"]
        lost = speed["lost_to_interconnect"]
        return [
            self._figure("speedup", f"{fmt.number(speed['achieved'])} of {speed['workers']} workers"),
            self._figure("lost to interconnect", fmt.number(lost), bad=lost is not None and lost >= 0.5),
            self._figure("to imbalance", fmt.number(speed["lost_to_imbalance"])),
        ]

    def _stakes(self, snap: Snapshot) -> list[Text]:
        loss = snap["loss"]
        stake = snap["hours_at_stake"]
        fixed = next((w for w in snap.get("whatif", []) if w.get("slow_fixed")), None)
        return [
            Text.assemble(
                self._figure("at stake", fmt.hours(stake), bad=stake is not None and stake > 0),
                self._figure(" · slow links fixed", f"{fmt.seconds(fixed['step_s'])}/step")
                if fixed is not None and stake else "",
            ),
            self._figure("ETA", fmt.duration(snap["eta_s"])),
            Text.assemble(
                self._figure("frames", fmt.count(loss["frames"])),
                self._figure(" missing", fmt.count(loss["missing"]), bad=loss["missing"] > 0),
                self._figure(" bad", fmt.count(loss["bad"]), bad=loss["bad"] > 0),
                self._figure(" dropped", fmt.count(loss["dropped_at_senders"]), bad=loss["dropped_at_senders"] > 0),
            ),
        ]

    def _insecure(self, snap: Snapshot, width: int) -> Text:
        warning = snap["security"]["warning"] or "frames are accepted from anyone who can reach the port"
        line = Text.assemble("▲ INSECURE TRANSPORT: ", fmt.literal(warning), style=self._style("alarm"))
        line.pad_right(max(0, width - line.cell_len))
        return line

    def _alarm(self, text: str, width: int) -> Text:
        """A standing line for a state the operator must not miss (recording stopped, ranks silent)."""
        line = Text.assemble("▲ ", fmt.literal(text), style=self._style("alarm"))
        line.pad_right(max(0, width - line.cell_len))
        return line


def _silence(snap: Snapshot) -> str:
    """The standing line for silent ranks: the job stalled, or which ranks are silent since when."""
    liveness = snap.get("liveness")
    if not liveness or not liveness["silent_ranks"]:
        return ""
    if liveness["stalled"]:
        age = fmt.seconds(liveness["age_s"])
        return f"JOB STALLED: no rank has advanced for {age} (newest step {snap['last_step']})"
    silent = [r for r in liveness["ranks"] if r["silent"]]
    named = ", ".join(f"rank {r['rank']} ({fmt.seconds(r['age_s'])} since step {r['last_step']})" for r in silent[:4])
    more = f" and {len(silent) - 4} more" if len(silent) > 4 else ""
    return f"SILENT: {named}{more}"


def _join(parts: list[Text], width: int) -> Text:
    """Whole figures separated by dots, as many as fit in `width`: a figure is left out, never cut."""
    line = Text()
    for part in parts:
        gap = SEPARATOR if line.cell_len else ""
        if line.cell_len and line.cell_len + len(gap) + part.cell_len > width:
            break
        line.append(gap)
        line.append_text(part)
    return line


def _rate(steps_per_s: float | None) -> str:
    return f"{fmt.number(steps_per_s, 2)} steps/s"

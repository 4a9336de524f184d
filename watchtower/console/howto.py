"""How-computed view: the definition and source of every figure, and the facts about this run."""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from typing import ClassVar

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, VerticalScroll
from textual.widgets import OptionList, Static
from textual.widgets.option_list import Option

from . import format as fmt
from .feed import Snapshot
from .view import SnapshotView

ABOUT = "\x00about"
"""Option id of the first topic, the run itself (kept out of the wire's key space by the NUL)."""

TITLES: dict[str, str] = {
    "efficiency.load_balance": "Load balance",
    "efficiency.communication": "Communication efficiency",
    "efficiency.parallel": "Parallel efficiency",
    "efficiency.serialisation": "Serialisation efficiency",
    "efficiency.transfer": "Transfer efficiency",
    "speedup.achieved": "Speedup",
    "speedup.lost_to_interconnect": "Lost to the interconnect",
    "speedup.lost_to_imbalance": "Lost to imbalance",
    "layers.compute_s": "Layer compute",
    "layers.exchange_s": "Layer exchange",
    "layers.per_step": "Layer times per step",
    "layers.comm_fraction": "Comm share",
    "layers.comm_fraction_worst": "Comm share, worst rank",
    "layers.comm_bound": "Comm-bound layer",
    "links.bandwidth_Bps": "Link bandwidth β",
    "links.concurrency": "Flows sharing a port",
    "links.port": "Port behind a slow link",
    "links.latency_s": "Link latency α",
    "links.throughput_Bps": "Link throughput",
    "links.of_nominal": "Throughput of nominal",
    "links.score": "Link score",
    "links.slow": "Slow link",
    "links.hours_at_stake": "Link hours at stake",
    "ports.capacity_Bps": "Port capacity",
    "ports.lower_bound": "Capacity as a lower bound",
    "ports.score": "Port score",
    "ports.slow": "Slow port",
    "ports.shadowed_by": "Port held by the other way",
    "ports.nic_Bps": "NIC counter rate",
    "stragglers": "Straggler rank",
    "alerts": "Alerts",
    "eta_s": "Time to finish",
    "hours_at_stake": "Hours at stake",
    "whatif": "What-if projections",
    "serial_fraction": "Serial fraction",
}
"""Human titles of the figures the analysis defines; a figure not listed gets one made from its key."""


def title(key: str) -> str:
    """The name a reader sees for a figure: its title, else its key in words ("ports.nic_Bps" → "Ports: nic")."""
    if key in TITLES:
        return TITLES[key]
    group, _, name = key.rpartition(".")
    words = re.sub(r"_(s|Bps)$", "", name).replace("_", " ")
    return f"{group.capitalize()}: {words}" if group else words.capitalize()


def definition(entry: object) -> Text:
    """A figure's definition and source as prose; a snapshot may carry either a dict or a plain string."""
    if isinstance(entry, dict):
        text = fmt.literal(entry.get("definition", ""), wrap=True)
        source = entry.get("source")
        if source:
            text.append_text(Text.assemble("\n\nSource: ", fmt.literal(source, wrap=True)))
        return text
    return fmt.literal(entry, wrap=True)


def _normal(name: str) -> str:
    return re.sub(r"[^a-z0-9]+", "_", name.lower()).strip("_")


def find_topic(keys: Iterable[str], candidates: Sequence[str]) -> str | None:
    """The `how` key that best names one of `candidates`: exact first, then as a suffix or part."""
    keys = list(keys)
    for candidate in candidates:
        wanted = _normal(candidate)
        exact = [key for key in keys if _normal(key) == wanted]
        loose = [key for key in keys if _normal(key).endswith("_" + wanted) or wanted in _normal(key)]
        if exact or loose:
            return (exact or loose)[0]
    return None


class HowView(SnapshotView):
    """A list of figures on the left, the chosen one's definition and source on the right."""

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "app.back", "back")]

    def __init__(self) -> None:
        super().__init__(id="how")
        self._keys: list[str] = []
        self._topic = ABOUT

    def compose(self) -> ComposeResult:
        yield Static(id="how-title", classes="view-title")
        with Horizontal():
            yield OptionList(id="how-topics")
            with VerticalScroll(id="how-box"):
                yield Static(id="how-text")

    def show(self, snapshot: Snapshot) -> None:
        """List the figures (only when the list changed, so the cursor stays) and explain the chosen one."""
        keys = list(snapshot["how"])
        if keys != self._keys:
            self._keys = keys
            topics = self.query_one(OptionList)
            topics.clear_options()
            topics.add_options(
                [Option(Text("about this run", self.paint("title")), id=ABOUT)]
                + [Option(fmt.literal(title(key)), id=key) for key in keys]
            )
            self._highlight()
        self.query_one("#how-title", Static).update(
            Text.assemble(
                (f"{len(keys)} figures", self.paint("title")),
                " · ↑↓ choose · ? or esc: back",
            )
        )
        self._explain()

    def choose(self, candidates: Sequence[str]) -> None:
        """Open at the figure the user was looking at, if the snapshot defines it."""
        self._topic = find_topic(self._keys, candidates) or self._topic
        self._highlight()
        self._explain()

    def _highlight(self) -> None:
        topics = self.query_one(OptionList)
        if topics.option_count:
            topics.highlighted = topics.get_option_index(self._topic if self._topic in self._keys else ABOUT)

    def on_option_list_option_highlighted(self, event: OptionList.OptionHighlighted) -> None:
        """Explain the figure under the cursor."""
        self._topic = event.option.id or ABOUT
        self._explain()

    def _explain(self) -> None:
        snapshot = self.snapshot
        if snapshot is None:
            return
        if self._topic in snapshot["how"]:
            text = Text.assemble(fmt.literal(title(self._topic), self.paint("title")), "\n\n",
                                 definition(snapshot["how"][self._topic]))
        else:
            text = about(snapshot)
        self.query_one("#how-text", Static).update(text)
        self.set_detail(Text.assemble(("figure ", self.paint("quiet")), text.split("\n")[0]))

    def how_topics(self) -> tuple[str, ...]:
        """The figure being read."""
        return (self._topic,)


def about(snapshot: Snapshot) -> Text:
    """Everything the header shortens, in full: names, source, note, security and loss accounting."""
    loss = snapshot["loss"]
    window = snapshot["window"]
    security = snapshot["security"]
    reasons = ", ".join(f"{fmt.visible(str(reason))} {n}" for reason, n in loss["bad_reasons"].items()) or "none"
    return Text.assemble(
        "about this run\n\njob: ",
        fmt.literal(snapshot["job"]) if snapshot["job"] else "(unnamed)",
        "\nsource: ",
        fmt.literal(snapshot["source"]["kind"]),
        " ",
        fmt.literal(snapshot["source"]["where"]),
        "\ninvented scenario: ",
        "YES — the figures are a made-up demonstration" if snapshot["invented"] else "no",
        "\nnote: ",
        fmt.literal(snapshot["note"], wrap=True) if snapshot["note"] else "(none)",
        f"\nranks heard from: {snapshot['ranks']} of {snapshot['world']} · steps seen: {fmt.count(snapshot['steps'])}",
        f"\nwindow: steps {window['first_step']}–{window['last_step']} ({window['steps']} steps)",
        "\ntransport: ",
        fmt.literal(security["mode"]),
        " — " if security["warning"] else "",
        fmt.literal(security["warning"], wrap=True) if security["warning"] else "",
        f"\nframes: {fmt.count(loss['frames'])} from {fmt.count(loss['senders'])} senders · "
        f"missing {fmt.count(loss['missing'])} · duplicates {fmt.count(loss['duplicates'])} · "
        f"dropped at senders {fmt.count(loss['dropped_at_senders'])}",
        f"\nbad frames: {fmt.count(loss['bad'])} ({reasons})",
    )

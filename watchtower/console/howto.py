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
                + [Option(fmt.literal(key), id=key) for key in keys]
            )
            self._highlight()
        self.query_one("#how-title", Static).update(
            Text.assemble(
                (f"{len(keys)} figures", self.paint("title")),
                " · ↑↓ choose · ? or esc: back · definitions come with the snapshot",
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
            definition = fmt.literal(snapshot["how"][self._topic], wrap=True)
            text = Text.assemble(fmt.literal(self._topic, self.paint("title")), "\n\n", definition)
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

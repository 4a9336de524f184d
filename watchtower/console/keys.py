"""The key list: our keys only, grouped by what they act on, short enough for an 80x24 terminal."""

from __future__ import annotations

from typing import ClassVar

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Static

GENERAL = (
    ("1–5  tab  shift+tab", "views by number, next, previous"),
    ("?  esc", "how a figure is computed; back"),
    ("↑ ↓  pgup pgdn", "move in a table"),
    ("s  r", "sort by the next figure; reverse"),
    ("/", "show only rows whose name holds a text (esc clears)"),
    ("enter", "Layers: the layer's worst ranks and whom they wait on"),
    ("w", "write the view to CSV and JSON in the export folder"),
    ("k", "this list"),
    ("q  ctrl+c", "quit"),
)
LIVE = (("space", "freeze the view (the feed keeps ingesting)"),)
REPLAY = (
    ("space  .", "pause or play; one step"),
    ("[  ]", "back or forward one jump"),
    ("<  >", "to the start or the end"),
    ("-  +", "half or double speed (every press counts)"),
)


def key_list(replay: bool) -> Text:
    """The keys that work here, replay keys only for a replay."""
    rows = [*GENERAL, *(REPLAY if replay else LIVE)]
    width = max(len(keys) for keys, _ in rows) + 2
    text = Text("keys\n", style="bold")
    for keys, what in rows:
        text.append(keys.ljust(width), style="bold")
        text.append(what + "\n")
    text.append("k or esc closes this list", style="dim")
    return text


class KeysScreen(ModalScreen[None]):
    """The key list over the current view."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape,k", "dismiss", "close", show=False),
    ]

    def __init__(self, replay: bool) -> None:
        super().__init__()
        self.replay = replay

    def compose(self) -> ComposeResult:
        with Vertical(id="keys-box"):
            yield Static(key_list(self.replay), id="keys-text")

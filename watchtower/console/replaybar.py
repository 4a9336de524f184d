"""The replay strip: where in the recording we are, how fast it plays, whether it is paused."""

from __future__ import annotations

from typing import Any, ClassVar

from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget


class ReplayBar(Widget):
    """One line with a progress bar of the replay position; hidden while watching a live job."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"replaybar--done", "replaybar--todo", "replaybar--label"}

    position: reactive[dict[str, Any] | None] = reactive(None, always_update=True)
    """`snapshot["replay"]`: step, first_step, last_step, speed, paused; None when live."""

    def watch_position(self, position: dict[str, Any] | None) -> None:
        """Show the strip only during a replay."""
        self.display = position is not None

    def render(self) -> Text:
        """`▶ REPLAY ×2 step 1,210 [█████░░░░] 0–2,400`, the bar filling the spare width."""
        pos = self.position
        if pos is None:
            return Text()
        label = self.get_component_rich_style("replaybar--label", partial=True)
        state = "❚❚ PAUSED" if pos["paused"] else "▶ PLAYING"
        head = Text.assemble((f" {state} ", label), f" ×{pos['speed']:g}  step {pos['step']:,} ")
        tail = Text(f" {pos['first_step']:,}–{pos['last_step']:,}")
        width = max(4, self.size.width - head.cell_len - tail.cell_len - 2)
        span = pos["last_step"] - pos["first_step"]
        done = width if span <= 0 else round((pos["step"] - pos["first_step"]) / span * width)
        done = min(max(done, 0), width)
        return Text.assemble(
            head,
            "[",
            ("█" * done, self.get_component_rich_style("replaybar--done", partial=True)),
            ("░" * (width - done), self.get_component_rich_style("replaybar--todo", partial=True)),
            "]",
            tail,
            no_wrap=True,
        )

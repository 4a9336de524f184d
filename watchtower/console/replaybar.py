"""The replay strip: where in the recording we are, how fast it plays, whether it is paused or seeking; on
a live feed, the same line says that the view is frozen while the feed keeps ingesting."""

from __future__ import annotations

from typing import Any, ClassVar

from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget


class ReplayBar(Widget):
    """One line with a progress bar of the replay position; hidden while following a live job."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"replaybar--done", "replaybar--todo", "replaybar--label"}

    position: reactive[dict[str, Any] | None] = reactive(None, always_update=True)
    """`snapshot["replay"]` with what the keys asked (paused, speed, seek); None when live."""
    frozen_step: reactive[int | None] = reactive(None)
    """Live only: the step the frozen view shows; None while following the feed."""
    newest_step: reactive[int | None] = reactive(None)
    """Live only, while frozen: the newest step the feed has ingested meanwhile."""

    def watch_position(self) -> None:
        """Show the strip during a replay or while frozen."""
        self._update_display()

    def watch_frozen_step(self) -> None:
        """Show the strip while frozen."""
        self._update_display()

    def _update_display(self) -> None:
        self.display = self.position is not None or self.frozen_step is not None

    def render(self) -> Text:
        """`▶ PLAYING ×2 step 1,210 [█████░░░░] 0–2,400`, the bar filling the spare width; while seeking,
        `⟳ SEEKING to 2,000 ×2 step 1,210 of 2,000 [█████▒▒▒░░] 0–2,400`, moving as the seek reads."""
        label = self.get_component_rich_style("replaybar--label", partial=True)
        if self.frozen_step is not None:
            newest = self.newest_step if self.newest_step is not None else self.frozen_step
            return Text.assemble((" ❚❚ FROZEN ", label), f"  showing step {self.frozen_step:,} · feed at step "
                                 f"{newest:,}, still ingesting · space: follow live", no_wrap=True, overflow="ellipsis")
        pos = self.position
        if pos is None:
            return Text()
        of = ""  # while seeking forward: read so far, of the way there (a backward seek reads from the top)
        if pos.get("seek") is not None:
            state = f"⟳ SEEKING to {pos['seek'][0]:,}"
            of = f" of {pos['seek'][0]:,}" if pos["step"] <= pos["seek"][0] else ""
        else:
            state = "❚❚ PAUSED" if pos["paused"] else "▶ PLAYING"
        head = Text.assemble((f" {state} ", label), f" ×{pos['speed']:g}  step {pos['step']:,} ")
        tail = Text(f" {pos['first_step']:,}–{pos['last_step']:,}")
        width = self.size.width - head.cell_len - tail.cell_len - 2
        if of and width - len(of) >= 4:  # on a narrow terminal the bar itself shows the way still to go
            head.append(of[1:] + " ")
            width -= len(of)
        width = max(4, width)
        span = pos["last_step"] - pos["first_step"]
        done = width if span <= 0 else round((pos["step"] - pos["first_step"]) / span * width)
        done = min(max(done, 0), width)
        ahead = 0  # a forward seek: the stretch still to read, so a long seek shows how far it has come
        if pos.get("seek") is not None and span > 0:
            ahead = min(max(round((pos["seek"][0] - pos["first_step"]) / span * width) - done, 0), width - done)
        return Text.assemble(
            head,
            "[",
            ("█" * done, self.get_component_rich_style("replaybar--done", partial=True)),
            ("▒" * ahead, self.get_component_rich_style("replaybar--done", partial=True)),
            ("░" * (width - done - ahead), self.get_component_rich_style("replaybar--todo", partial=True)),
            "]",
            tail,
            no_wrap=True,
        )

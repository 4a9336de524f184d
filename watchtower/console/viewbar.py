"""The one-line strip naming the views and their keys, with the current one standing out."""

from __future__ import annotations

from typing import ClassVar

from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget

VIEWS: dict[str, str] = {
    "layers": "Layers",
    "links": "Links",
    "nodes": "Nodes",
    "alerts": "Alerts",
    "how": "How computed",
}
"""View ids in key order (1, 2, …) and their titles."""


class ViewBar(Widget):
    """Names every view with its number key; the current one is reversed and bracketed, not only coloured."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"viewbar--current", "viewbar--key", "viewbar--bad"}

    current: reactive[str] = reactive("layers")
    """Id of the view on screen."""
    alerts: reactive[int] = reactive(0)
    """Number of open alerts, shown next to the Alerts view's name."""

    def render(self) -> Text:
        """One line: `1 Layers  2 Links …`."""
        line = Text(no_wrap=True, overflow="ellipsis")
        for number, (view, title) in enumerate(VIEWS.items(), start=1):
            label = title
            if view == "alerts" and self.alerts:
                label += f" ▲{self.alerts}"
            if view == self.current:
                line.append(f"▸{number} {label}◂", self.get_component_rich_style("viewbar--current", partial=True))
            else:
                line.append(f" {number}", self.get_component_rich_style("viewbar--key", partial=True))
                bad = view == "alerts" and self.alerts > 0
                line.append(f" {label} ", self.get_component_rich_style("viewbar--bad", partial=True) if bad else "")
            line.append(" ")
        return line

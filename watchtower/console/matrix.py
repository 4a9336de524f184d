"""Node × node heat map of fitted link bandwidth β, readable with or without colour."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

from rich.style import Style
from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget

from . import format as fmt

SHADES = ("░", "▒", "▓", "█")
"""Slowest to fastest quarter of the fastest link's β; density carries the level without colour."""
LABEL_WIDTH = 7


@dataclass(frozen=True)
class Grid:
    """What the heat map needs: node order and, per directed pair, β and whether the link is slow."""

    nodes: tuple[str, ...]
    bandwidth: dict[tuple[str, str], float | None] = field(default_factory=dict)
    slow: frozenset[tuple[str, str]] = frozenset()

    @property
    def top(self) -> float:
        """The fastest β, the scale's full mark."""
        return max((b for b in self.bandwidth.values() if b is not None), default=0.0)


LEGEND_WIDTH = 29
"""Cells the three legend lines need."""


def cell_width(nodes: int) -> int:
    """Cells per matrix column: room for the column number and a space."""
    return max(3, len(str(nodes)) + 1)


def matrix_width(nodes: int) -> int:
    """Cells the whole heat map needs, labels and legend included."""
    return max(LABEL_WIDTH + 4 + cell_width(nodes) * nodes, LEGEND_WIDTH)


def shade(bandwidth: float | None, top: float) -> int | None:
    """Quarter of `top` that `bandwidth` falls in (0 slowest … 3 fastest), None when unknown."""
    if bandwidth is None or top <= 0:
        return None
    return min(3, max(0, int(bandwidth / top * 4)))


class LinkMatrix(Widget):
    """Rows send, columns receive; each cell shows β as a shade, `!` marks a slow link."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {
        "matrix--l0",
        "matrix--l1",
        "matrix--l2",
        "matrix--l3",
        "matrix--slow",
        "matrix--selected",
        "matrix--quiet",
    }

    grid: reactive[Grid] = reactive(Grid(()), layout=True)
    """Nodes and per-link β to draw."""
    selected: reactive[tuple[str, str] | None] = reactive(None)
    """The link under the cursor in the link table, drawn reversed."""

    def _paint(self, name: str) -> Style:
        return self.get_component_rich_style(f"matrix--{name}", partial=True)

    def render(self) -> Text:
        """Header of column numbers, one row per sending node, then the legend."""
        grid = self.grid
        cell = cell_width(len(grid.nodes))
        lines = [Text(" " * (LABEL_WIDTH + 4) + "".join(f"{n:>{cell}}" for n in range(1, len(grid.nodes) + 1)))]
        top = grid.top
        short = fmt.short_names(grid.nodes)
        for row, src in enumerate(grid.nodes, start=1):
            line = Text(f"{row:>3} ", self._paint("quiet"))
            line.append_text(fmt.fit(fmt.literal(short.get(src, src)), LABEL_WIDTH))
            line.pad_right(LABEL_WIDTH + 4 - line.cell_len)
            for dst in grid.nodes:
                line.append_text(self._cell(src, dst, top, cell))
            lines.append(line)
        lines.extend(self._legend(top))
        return Text("\n").join(lines)

    def _cell(self, src: str, dst: str, top: float, width: int) -> Text:
        pair = (src, dst)
        if src == dst:
            text = Text("·".rjust(width), self._paint("quiet"))
        elif pair not in self.grid.bandwidth:
            text = Text("-".rjust(width), self._paint("quiet"))
        else:
            level = shade(self.grid.bandwidth[pair], top)
            slow = pair in self.grid.slow
            body = "??" if level is None else SHADES[level] * 2
            style = self._paint("slow") if slow else self._paint(f"l{level or 0}")
            text = Text((("!" if slow else " ") + body).rjust(width), style)
        if pair == self.selected:
            text.stylize("reverse")
        return text

    def _legend(self, top: float) -> list[Text]:
        quiet = self._paint("quiet")
        scale = Text("β ", quiet)
        for level, (char, bound) in enumerate(zip(SHADES, ("<¼", "≥¼", "≥½", "≥¾"), strict=True)):
            scale.append(char * 2, self._paint(f"l{level}"))
            scale.append(f"{bound} ", quiet)
        return [
            scale,
            Text.assemble((f"of max {fmt.rate(top)} · ", quiet), ("!", self._paint("slow")), (" slow", quiet)),
            Text("rows send → columns receive", quiet),
        ]

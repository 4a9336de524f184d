"""The console's text: figures in units (from ``watchtower.units``, shared with the plain report), bars,
sparklines and names that arrive over the wire.

Every string that came from agents or recordings goes through `literal`, so markup and terminal
escapes are shown as the characters they are and never act on the screen.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from rich.text import Text

from watchtower.units import (  # noqa: F401 - the console's formatting vocabulary, re-exported as fmt.*
    ARROW,
    HOURS_WIDTH,
    MISSING,
    PERCENT_WIDTH,
    RATE_WIDTH,
    SECONDS_WIDTH,
    SIGNED_SECONDS_WIDTH,
    count,
    counted,
    duration,
    hours,
    number,
    percent,
    plain_percent,
    rate,
    seconds,
    signed_seconds,
    size,
    visible,
)

_SPARKS = "▁▂▃▄▅▆▇█"


def literal(raw: object, style: str = "", wrap: bool = False) -> Text:
    """A wire-provided string as inert Text: no markup parsing, control characters made visible."""
    return Text(visible(str(raw)), style=style, no_wrap=not wrap)


def fit(text: Text, width: int) -> Text:
    """Shorten to `width` cells with an ellipsis; the caller shows the whole text elsewhere."""
    clipped = text.copy()
    clipped.truncate(max(1, width), overflow="ellipsis")
    return clipped


def clauses(first: Text, optional: Sequence[Text | str], width: int, sep: str = " · ") -> Text:
    """A one-line caption: ``first``, then each optional clause whole, in order, while it fits in ``width``
    cells; a clause that does not fit is left out, never cut mid-word (the detail line says the rest)."""
    out = first.copy()
    for clause in optional:
        piece = Text(sep) + (clause if isinstance(clause, Text) else Text(clause))
        if out.cell_len + piece.cell_len <= width:
            out.append_text(piece)
    return out


def sparkline(values: Sequence[float | None], width: int) -> str:
    """The last `width` values as block characters scaled between their own min and max."""
    recent = [v for v in values if v is not None][-width:]
    if not recent:
        return ""
    low, high = min(recent), max(recent)
    span = high - low
    if span <= 0:
        return _SPARKS[len(_SPARKS) // 2] * len(recent)
    top = len(_SPARKS) - 1
    return "".join(_SPARKS[round((v - low) / span * top)] for v in recent)


def ranges(numbers: Iterable[int]) -> str:
    """Rank lists such as [0, 1, 2, 3, 8] as '0–3,8'."""
    ordered = sorted(set(numbers))
    parts: list[str] = []
    start = prev = None
    for n in [*ordered, None]:
        if start is not None and (n is None or n != prev + 1):
            parts.append(str(start) if start == prev else f"{start}–{prev}")
            start = None
        if n is not None and start is None:
            start = n
        prev = n
    return ",".join(parts)


def split_bar(first: float, second: float, scale: float, width: int) -> tuple[str, str]:
    """Two stacked segments (e.g. compute then exchange) sized against `scale` in `width` cells.

    Returned separately so the caller can style them; different characters keep them apart without colour.
    """
    if scale <= 0 or width <= 0:
        return "", ""
    first_cells = round(max(first, 0.0) / scale * width)
    both_cells = round((max(first, 0.0) + max(second, 0.0)) / scale * width)
    first_cells = min(first_cells, width)
    both_cells = min(max(both_cells, first_cells), width)
    return "█" * first_cells, "░" * (both_cells - first_cells)


_SEPARATORS = "-_.:/@"


def short_names(names: Iterable[str]) -> dict[str, str]:
    """Each name less the prefix all of them share up to a separator ("qvx-04" -> "04" among
    qvx-01..06), so narrow columns show what tells nodes apart; the detail line shows names whole."""
    unique = sorted(set(names))
    if len(unique) < 2:
        return {name: name for name in unique}
    first, last = unique[0], unique[-1]
    common = 0
    while common < min(len(first), len(last)) and first[common] == last[common]:
        common += 1
    cut = max((i + 1 for i in range(common) if first[i] in _SEPARATORS), default=0)
    return {name: name[cut:] or name for name in unique}

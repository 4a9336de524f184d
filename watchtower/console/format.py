"""Plain-text formatting of figures and of names that arrive over the wire.

Every string that came from agents or recordings goes through `literal`, so markup and terminal
escapes are shown as the characters they are and never act on the screen.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Iterable, Sequence

from rich.text import Text

MISSING = "—"
"""Shown for a figure that could not be computed (null in the snapshot)."""

# Character classes that would move the cursor, recolour, reorder or hide text on a terminal.
_UNSAFE_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Co", "Zl", "Zp"})
_SPARKS = "▁▂▃▄▅▆▇█"


def visible(raw: str) -> str:
    """Replace control and format characters by backslash escapes so they are seen, not obeyed."""
    out: list[str] = []
    for char in raw:
        if unicodedata.category(char) in _UNSAFE_CATEGORIES:
            out.append(char.encode("unicode_escape").decode("ascii"))
        else:
            out.append(char)
    return "".join(out)


def literal(raw: object, style: str = "", wrap: bool = False) -> Text:
    """A wire-provided string as inert Text: no markup parsing, control characters made visible."""
    return Text(visible(str(raw)), style=style, no_wrap=not wrap)


def fit(text: Text, width: int) -> Text:
    """Shorten to `width` cells with an ellipsis; the caller shows the whole text elsewhere."""
    clipped = text.copy()
    clipped.truncate(max(1, width), overflow="ellipsis")
    return clipped


def _scaled(value: float, units: Sequence[tuple[float, str]]) -> str:
    for factor, unit in units:
        if abs(value) >= factor:
            return _three_digits(value / factor, unit)
    factor, unit = units[-1]
    return _three_digits(value / factor, unit)


def _three_digits(scaled: float, unit: str) -> str:
    """Three significant digits with trailing zeros kept, so columns of figures line up."""
    if abs(scaled) >= 99.95:
        return f"{scaled:.0f} {unit}"
    if abs(scaled) >= 9.995:
        return f"{scaled:.1f} {unit}"
    return f"{scaled:.2f} {unit}"


def rate(bytes_per_s: float | None) -> str:
    """Bytes per second in decimal units (network rates are quoted in powers of ten)."""
    if bytes_per_s is None:
        return MISSING
    return _scaled(bytes_per_s, [(1e12, "TB/s"), (1e9, "GB/s"), (1e6, "MB/s"), (1e3, "kB/s"), (1.0, "B/s")])


def seconds(value: float | None) -> str:
    """A short duration with the unit that keeps three significant digits."""
    if value is None:
        return MISSING
    if value == 0:
        return "0 s"
    return _scaled(value, [(1.0, "s"), (1e-3, "ms"), (1e-6, "µs"), (1e-9, "ns")])


def signed_seconds(value: float | None) -> str:
    """A clock offset, whose sign says which way the node's clock is off."""
    if value is None:
        return MISSING
    return ("+" if value >= 0 else "−") + seconds(abs(value))


def duration(value: float | None) -> str:
    """A long span (time to finish) in days, hours and minutes."""
    if value is None:
        return MISSING
    total = round(value)
    days, rest = divmod(total, 86400)
    hours, rest = divmod(rest, 3600)
    minutes, secs = divmod(rest, 60)
    if days:
        return f"{days}d {hours}h"
    if hours:
        return f"{hours}h {minutes:02d}m"
    if minutes:
        return f"{minutes}m {secs:02d}s"
    return f"{secs}s"


def percent(fraction: float | None) -> str:
    """A fraction as a whole percentage."""
    if fraction is None:
        return MISSING
    return f"{fraction * 100:.0f}%"


def plain_percent(value: float | None) -> str:
    """A value already in percent (psutil's CPU and memory figures)."""
    if value is None:
        return MISSING
    return f"{value:.0f}%"


def hours(value: float | None) -> str:
    """Hours of run time, with one decimal below ten hours."""
    if value is None:
        return MISSING
    return f"{value:.1f} h" if abs(value) < 10 else f"{value:.0f} h"


def number(value: float | None, digits: int = 1) -> str:
    """A plain figure (speedup in workers, a score) with a true minus sign."""
    if value is None:
        return MISSING
    return f"{value:.{digits}f}".replace("-", "−")


def count(value: int | None) -> str:
    """An exact count with thousands separators."""
    if value is None:
        return MISSING
    return f"{value:,}"


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
    """Each name less the prefix all of them share up to a separator ("kestrel-04" -> "04" among
    kestrel-01..06), so narrow columns show what tells nodes apart; the detail line shows names whole."""
    unique = sorted(set(names))
    if len(unique) < 2:
        return {name: name for name in unique}
    first, last = unique[0], unique[-1]
    common = 0
    while common < min(len(first), len(last)) and first[common] == last[common]:
        common += 1
    cut = max((i + 1 for i in range(common) if first[i] in _SEPARATORS), default=0)
    return {name: name[cut:] or name for name in unique}

"""Figures and names as plain text: units that keep three significant digits, and wire names made safe.

Shared by the console and the plain-text report, so both say "1.22 GB/s" and "14.3 µs" the same way.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Sequence

MISSING = "—"
"""Shown for a figure that could not be computed (null in the snapshot)."""
ARROW = "→"
"""Between the two ends of a directed link, everywhere a link is named."""

RATE_WIDTH = 9
"""Cells the widest `rate` takes ("12.3 GB/s"): a column this wide never cuts a unit."""
SECONDS_WIDTH = 7
"""Cells the widest `seconds` takes ("12.3 ms")."""
SIGNED_SECONDS_WIDTH = 8
"""Cells the widest `signed_seconds` takes ("−12.3 ms")."""
PERCENT_WIDTH = 4
"""Cells the widest `percent` takes ("100%"; a rare figure above 999 % widens the cell, never cut)."""
HOURS_WIDTH = 6
"""Cells `hours` takes up to 9999 h."""

# Character classes that would move the cursor, recolour, reorder or hide text on a terminal.
_UNSAFE_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Co", "Zl", "Zp"})


def visible(raw: str) -> str:
    """Replace control and format characters by backslash escapes so they are seen, not obeyed."""
    out: list[str] = []
    for char in raw:
        if unicodedata.category(char) in _UNSAFE_CATEGORIES:
            out.append(char.encode("unicode_escape").decode("ascii"))
        else:
            out.append(char)
    return "".join(out)


def _unit(value: float, units: Sequence[tuple[float, str]]) -> tuple[float, str]:
    """The largest unit ``value`` reaches (the smallest for tinier values), with its factor."""
    return next(((f, u) for f, u in units if abs(value) >= f), units[-1])


def _scaled(value: float, units: Sequence[tuple[float, str]]) -> str:
    factor, unit = _unit(value, units)
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


_TIME_UNITS = ((1.0, "s"), (1e-3, "ms"), (1e-6, "µs"), (1e-9, "ns"))


def seconds(value: float | None, like: float | None = None) -> str:
    """A short duration with the unit that keeps three significant digits. Zero fits every unit: it takes
    the unit ``like`` (its column's largest figure) would have, so "0.00 ms" stands among milliseconds."""
    if value is None:
        return MISSING
    if value == 0:
        return f"0.00 {_unit(like, _TIME_UNITS)[1] if like else 's'}"
    return _scaled(value, _TIME_UNITS)


def signed_seconds(value: float | None, like: float | None = None) -> str:
    """A clock offset, whose sign says which way the node's clock is off."""
    if value is None:
        return MISSING
    if value == 0:
        return seconds(0.0, like)  # the reference clock itself: no direction to show
    return ("+" if value > 0 else "−") + seconds(abs(value))


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


def size(nbytes: float | None) -> str:
    """An amount of data in decimal units, three significant digits ("11.7 GB", not 11,702,108,160 B)."""
    if nbytes is None:
        return MISSING
    return _scaled(nbytes, [(1e12, "TB"), (1e9, "GB"), (1e6, "MB"), (1e3, "kB"), (1.0, "B")])


def counted(value: int, noun: str, plural: str | None = None) -> str:
    """A count with its noun in the right number: "1 alert", "3 alerts", "1,024 ranks"."""
    return f"{value:,} {noun if value == 1 else plural or noun + 's'}"


def link(src: str, dst: str) -> str:
    """A directed link as its two ends joined by the one arrow used everywhere."""
    return f"{src}{ARROW}{dst}"


def count(value: int | None) -> str:
    """An exact count with thousands separators."""
    if value is None:
        return MISSING
    return f"{value:,}"

"""The console as a 16-colour terminal shows it: `watchtower demo` in tmux with TERM=xterm (and NO_COLOR=1) at
80x24, the screen read back with its escape sequences. The output must use only the 16-colour SGR codes, and
the selected row and the lightest heat-map shade must keep a foreground apart from their background.

rich picks its colour system from the environment alone (rich/console.py `_detect_color_system`): COLORTERM
"truecolor"/"24bit" means 24-bit; otherwise the suffix of TERM ("-256color" 256 colours, none 16 colours);
textual passes TEXTUAL_COLOR_SYSTEM over both. A real 16-colour xterm sets TERM=xterm and no COLORTERM, so
the console here runs with exactly that.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import time
import uuid
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import pytest

TMUX = shutil.which("tmux")
pytestmark = pytest.mark.skipif(TMUX is None, reason="tmux is not installed: the 16-colour check runs the "
                                                     "console in it (.ci/run installs it)")

SIZE = (80, 24)
SGR = re.compile(r"\x1b\[([0-9;:]*)m")  # colons too: `38:5:n` is another way to ask for 256 colours
SIXTEEN_FG = {*range(30, 38), *range(90, 98)}
SIXTEEN_BG = {*range(40, 48), *range(100, 108)}
ATTRIBUTES = {0, 1, 2, 3, 4, 5, 7, 8, 9, *range(21, 30), 39, 49}
"""SGR parameters that set no colour: resets, bold, dim, italic, underline, reverse … (ECMA-48, SGR; the bright
colours 90–97 and 100–107 are xterm's addition, from memory)."""
DEFAULT_FG, DEFAULT_BG = 7, 0
"""The terminal's own colours, taken as light on dark like the in-process 16-colour test (from memory: the
usual xterm default)."""
DARK = {0, 8}
"""Black and dark grey: unreadable on a dark screen (the rule of the in-process test)."""


@dataclass(frozen=True)
class Cell:
    char: str
    fg: int  # 0-15
    bg: int  # 0-15
    reverse: bool

    @property
    def shown(self) -> tuple[int, int]:
        """Foreground and background as the eye sees them (reverse swaps them)."""
        return (self.bg, self.fg) if self.reverse else (self.fg, self.bg)


def sgr_codes(capture: str) -> list[int]:
    """Every SGR parameter in a capture, in order (an empty parameter list is a reset, 0)."""
    return [int(p) if p else 0 for params in SGR.findall(capture) for p in re.split("[;:]", params)]


def cells(capture: str) -> list[list[Cell]]:
    """The screen as cells: `tmux capture-pane -e` writes each change of attributes once, carrying the state
    from one line to the next, so the capture is read as one stream."""
    fg, bg, reverse = DEFAULT_FG, DEFAULT_BG, False
    screen: list[list[Cell]] = []
    for line in capture.split("\n"):
        row: list[Cell] = []
        for index, piece in enumerate(SGR.split(line)):
            if index % 2 == 0:
                assert "\x1b" not in piece, f"an escape sequence other than SGR: {piece!r}"
                row.extend(Cell(char, fg, bg, reverse) for char in piece)
                continue
            for code in (int(p) if p else 0 for p in re.split("[;:]", piece)):
                if code == 0:
                    fg, bg, reverse = DEFAULT_FG, DEFAULT_BG, False
                elif code == 7:
                    reverse = True
                elif code == 27:
                    reverse = False
                elif code == 39:
                    fg = DEFAULT_FG
                elif code == 49:
                    bg = DEFAULT_BG
                elif code in SIXTEEN_FG:
                    fg = code - 30 if code < 90 else code - 90 + 8
                elif code in SIXTEEN_BG:
                    bg = code - 40 if code < 100 else code - 100 + 8
        screen.append(row)
    return screen


def text_of(row: list[Cell]) -> str:
    return "".join(cell.char for cell in row)


class Terminal:
    """One tmux server of our own (its own socket, no user configuration) running one command at SIZE."""

    def __init__(self, command: list[str], environ: dict[str, str]) -> None:
        self.socket = f"watchtower-test-{uuid.uuid4().hex[:12]}"
        self.environ = environ
        width, height = SIZE
        self.tmux("new-session", "-d", "-s", "console", "-x", str(width), "-y", str(height), *command)
        self.tmux("set-option", "-g", "status", "off")

    def tmux(self, *args: str) -> str:
        assert TMUX is not None
        return subprocess.run([TMUX, "-u", "-L", self.socket, "-f", os.devnull, *args], env=self.environ,
                              capture_output=True, text=True, check=True, timeout=30).stdout

    def capture(self, escapes: bool = False) -> str:
        return self.tmux("capture-pane", "-p", "-t", "console", *(["-e"] if escapes else []))

    def until(self, condition: Callable[[str], bool], what: str, *, still: bool = False,
              timeout_s: float = 60.0) -> str:
        """The plain screen once it shows `what` (and, if `still`, holds still across two captures); the
        deadline only bounds a broken console."""
        deadline = time.monotonic() + timeout_s
        previous = None
        while True:
            screen = self.capture()
            if condition(screen) and (not still or screen == previous):
                return screen
            previous = screen
            assert time.monotonic() < deadline, f"the console never showed {what}:\n{screen}"
            time.sleep(0.2)

    def close(self) -> None:
        subprocess.run([TMUX or "tmux", "-L", self.socket, "kill-server"], env=self.environ, capture_output=True,
                       timeout=30)


def sixteen_colour_environ(no_color: bool) -> dict[str, str]:
    """This process's environment as a 16-colour xterm has it: nothing that asks for more colours, nothing
    that sets the size."""
    unwanted = {"COLORTERM", "NO_COLOR", "FORCE_COLOR", "COLUMNS", "LINES", "TMUX", "TMUX_PANE"}
    environ = {k: v for k, v in os.environ.items() if k not in unwanted and not k.startswith("TEXTUAL")}
    environ["TERM"] = "xterm"
    if no_color:
        environ["NO_COLOR"] = "1"
    return environ


@pytest.fixture(params=[False, True], ids=["16-colours", "NO_COLOR"])
def terminal(request: pytest.FixtureRequest) -> Iterator[Terminal]:
    environ = sixteen_colour_environ(no_color=request.param)
    # tmux gives the programs in its panes its own TERM: the command sets the one a 16-colour xterm has.
    command = ["env", *(f"{k}={environ[k]}" for k in ("TERM", "NO_COLOR") if k in environ),
               sys.executable, "-m", "watchtower.cli", "demo"]
    term = Terminal(command, environ)
    try:
        yield term
    finally:
        term.close()


def assert_only_sixteen_colours(capture: str, screen: str) -> None:
    codes = sgr_codes(capture)
    assert codes, "no SGR code at all: the colour check would pass on anything"
    extended = [c for c in codes if c in (38, 48)]
    assert not extended, f"{screen}: 256-colour or 24-bit SGR codes in 16 colours"
    assert set(codes) <= SIXTEEN_FG | SIXTEEN_BG | ATTRIBUTES, f"{screen}: {set(codes) - SIXTEEN_FG - SIXTEEN_BG}"


def assert_readable(cell: Cell, where: str) -> None:
    fg, bg = cell.shown
    assert fg != bg, f"{where}: text in colour {fg} on the same colour"
    assert not (fg in DARK and bg in DARK), f"{where}: colour {fg} on {bg}, dark on dark"


def test_sixteen_colours_as_a_terminal_shows_them(terminal: Terminal) -> None:
    detail = re.compile(r"^ ?layer (\S+) · per step", re.M)
    terminal.until(lambda s: "WATCHTOWER" in s and detail.search(s) is not None, "the layers view")
    terminal.tmux("send-keys", "-t", "console", "space")  # pause, so the screen holds still to be read
    plain = terminal.until(lambda s: "PAUSED" in s and detail.search(s) is not None, "the paused layers view",
                           still=True)
    size = terminal.tmux("display-message", "-p", "-t", "console", "#{pane_width}x#{pane_height}").strip()
    assert size == f"{SIZE[0]}x{SIZE[1]}"
    capture = terminal.capture(escapes=True)
    assert_only_sixteen_colours(capture, "layers")
    screen = cells(capture)
    lines = [text_of(row) for row in screen]
    assert [line.rstrip() for line in lines] == [line.rstrip() for line in terminal.capture().split("\n")]

    # The selected row is the layer the detail line describes; the table's other rows are drawn differently.
    match = detail.search(plain)
    assert match is not None
    name = match[1]
    word = re.compile(rf"(?<!\S){re.escape(name)}(?!\S)")
    header = next(i for i, line in enumerate(lines) if "comp/step" in line and "layer" in line)
    below = next(i for i, line in enumerate(lines) if detail.match(line))
    rows = [i for i in range(header + 1, below) if word.search(lines[i])]
    assert len(rows) == 1, f"the selected layer {name!r} shows in rows {rows}"
    at = word.search(lines[rows[0]])
    assert at is not None
    selected = screen[rows[0]][at.start():at.end()]
    for cell in selected:
        assert_readable(cell, f"the selected row ({name})")
    others = [screen[i][at.start()] for i in range(header + 1, below) if i != rows[0] and lines[i][at.start():].strip()]
    assert others, "no other row to compare the selected one with"
    assert all(o.shown != selected[0].shown for o in others), "the selected row looks like the others"

    terminal.tmux("send-keys", "-t", "console", "2")
    plain = terminal.until(lambda s: "rows send → columns receive" in s and "<¼" in s, "the links heat map",
                           still=True)
    capture = terminal.capture(escapes=True)
    assert_only_sixteen_colours(capture, "links")
    screen = cells(capture)
    lines = [text_of(row) for row in screen]
    top = next(i for i, line in enumerate(lines) if re.match(r"^\s+1\s+2\s+3", line))
    bottom = next(i for i, line in enumerate(lines) if "rows send → columns receive" in line)
    lightest = [cell for row in screen[top:bottom] for cell in row if cell.char == "░"]
    assert len(lightest) >= 2, "the heat map's legend shows the lightest shade"
    for cell in lightest:
        assert_readable(cell, "the lightest heat-map shade")
        if not cell.reverse:  # the in-process rule: never black or dark grey, whatever it is drawn on
            assert cell.fg not in DARK, f"the lightest heat-map shade in colour {cell.fg}"

"""The README's pictures (demo/screenshots.py) show what a terminal shows: words keep the spaces between
them and no path of the machine that made them appears."""

from __future__ import annotations

import html
import importlib.util
import re
from pathlib import Path
from types import ModuleType

from watchtower.demo import DEMO_RECORDING

SCRIPT = Path(__file__).parents[2] / "demo" / "screenshots.py"
NBSP = "\u00a0"


def screenshots() -> ModuleType:
    spec = importlib.util.spec_from_file_location("screenshots", SCRIPT)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def runs(svg: str) -> list[tuple[float, float, str]]:
    """(x, textLength, text) of every positioned run of text."""
    return [(float(x), float(length), html.unescape(text)) for x, length, text in
            re.findall(r'<text[^>]* x="([-\d.]+)"[^>]* textLength="([-\d.]+)"[^>]*>([^<]*)</text>', svg)]


def test_leading_spaces_become_a_shift_of_the_run() -> None:
    svg = ('<text class="r8" x="12.2" y="190.8" textLength="109.8">12&#160;layers</text>'
           '<text class="r9" x="122" y="190.8" textLength="207.4">&#160;by&#160;exchange&#160;▼&#160;·&#160;</text>'
           '<text class="r9" x="329.4" y="190.8" textLength="24.4">&#160;&#160;</text>')
    fixed = runs(screenshots().keep_leading_spaces(svg))
    assert fixed[0] == (12.2, 109.8, f"12{NBSP}layers")
    assert fixed[1] == (134.2, 195.2, f"by{NBSP}exchange{NBSP}▼{NBSP}·{NBSP}")  # one cell (12.2) to the right
    assert fixed[2] == (329.4, 24.4, NBSP * 2)  # nothing but spaces: nothing to glue


async def test_a_picture_of_the_demo_has_no_glued_words_and_no_local_path(tmp_path: Path) -> None:
    module = screenshots()
    (svg,) = await module.shoot(DEMO_RECORDING, ["layers"], (100, 30), tmp_path)
    text = svg.read_text()
    found = runs(text)
    assert len(found) > 50
    assert not [run for run in found if run[2].startswith(NBSP) and run[2].strip(NBSP)]
    shown = " ".join(run[2] for run in found)
    assert str(DEMO_RECORDING.parent) not in shown and "/" + DEMO_RECORDING.parts[1] not in shown
    assert DEMO_RECORDING.name[:12] in shown  # the recording is named, by its file name only

"""Regenerate the README's pictures of the console: the bundled demo at its last step, one per view.

    python demo/screenshots.py [--size 100x30]     # needs rsvg-convert (Debian: librsvg2-bin)

Each view is saved as SVG by textual and turned into docs/console-<view>.png.
"""

from __future__ import annotations

import argparse
import asyncio
import subprocess
import tempfile
import time
from pathlib import Path

from watchtower.console import ConsoleApp
from watchtower.demo import DEMO_RECORDING
from watchtower.feeds import ReplayFeed

DOCS = Path(__file__).parents[1] / "docs"
VIEWS = {"layers": "1", "links": "2", "nodes": "3", "alerts": "4", "how": "5"}


async def shoot(size: tuple[int, int], folder: Path) -> list[Path]:
    feed = ReplayFeed(DEMO_RECORDING)
    feed.pause()
    app = ConsoleApp(feed)
    saved = []
    async with app.run_test(size=size) as pilot:
        deadline = time.monotonic() + 60
        while app.snapshot is None or app.snapshot["replay"]["step"] != feed.last_step:
            if app.snapshot is not None and app.snapshot["replay"]["step"] == 0:
                await pilot.press(">")
            assert time.monotonic() < deadline, "the replay did not reach its end"
            await pilot.pause(0.1)
        for view, key in VIEWS.items():
            await pilot.press(key)
            await pilot.pause(0.3)
            saved.append(Path(app.save_screenshot(f"console-{view}.svg", str(folder))))
        await pilot.press("1", "enter")
        await pilot.pause(0.3)
        saved.append(Path(app.save_screenshot("console-ranks.svg", str(folder))))
    return saved


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", default="100x30", help="columns x rows (default %(default)s)")
    columns, rows = (int(n) for n in parser.parse_args().size.split("x"))
    with tempfile.TemporaryDirectory() as folder:
        for svg in asyncio.run(shoot((columns, rows), Path(folder))):
            png = DOCS / svg.with_suffix(".png").name
            subprocess.run(["rsvg-convert", "-o", str(png), str(svg)], check=True)
            print(png)


if __name__ == "__main__":
    main()

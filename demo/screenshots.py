"""Regenerate the README's pictures of the console: a recording at its last step, one picture per view.

    python demo/screenshots.py [--size 100x30]     # the bundled demo; needs rsvg-convert (librsvg2-bin)
    python demo/screenshots.py --recording run.wtrace --name torch --views layers

Each view is saved as SVG by textual and turned into docs/console-<view>.png (docs/console-<name>.png
with --name and a single view).
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


async def shoot(recording: Path, views: list[str], size: tuple[int, int], folder: Path) -> list[Path]:
    feed = ReplayFeed(recording)
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
        for view in views:
            await pilot.press(*(["1", "enter"] if view == "ranks" else [VIEWS[view]]))
            await pilot.pause(0.3)
            saved.append(Path(app.save_screenshot(f"console-{view}.svg", str(folder))))
    return saved


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", default="100x30", help="columns x rows (default %(default)s)")
    parser.add_argument("--recording", type=Path, default=DEMO_RECORDING)
    parser.add_argument("--views", default=",".join([*VIEWS, "ranks"]), help="comma-separated views")
    parser.add_argument("--name", help="with a single view: save it as docs/console-NAME.png")
    args = parser.parse_args()
    columns, rows = (int(n) for n in args.size.split("x"))
    with tempfile.TemporaryDirectory() as folder:
        for svg in asyncio.run(shoot(args.recording, args.views.split(","), (columns, rows), Path(folder))):
            png = DOCS / (f"console-{args.name}.png" if args.name else svg.with_suffix(".png").name)
            subprocess.run(["rsvg-convert", "-o", str(png), str(svg)], check=True)
            print(png)


if __name__ == "__main__":
    main()

"""Regenerate the README's pictures of the console, all of them, with one command:

    python demo/screenshots.py              # the demo's views, then a real DDP run (needs torch==2.13.0)
    python demo/screenshots.py --no-torch   # the demo's views only
    python demo/screenshots.py --recording run.wtrace --views layers --name mine   # any recording

Each view is replayed to the recording's last step, saved as SVG by textual and turned into
docs/console-<view>.png by rsvg-convert (Debian's librsvg2-bin). The recording is opened by its file name
from its own folder, so the pictures show "replay quorvex.wtrace.gz", not a path of this machine.
"""

from __future__ import annotations

import argparse
import asyncio
import html
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from watchtower.console import ConsoleApp
from watchtower.demo import DEMO_RECORDING
from watchtower.feeds import ReplayFeed

REPO = Path(__file__).parents[1]
DOCS = REPO / "docs"
VIEWS = {"layers": "1", "links": "2", "nodes": "3", "alerts": "4", "how": "5"}
ALL_VIEWS = [*VIEWS, "ranks"]
TORCH_JOB = REPO / "tests" / "torch" / "torch_job.py"
TORCH_STEPS = 300
NBSP = "\u00a0"
_TEXT = re.compile(r"<text([^>]*)>([^<]*)</text>")


def keep_leading_spaces(svg: str) -> str:
    """textual writes each run of a line as a positioned <text> whose spaces are no-break spaces; SVG
    renderers drop a run's leading spaces, which glues it to the run before ("layersby"). Move them into
    the run's position instead, so the picture shows what the terminal does."""

    def fix(match: re.Match[str]) -> str:
        attrs, text = match.group(1), html.unescape(match.group(2))
        lead = len(text) - len(text.lstrip(NBSP))
        x, length = re.search(r' x="([-\d.]+)"', attrs), re.search(r' textLength="([-\d.]+)"', attrs)
        if lead == 0 or lead == len(text) or x is None or length is None:
            return match.group(0)
        cell = float(length.group(1)) / len(text)
        attrs = attrs.replace(x.group(0), f' x="{float(x.group(1)) + lead * cell:.1f}"')
        attrs = attrs.replace(length.group(0), f' textLength="{float(length.group(1)) - lead * cell:.1f}"')
        return f"<text{attrs}>{html.escape(text[lead:], quote=False).replace(NBSP, '&#160;')}</text>"

    return _TEXT.sub(fix, svg)


async def shoot(recording: Path, views: list[str], size: tuple[int, int], folder: Path) -> list[Path]:
    """One SVG per view in ``folder``, of ``recording`` replayed to its last step (opened from its own
    folder by file name; the working directory is restored afterwards)."""
    here = Path.cwd()
    os.chdir(recording.resolve().parent)
    try:
        feed = ReplayFeed(Path(recording.name))
        feed.pause()
        app = ConsoleApp(feed)
        saved = []
        async with app.run_test(size=size) as pilot:
            deadline = time.monotonic() + 60
            while app.snapshot is None or app.snapshot["replay"]["step"] != feed.last_step:
                if app.snapshot is not None and app.snapshot["replay"]["step"] == 0:
                    await pilot.press(">")
                if time.monotonic() > deadline:
                    raise RuntimeError(f"the replay of {recording} did not reach its end")
                await pilot.pause(0.1)
            for view in views:
                await pilot.press(*(["1", "enter"] if view == "ranks" else [VIEWS[view]]))
                await pilot.pause(0.3)
                svg = folder / f"console-{view}.svg"
                svg.write_text(keep_leading_spaces(app.export_screenshot()))
                saved.append(svg)
                if view == "ranks":
                    await pilot.press("escape")
        return saved
    finally:
        os.chdir(here)


def to_png(svg: Path, png: Path) -> None:
    if shutil.which("rsvg-convert") is None:
        sys.exit("screenshots: rsvg-convert is missing (apt-get install -y librsvg2-bin)")
    subprocess.run(["rsvg-convert", "-o", str(png), str(svg)], check=True)
    print(png.relative_to(REPO) if png.is_relative_to(REPO) else png)


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@contextmanager
def _started(*commands: list[str], env: dict[str, str]) -> Iterator[list[subprocess.Popen[bytes]]]:
    processes = [subprocess.Popen(command, env=env, cwd=REPO) for command in commands]
    try:
        yield processes
    finally:
        for process in processes:
            if process.poll() is None:
                process.kill()
                process.wait()


def record_torch_run(folder: Path) -> Path:
    """A real run to picture: two processes training a small model with DDP on CPU (gloo), published to
    ``watchtower collect``; returns the recording."""
    try:
        import torch  # noqa: F401
    except ImportError:
        sys.exit("screenshots: the DDP picture needs torch (pip install torch==2.13.0), or give --no-torch")
    recording = folder / "run.wtrace"
    env = {**os.environ, "WATCHTOWER_RUN_DIR": str(folder / "run"), "PYTHONPATH": str(REPO)}
    listen = f"tcp://127.0.0.1:{_free_port()}"
    collect = [sys.executable, "-m", "watchtower.cli", "collect", "--listen", listen, "--record", str(recording)]
    master = str(_free_port())
    ranks = [[sys.executable, str(TORCH_JOB), "ddp", "--rank", str(r), "--world", "2", "--port", master,
              "--collector", listen, "--steps", str(TORCH_STEPS)] for r in range(2)]
    with _started(collect, env=env) as (collector,):
        with _started(*ranks, env=env) as jobs:
            for job in jobs:
                if job.wait(timeout=600) != 0:
                    sys.exit("screenshots: the DDP job failed")
        collector.send_signal(signal.SIGINT)
        collector.wait(timeout=60)
    return recording


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", default="100x30", help="columns x rows (default %(default)s)")
    parser.add_argument("--recording", type=Path, help="picture this recording instead of the demo (no DDP run)")
    parser.add_argument("--views", default=",".join(ALL_VIEWS), help="comma-separated views (default: all)")
    parser.add_argument("--name", help="with a single view: save it as docs/console-NAME.png")
    parser.add_argument("--no-torch", action="store_true", help="skip the picture of a real DDP run")
    args = parser.parse_args()
    columns, rows = (int(n) for n in args.size.split("x"))
    views = args.views.split(",")
    if args.name and len(views) != 1:
        parser.error("--name goes with a single view")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        for svg in asyncio.run(shoot(args.recording or DEMO_RECORDING, views, (columns, rows), folder)):
            to_png(svg, DOCS / (f"console-{args.name}.png" if args.name else svg.with_suffix(".png").name))
        if args.recording is None and not args.no_torch:
            (svg,) = asyncio.run(shoot(record_torch_run(folder), ["layers"], (columns, rows), folder))
            to_png(svg, DOCS / "console-torch.png")


if __name__ == "__main__":
    main()

"""Bytes per second the console writes to its terminal, plain and in low-bandwidth mode, side by side.

    python bench/bench_console_bytes.py                 # 80x24 and 160x48, 15 s each, the bundled demo
    python bench/bench_console_bytes.py --seconds 30

Runs ``watchtower demo`` in a pseudo-terminal of each size, counts what it writes after the first screen
(the steady cost of keeping the view current), then quits it with ``q``. What a slow remote link has to
carry; the ratio says what ``--low-bandwidth`` saves.
"""

from __future__ import annotations

import argparse
import fcntl
import os
import pty
import select
import struct
import sys
import termios
import time

SETTLE_S = 5.0  # the first screen and the recording's opening are not the steady state; no source


def measure(width: int, height: int, seconds: float, extra: list[str]) -> float:
    """Bytes per second written by the console after it settled."""
    pid, fd = pty.fork()
    if pid == 0:
        os.environ.update(TERM="xterm-256color", COLUMNS=str(width), LINES=str(height))
        os.execvp(sys.executable, [sys.executable, "-m", "watchtower.cli", "demo", "--speed", "8", *extra])
    fcntl.ioctl(fd, termios.TIOCSWINSZ, struct.pack("HHHH", height, width, 0, 0))
    counted, start = 0, time.monotonic()
    try:
        while (now := time.monotonic()) < start + SETTLE_S + seconds:
            ready, _, _ = select.select([fd], [], [], 0.1)
            if ready:
                try:
                    data = os.read(fd, 65536)
                except OSError:
                    break
                if now >= start + SETTLE_S:
                    counted += len(data)
    finally:
        os.write(fd, b"q")
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and os.waitpid(pid, os.WNOHANG) == (0, 0):
            if select.select([fd], [], [], 0.1)[0]:
                try:
                    os.read(fd, 65536)
                except OSError:
                    break
        if os.waitpid(pid, os.WNOHANG) == (0, 0):
            os.kill(pid, 9)
            os.waitpid(pid, 0)
        os.close(fd)
    return counted / seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=15.0, help="how long to count after settling")
    args = parser.parse_args()
    print(f"{'size':>8} {'plain B/s':>12} {'low-bandwidth B/s':>18} {'ratio':>7}")
    for width, height in ((80, 24), (160, 48)):
        plain = measure(width, height, args.seconds, [])
        low = measure(width, height, args.seconds, ["--low-bandwidth"])
        print(f"{width}x{height:<5} {plain:>12,.0f} {low:>18,.0f} {low / plain if plain else float('nan'):>7.2f}")


if __name__ == "__main__":
    main()

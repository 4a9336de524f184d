"""Finding a running ``watchtower collect`` from a console on the same head node.

A collector that records announces itself on a local ipc socket in a run folder private to the user
(``$WATCHTOWER_RUN_DIR``, else ``/tmp/watchtower-<uid>``). A console asks each socket there who it is and
gets the recording's path, the endpoint, the security state and where the collector publishes its snapshots
(``snapshots``, ``watchtower.publish``); it then subscribes to those and only draws, so it never slows or stops
the collector, and any number of consoles can watch one run.
"""

from __future__ import annotations

import contextlib
import json
import os
import stat
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import zmq

from watchtower.errors import UsageError

ASK_TIMEOUT_MS = 500


def run_dir() -> Path:
    """The folder where collectors announce themselves, created private to this user.

    An existing folder must be ours and closed to others: in a shared /tmp someone could otherwise create
    it first and plant sockets that point our consoles at their recordings."""
    folder = Path(os.environ.get("WATCHTOWER_RUN_DIR") or f"/tmp/watchtower-{os.getuid()}")
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        info = folder.lstat()
    except OSError as exc:
        raise UsageError(f"cannot use the run folder {folder}: {exc.strerror}") from None
    if not stat.S_ISDIR(info.st_mode) or info.st_uid != os.getuid() or info.st_mode & 0o077:
        raise UsageError(f"the run folder {folder} is not a directory private to you (owner and mode 0700); "
                         "remove it or set WATCHTOWER_RUN_DIR")
    return folder


class Beacon:
    """The collector's side: answers every query on its ipc socket with a JSON description of the run."""

    def __init__(self, info: dict[str, Any], context: zmq.Context | None = None, folder: Path | None = None) -> None:
        self.path = (folder or run_dir()) / f"collect-{os.getpid()}.sock"
        self.info = {**info, "pid": os.getpid(), "started": time.time()}
        self.socket = (context or zmq.Context.instance()).socket(zmq.ROUTER)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.socket.bind(f"ipc://{self.path}")

    def answer(self) -> None:
        """Reply to every pending query without waiting."""
        while True:
            try:
                identity, *_ = self.socket.recv_multipart(flags=zmq.NOBLOCK)
            except zmq.Again:
                return
            with contextlib.suppress(zmq.Again):
                self.socket.send_multipart([identity, json.dumps(self.info).encode()], flags=zmq.NOBLOCK)

    def close(self) -> None:
        self.socket.close()
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()


@dataclass(frozen=True)
class RunningCollector:
    pid: int
    recording: Path
    listen: str
    security: dict[str, Any]
    started: float
    socket: Path
    job: str = ""
    recorder: dict[str, Any] | None = None
    snapshots: str | None = None  # where its snapshots are published (None: an older collect; follow the file)

    def ask(self, context: zmq.Context | None = None) -> dict[str, Any] | None:
        """The collector's answer now (None when it does not answer): e.g. its recorder's state."""
        return _ask(context or zmq.Context.instance(), self.socket)


def find_collectors(folder: Path | None = None, context: zmq.Context | None = None) -> list[RunningCollector]:
    """Every collector that answers in the run folder, newest first; stale sockets are removed."""
    ctx = context or zmq.Context.instance()
    found = []
    for path in sorted((folder or run_dir()).glob("collect-*.sock")):
        info = _ask(ctx, path)
        if info is None:
            if not _alive(path):
                with contextlib.suppress(FileNotFoundError):
                    path.unlink()
            continue
        try:
            found.append(RunningCollector(int(info["pid"]), Path(info["recording"]), str(info["listen"]),
                                          dict(info["security"]), float(info["started"]), path,
                                          str(info.get("job") or ""), info.get("recorder"),
                                          _endpoint(info.get("snapshots"))))
        except (KeyError, TypeError, ValueError):
            continue  # not one of ours, or another version: leave it alone
    return sorted(found, key=lambda c: -c.started)


def describe(found: RunningCollector) -> str:
    """One line per collector for the picker: job, endpoint, when it started, what it records."""
    started = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(found.started))
    return f"pid {found.pid}  job {found.job or '(not yet named)'}  {found.listen}  since {started}  {found.recording}"


def choose(running: list[RunningCollector], *, pid: int | None = None, job: str | None = None,
           ask: Callable[[str], str] | None = None) -> RunningCollector:
    """The collector to attach to: the one ``pid`` or ``job`` names, the only one running, or the one the
    user picks from a numbered list (``ask`` shows a prompt and returns the answer; None: not interactive,
    so several candidates are a usage error that lists them)."""
    where = f"in {run_dir()}"
    if pid is not None:
        running = [c for c in running if c.pid == pid]
        if not running:
            raise UsageError(f"no running 'watchtower collect' with pid {pid} {where}")
    if job is not None:
        running = [c for c in running if c.job == job]
        if not running:
            raise UsageError(f"no running 'watchtower collect' of job {job!r} {where}")
    if not running:
        raise UsageError(f"no running 'watchtower collect' found {where}; start one, or give --listen or --follow")
    if len(running) == 1:
        return running[0]
    listing = [f"  {i}) {describe(c)}" for i, c in enumerate(running, start=1)]
    if ask is None:
        raise UsageError(f"{len(running)} collectors are running; choose one with --pid or --job: "
                         + "; ".join(describe(c) for c in running))
    answer = ask("\n".join([f"{len(running)} collectors are running:", *listing,
                            f"attach to which (1-{len(running)})? "])).strip()
    if not answer.isdigit() or not 1 <= int(answer) <= len(running):
        raise UsageError(f"no collector chosen (expected a number from 1 to {len(running)}, got {answer!r})")
    return running[int(answer) - 1]


def _ask(ctx: zmq.Context, path: Path) -> dict[str, Any] | None:
    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    try:
        sock.connect(f"ipc://{path}")
        sock.send(b"who", flags=zmq.NOBLOCK)
        if not sock.poll(ASK_TIMEOUT_MS, zmq.POLLIN):
            return None
        reply = json.loads(sock.recv())
        return reply if isinstance(reply, dict) else None
    except (zmq.ZMQError, json.JSONDecodeError, UnicodeDecodeError):
        return None
    finally:
        sock.close()


def _endpoint(value: object) -> str | None:
    """A snapshot endpoint from a beacon: ipc only (a console subscribes on its own head node)."""
    return value if isinstance(value, str) and value.startswith("ipc://") else None


def _alive(path: Path) -> bool:
    """Whether the process named in a socket's file name still runs."""
    try:
        pid = int(path.stem.removeprefix("collect-"))
        os.kill(pid, 0)
    except (ValueError, ProcessLookupError):
        return False
    except PermissionError:
        return True
    return True

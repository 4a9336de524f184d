"""``watchtower``: the head-node command. Each subcommand is a thin adapter over a library module.

Every failure the user can cause ends with one line on stderr and a non-zero status (2 for usage and
input errors), never a traceback.
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import NoReturn

from watchtower.cluster import Cluster, ClusterConfigError, load_cluster
from watchtower.collector import Collector, Endpoint, EndpointError, parse_endpoint
from watchtower.console.feed import Feed
from watchtower.errors import UsageError, WatchtowerError
from watchtower.ingest import Ingest
from watchtower.recording import Recorder, RecordingError

PROG = "watchtower"


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line and status 2."""

    def error(self, message: str) -> NoReturn:
        raise UsageError(message)


def _positive(kind: type[int] | type[float]) -> Callable[[str], float]:
    def parse(text: str) -> float:
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
        if value <= 0:
            raise argparse.ArgumentTypeError(f"must be positive, got {text!r}")
        return value

    parse.__name__ = kind.__name__
    return parse


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Watch the network side of a multi-node training job.")
    commands = parser.add_subparsers(dest="command", required=True, parser_class=_Parser, metavar="COMMAND")

    collect = commands.add_parser("collect", help="receive frames from agents and record them (headless)")
    collect.add_argument("--listen", default="tcp://127.0.0.1:5555", help="endpoint to bind (default %(default)s)")
    collect.add_argument("--record", required=True, type=Path, help="recording to append to")
    collect.add_argument("--duration", type=_positive(float), help="stop after this many seconds")
    collect.add_argument("--insecure", action="store_true",
                         help="allow listening beyond loopback without keys (shown as a standing warning)")
    collect.set_defaults(run=_collect)

    watch = commands.add_parser("watch", help="the console: attach to a running collect, or collect in-process")
    watch.add_argument("--listen", help="collect here in this process instead of attaching (an endpoint)")
    watch.add_argument("--record", type=Path, help="with --listen: also append to this recording")
    watch.add_argument("--follow", type=Path, help="follow this recording as a collector appends to it")
    watch.add_argument("--insecure", action="store_true",
                       help="with --listen: allow listening beyond loopback without keys")
    _console_options(watch)
    watch.set_defaults(run=_watch)

    replay = commands.add_parser("replay", help="a recording through the console")
    replay.add_argument("recording", type=Path)
    replay.add_argument("--speed", type=_positive(float), default=1.0, help="times the recorded pace (default 1)")
    replay.add_argument("--from", dest="from_step", type=int, default=0, metavar="STEP", help="start at this step")
    _console_options(replay)
    replay.set_defaults(run=_replay)

    demo = commands.add_parser("demo", help="the bundled, invented scenario in the console (no cluster needed)")
    demo.add_argument("--live", action="store_true",
                      help="instead, run a small local job (workload ranks on loopback) and watch it live")
    demo.add_argument("--speed", type=_positive(float), default=3.0, help="replay pace (default 3x)")
    demo.add_argument("--ranks", type=_positive(int), default=4, help="with --live: ranks to start (default 4)")
    _console_options(demo)
    demo.set_defaults(run=_demo)

    report = commands.add_parser("report", help="figures from a recording, as a table or JSON")
    report.add_argument("recording", type=Path, nargs="+", help="one recording, or two to compare (A then B)")
    report.add_argument("--json", action="store_true", help="print JSON instead of a table")
    report.add_argument("--cluster", type=Path, help="cluster description (TOML): nominal rates, total steps")
    report.add_argument("--window", type=_positive(int), help="analyse only the last N steps")
    report.set_defaults(run=_report)
    return parser


def _console_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--cluster", type=Path, help="cluster description (TOML): nominal rates, total steps")
    parser.add_argument("--window", type=_positive(int), default=120,
                        help="steps the console's figures cover (default %(default)s)")


def _cluster(path: Path | None) -> Cluster | None:
    if path is None:
        return None
    try:
        return load_cluster(path)
    except ClusterConfigError as exc:
        raise UsageError(str(exc)) from None


def _security(endpoint: Endpoint, insecure: bool, listen: str) -> dict[str, str | None]:
    """The transport's state as the console shows it; refuses an open listener without --insecure."""
    if endpoint.loopback:
        return {"mode": "loopback", "warning": None}
    if not insecure:
        raise UsageError(f"{listen} is reachable from the network: give --insecure to accept unauthenticated "
                         "agents there")
    return {"mode": "insecure",
            "warning": f"listening on {listen} without keys: anyone who can reach it can send figures"}


def _listen(listen: str, insecure: bool) -> tuple[Endpoint, dict[str, str | None]]:
    try:
        endpoint = parse_endpoint(listen, binding=True)
    except EndpointError as exc:
        raise UsageError(str(exc)) from None
    return endpoint, _security(endpoint, insecure, listen)


def _recorder(path: Path, meta: dict) -> Recorder:
    try:
        return Recorder(path, meta)
    except OSError as exc:
        raise UsageError(f"cannot write {path}: {exc.strerror}") from None


def _collector(listen: str, ingest: Ingest, recorder: Recorder | None) -> Collector:
    try:
        return Collector(listen, ingest, recorder)
    except EndpointError as exc:
        if recorder is not None:
            recorder.close()
        raise UsageError(str(exc)) from None


def _run_console(feed: Feed) -> int:
    from watchtower.console import ConsoleApp

    ConsoleApp(feed).run()
    return 0


def _watch(args: argparse.Namespace) -> int:
    from watchtower.attach import find_collectors, run_dir
    from watchtower.feeds import AttachFeed, LiveFeed

    cluster = _cluster(args.cluster)
    if args.listen:
        _, security = _listen(args.listen, args.insecure)
        recorder = None if args.record is None else _recorder(args.record, {"tool": "watchtower watch",
                                                                             "listen": args.listen})
        feed: Feed = LiveFeed(_collector(args.listen, Ingest(), recorder), cluster=cluster, security=security,
                              window_steps=args.window)
        return _run_console(feed)
    if args.record or args.insecure:
        raise UsageError("--record and --insecure go with --listen")
    if args.follow is not None:
        recording, security = args.follow, None
    else:
        running = find_collectors()
        if not running:
            raise UsageError(f"no running 'watchtower collect' found (looked in {run_dir()}); start one, "
                             "or give --listen or --follow")
        recording, security = running[0].recording, running[0].security
    try:
        feed = AttachFeed(recording, security=security, cluster=cluster, window_steps=args.window)
    except (OSError, RecordingError) as exc:
        raise UsageError(f"cannot follow {recording}: {exc}") from None
    return _run_console(feed)


def _replay(args: argparse.Namespace) -> int:
    from watchtower.feeds import ReplayFeed

    try:
        feed = ReplayFeed(args.recording, cluster=_cluster(args.cluster), speed=args.speed,
                          from_step=args.from_step, window_steps=args.window)
    except RecordingError as exc:
        raise UsageError(str(exc)) from None
    return _run_console(feed)


def _demo(args: argparse.Namespace) -> int:
    from watchtower.demo import run_demo

    return run_demo(live=args.live, speed=args.speed, ranks=int(args.ranks), window=args.window,
                    run_console=_run_console)


def _collect(args: argparse.Namespace) -> int:
    from watchtower.attach import Beacon

    _, security = _listen(args.listen, args.insecure)
    recorder = _recorder(args.record, {"tool": "watchtower collect", "listen": args.listen})
    ingest = Ingest()
    collector = _collector(args.listen, ingest, recorder)
    beacon = Beacon({"recording": str(args.record.resolve()), "listen": collector.bound, "security": security})
    stop = threading.Event()
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, lambda *_: stop.set())
    try:
        collector.run(stop, args.duration, beacon)
    finally:
        beacon.close()
        collector.close()
    loss = ingest.ledger
    print(f"{PROG} collect: {len(ingest.store.ranks)} ranks from {len(loss.senders)} senders, "
          f"{ingest.steps} rank-steps, {loss.frames} frames, {loss.bad_total} bad, {loss.missing} missing "
          f"-> {args.record}")
    return 0


def _report(args: argparse.Namespace) -> int:
    from watchtower.report import run_report

    return run_report(args.recording, as_json=args.json, cluster=_cluster(args.cluster), window=args.window)


def main(argv: Sequence[str] | None = None) -> int:
    try:
        args = build_parser().parse_args(argv)
        return args.run(args)
    except WatchtowerError as exc:
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())

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

from watchtower.errors import UsageError, WatchtowerError

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

    report = commands.add_parser("report", help="figures from a recording, as a table or JSON")
    report.add_argument("recording", type=Path, nargs="+", help="one recording, or two to compare (A then B)")
    report.add_argument("--json", action="store_true", help="print JSON instead of a table")
    report.add_argument("--cluster", type=Path, help="cluster description (TOML): nominal rates, total steps")
    report.add_argument("--window", type=_positive(int), help="analyse only the last N steps")
    report.set_defaults(run=_report)
    return parser


def _collect(args: argparse.Namespace) -> int:
    from watchtower.collector import Collector, EndpointError, parse_endpoint
    from watchtower.ingest import Ingest
    from watchtower.recording import Recorder

    try:
        endpoint = parse_endpoint(args.listen, binding=True)
    except EndpointError as exc:
        raise UsageError(str(exc)) from None
    if not endpoint.loopback and not args.insecure:
        raise UsageError(f"{args.listen} is reachable from the network: give --insecure to accept unauthenticated "
                         "agents there")
    try:
        recorder = Recorder(args.record, {"tool": "watchtower collect", "listen": args.listen})
    except OSError as exc:
        raise UsageError(f"cannot write {args.record}: {exc.strerror}") from None
    ingest = Ingest()
    try:
        collector = Collector(args.listen, ingest, recorder)
    except EndpointError as exc:
        recorder.close()
        raise UsageError(str(exc)) from None
    stop = threading.Event()
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, lambda *_: stop.set())
    try:
        collector.run(stop, args.duration)
    finally:
        collector.close()
    loss = ingest.ledger
    print(f"{PROG} collect: {len(ingest.store.ranks)} ranks from {len(loss.senders)} senders, "
          f"{ingest.steps} rank-steps, {loss.frames} frames, {loss.bad_total} bad, {loss.missing} missing "
          f"-> {args.record}")
    return 0


def _report(args: argparse.Namespace) -> int:
    from watchtower.report import run_report

    return run_report(args.recording, as_json=args.json, cluster_path=args.cluster, window=args.window)


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

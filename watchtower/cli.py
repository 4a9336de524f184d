"""``watchtower``: the head-node command. Each subcommand is a thin adapter over a library module.

Every failure the user can cause ends with one line on stderr and a non-zero status (2 for usage and
input errors), never a traceback.
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import os
import shutil
import signal
import sys
import threading
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, NoReturn

from watchtower import __version__
from watchtower.cluster import Cluster, ClusterConfigError, load_cluster
from watchtower.collector import Collector, Endpoint, EndpointError, parse_endpoint
from watchtower.console.feed import Feed
from watchtower.errors import UsageError, WatchtowerError
from watchtower.ingest import Ingest
from watchtower.keys import HeadKeys, load_head
from watchtower.recording import NotARecording, Recorder, RecordingError, RecordingReader
from watchtower.tables import MIN_WIDTH

if TYPE_CHECKING:
    from watchtower.attach import RunningCollector
    from watchtower.metrics import MetricsServer
    from watchtower.publish import SnapshotPublisher
    from watchtower.snapshot import SnapshotParts

PROG = "watchtower"
KEYS_ENV = "WATCHTOWER_KEYS"  # the key folder when --dir is not given
DEFAULT_KEYS = Path("watchtower-keys")
WINDOW_STEPS = 120  # steps a console's figures cover by default, so a change shows soon


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
        if not math.isfinite(value) or value <= 0:
            raise argparse.ArgumentTypeError(f"must be a finite number above zero, got {text!r}")
        return value

    parse.__name__ = kind.__name__
    return parse


def _help(parser: argparse.ArgumentParser) -> Callable[[argparse.Namespace], int]:
    """A command given without its sub-command: show what it can do rather than only a usage error."""

    def show(_: argparse.Namespace) -> int:
        print(parser.format_help(), end="")
        return 2

    return show


def _at_least(low: int) -> Callable[[str], int]:
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if value < low:
            raise argparse.ArgumentTypeError(f"must be at least {low}, got {text!r}")
        return value

    parse.__name__ = "int"
    return parse


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Watch the network side of a multi-node training job.")
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    parser.set_defaults(run=_help(parser))
    commands = parser.add_subparsers(dest="command", parser_class=_Parser, metavar="COMMAND")

    collect = commands.add_parser("collect", help="receive frames from agents and record them (headless)")
    collect.add_argument("--listen", default="tcp://127.0.0.1:5555", help="endpoint to bind (default %(default)s)")
    collect.add_argument("--record", required=True, type=Path, help="recording to append to")
    collect.add_argument("--duration", type=_positive(float), help="stop after this many seconds")
    collect.add_argument("--insecure", action="store_true",
                         help="allow listening beyond loopback without keys (shown as a standing warning)")
    collect.add_argument("--keys", type=Path, metavar="DIR",
                         help="key folder (watchtower keys init): encrypt, and accept only listed agents")
    collect.add_argument("--cluster", type=Path,
                         help="cluster description (TOML) for the snapshots it publishes to consoles")
    collect.add_argument("--window", type=_positive(int), default=WINDOW_STEPS,
                         help="steps the published snapshots' figures cover (default %(default)s)")
    _alert_options(collect)
    _metrics_option(collect)
    collect.set_defaults(run=_collect)

    watch = commands.add_parser("watch", help="the console: attach to a running collect, or collect in-process")
    watch.add_argument("--listen", help="collect here in this process instead of attaching (an endpoint)")
    watch.add_argument("--record", type=Path, help="with --listen: also append to this recording")
    watch.add_argument("--follow", type=Path, help="follow this recording as a collector appends to it")
    watch.add_argument("--pid", type=_positive(int), help="attach to the running collect with this process id")
    watch.add_argument("--job", help="attach to the running collect of this job")
    watch.add_argument("--insecure", action="store_true",
                       help="with --listen: allow listening beyond loopback without keys")
    watch.add_argument("--keys", type=Path, metavar="DIR",
                       help="with --listen: key folder; encrypt, and accept only listed agents")
    _metrics_option(watch)
    _console_options(watch)
    _alert_options(watch)
    watch.set_defaults(run=_watch)

    replay = commands.add_parser("replay", help="a recording through the console")
    replay.add_argument("recording", type=Path)
    replay.add_argument("--speed", type=_positive(float), default=1.0, help="times the recorded pace (default 1)")
    replay.add_argument("--from", dest="from_step", type=int, default=0, metavar="STEP", help="start at this step")
    _console_options(replay)
    _alert_options(replay)
    replay.set_defaults(run=_replay)

    demo = commands.add_parser("demo", help="the bundled, invented scenario in the console (no cluster needed)")
    demo.add_argument("--live", action="store_true",
                      help="instead, run a small local job (workload ranks on loopback) and watch it live")
    demo.add_argument("--speed", type=_positive(float), default=3.0, help="replay pace (default 3x)")
    demo.add_argument("--ranks", type=_positive(int), default=4, help="with --live: ranks to start (default 4)")
    _console_options(demo)
    demo.set_defaults(run=_demo)

    report = commands.add_parser("report",
                                 help="figures from a recording, as text, JSON or CSV; two recordings compare")
    report.add_argument("recording", type=Path, nargs="+", help="one recording, or two to compare (A then B)")
    report.add_argument("--format", choices=("text", "json", "csv"), default=None,
                        help="text (default), JSON (docs/snapshot.md), or one table as CSV (with --table)")
    report.add_argument("--json", action="store_true", help="the same as --format json")
    report.add_argument("--table", metavar="NAME",
                        help="with --format csv: layers, links, ports, nodes, stragglers or alerts (two files: "
                             "layers, links, new_slow_links or new_stragglers)")
    report.add_argument("--width", type=_at_least(MIN_WIDTH),
                        help="text: fit every line in this many columns (default: the terminal's width)")
    report.add_argument("--cluster", type=Path, help="cluster description (TOML): nominal rates, total steps")
    report.add_argument("--window", type=_positive(int), help="analyse only the last N steps")
    _alert_options(report)
    report.set_defaults(run=_report)

    keys = commands.add_parser("keys", help="CURVE keys: the head's pair, and one pair per agent")
    keys.set_defaults(run=_help(keys))
    what = keys.add_subparsers(dest="keys_command", parser_class=_Parser, metavar="{init,agent}")
    init = what.add_parser("init", help="make the head's key pair and an empty allow-list in DIR")
    init.add_argument("dir", type=Path, metavar="DIR")
    init.set_defaults(run=_keys_init)
    agent = what.add_parser("agent", help="make an agent's key pair and add its public key to the allow-list")
    agent.add_argument("name", metavar="NAME", help="a name for the agent, e.g. its node")
    agent.add_argument("--dir", type=Path, default=None,
                       help=f"key folder (default: ${KEYS_ENV}, else {DEFAULT_KEYS})")
    agent.set_defaults(run=_keys_agent)

    relay = commands.add_parser("relay", help="a rack relay: agents connect here, one uplink to the collector")
    relay.add_argument("--listen", default="tcp://127.0.0.1:5556", help="endpoint to bind (default %(default)s)")
    relay.add_argument("--collector", required=True, metavar="ENDPOINT",
                       help="where to forward: the collector's endpoint, or a higher relay's")
    relay.add_argument("--insecure", action="store_true",
                       help="allow listening beyond loopback without keys")
    relay.add_argument("--keys", type=Path, metavar="DIR",
                       help="the head's key folder: encrypt the listener, and accept only listed agents")
    relay.add_argument("--uplink-key", metavar="AGENT_SECRET_FILE",
                       help="this relay's own agent secret key file, for an uplink to a collector with keys")
    relay.add_argument("--server-key", metavar="FILE", help="the collector's public key file; goes with --uplink-key")
    relay.add_argument("--duration", type=_positive(float), help="stop after this many seconds")
    relay.set_defaults(run=_relay)

    merge = commands.add_parser("merge", help="join agents' spools and the head's recording into one trace")
    merge.add_argument("out", type=Path, metavar="OUT", help="the merged recording to write (must not exist)")
    merge.add_argument("inputs", type=Path, nargs="+", metavar="IN", help="recordings and spools")
    merge.set_defaults(run=_merge)
    return parser


def _metrics_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--metrics", metavar="HOST:PORT",
                        help="serve the job's figures for scraping (OpenMetrics) here; PORT alone binds loopback")


def _metrics(text: str | None) -> MetricsServer | None:
    """Start the metrics endpoint early, so a bad address is one line before anything else starts."""
    if text is None:
        return None
    from watchtower.metrics import MetricsAddressError, MetricsServer, parse_address

    try:
        return MetricsServer(parse_address(text))
    except MetricsAddressError as exc:
        raise UsageError(str(exc)) from None


def _console_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--cluster", type=Path, help="cluster description (TOML): nominal rates, total steps")
    parser.add_argument("--window", type=_positive(int),
                        help=f"steps the console's figures cover (default {WINDOW_STEPS})")
    parser.add_argument("--interval", type=_positive(float), default=0.25, metavar="SECONDS",
                        help="shortest time between two redraws (default %(default)s)")
    parser.add_argument("--low-bandwidth", action="store_true",
                        help="for a slow remote link: redraw at most once a second, without sparklines, bars "
                             "or stripes")


def _window(args: argparse.Namespace) -> int:
    return args.window or WINDOW_STEPS


def _console_settings(args: argparse.Namespace) -> dict[str, Any]:
    """The console options of `watch`, `replay` and `demo`, as ConsoleApp's keyword arguments."""
    return {"redraw_interval_s": args.interval, "low_bandwidth": args.low_bandwidth}


def _alert_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--alert-min-effect", type=_positive(float), metavar="FRACTION",
                        help="step-time change an alert needs (default 0.10, or the cluster file's)")
    parser.add_argument("--alert-min-hours", type=_positive(float), metavar="HOURS",
                        help="or hours at stake an alert needs (default 1, or the cluster file's)")


def _cluster(path: Path | None, args: argparse.Namespace | None = None) -> Cluster | None:
    """The cluster file, with the alert bar from the flags (which win over the file) when given."""
    try:
        cluster = None if path is None else load_cluster(path)
    except ClusterConfigError as exc:
        raise UsageError(str(exc)) from None
    bar = {field: value for field, flag in (("alert_min_effect", "alert_min_effect"),
                                           ("alert_min_hours", "alert_min_hours"))
           if (value := getattr(args, flag, None)) is not None}
    return dataclasses.replace(cluster or Cluster.default(), **bar) if bar else cluster


def _security(endpoint: Endpoint, insecure: bool, listen: str, keys: bool = False) -> dict[str, str | None]:
    """The transport's state as the console shows it; refuses an open listener without keys or --insecure."""
    if keys and insecure:
        raise UsageError("give --keys or --insecure, not both")
    if keys:
        return {"mode": "keys", "warning": None}
    if endpoint.loopback:
        return {"mode": "loopback", "warning": None}
    if not insecure:
        raise UsageError(f"{listen} is reachable from the network: give --keys DIR to accept only listed agents, "
                         "or --insecure to accept anyone there")
    return {"mode": "insecure",
            "warning": f"listening on {listen} without keys: anyone who can reach it can send figures"}


def _listen(listen: str, insecure: bool, keys: Path | None = None) -> tuple[dict[str, str | None], HeadKeys | None]:
    """Check where and how to listen: the console's security state, and the head's keys if given."""
    try:
        endpoint = parse_endpoint(listen, binding=True)
    except EndpointError as exc:
        raise UsageError(str(exc)) from None
    security = _security(endpoint, insecure, listen, keys is not None)
    return security, None if keys is None else load_head(keys)


def _recorder(path: Path, meta: dict) -> Recorder:
    try:
        return Recorder(path, meta)
    except OSError as exc:
        raise UsageError(f"cannot write {path}: {exc.strerror}") from None
    except NotARecording as exc:
        raise UsageError(str(exc)) from None


def _refuse_job(record: Path | None) -> Callable[[str, str], None]:
    def say(job: str, owner: str) -> None:
        where = f"{record} belongs to" if record is not None else "this collector watches"
        print(f"{PROG}: warning: refusing frames of job {job!r}: {where} job {owner!r} (one job per recording); "
              "collect that job with its own --record", file=sys.stderr, flush=True)
    return say


def _collector(listen: str, ingest: Ingest, recorder: Recorder | None, keys: HeadKeys | None,
               console: bool = False) -> Collector:
    """``console``: a console draws on the terminal; refused jobs then show in its loss figures only."""
    try:
        return Collector(listen, ingest, recorder, keys=keys,
                         on_foreign_job=None if console else _refuse_job(None if recorder is None else recorder.path))
    except EndpointError as exc:
        if recorder is not None:
            recorder.close()
        raise UsageError(str(exc)) from None


def _run_console(feed: Feed, metrics: MetricsServer | None = None, settings: dict[str, Any] | None = None) -> int:
    from watchtower.console import ConsoleApp

    if metrics is not None:
        from watchtower.metrics import PublishingFeed

        feed = PublishingFeed(feed, metrics.metrics)
    app = ConsoleApp(feed, **(settings or {}))
    try:
        app.run()
    finally:
        if metrics is not None:
            metrics.close()
    if app.ended:
        print(f"{PROG}: error: {app.ended}", file=sys.stderr)
        return 1
    return 0


def _watch(args: argparse.Namespace) -> int:
    from watchtower.attach import choose, find_collectors
    from watchtower.feeds import LiveFeed

    cluster = _cluster(args.cluster, args)
    if args.listen and (args.follow is not None or args.pid is not None or args.job is not None):
        raise UsageError("--listen collects here; --follow, --pid and --job attach to a running collect: give one")
    if args.listen:
        security, keys = _listen(args.listen, args.insecure, args.keys)
        metrics = _metrics(args.metrics)
        try:
            recorder = None if args.record is None else _recorder(args.record, {"tool": "watchtower watch",
                                                                                 "listen": args.listen,
                                                                                 "security": security})
            collector = _collector(args.listen, Ingest(), recorder, keys, console=True)
        except UsageError:
            if metrics is not None:
                metrics.close()
            raise
        feed: Feed = LiveFeed(collector, cluster=cluster, security=security, window_steps=_window(args))
        return _run_console(feed, metrics, _console_settings(args))
    if args.record or args.insecure or args.keys:
        raise UsageError("--record, --insecure and --keys go with --listen")
    if args.follow is not None and (args.pid is not None or args.job is not None):
        raise UsageError("--pid and --job choose a running collect; --follow names a recording: give one")
    if args.follow is not None:
        return _follow(args.follow, None, cluster, args)
    chosen = choose(find_collectors(), pid=args.pid, job=args.job, ask=_prompt if sys.stdin.isatty() else None)
    if chosen.snapshots is None:  # a collect that publishes no snapshots: follow its recording here
        return _follow(chosen.recording, chosen.security, cluster, args, chosen.ask)
    if cluster is not None or args.window is not None:
        raise UsageError("an attached console draws the snapshots collect publishes: give --cluster, --window and "
                         "the alert options to collect, or --follow RECORDING to analyse it in this console")
    return _run_console(_subscribed(chosen), _metrics(args.metrics), _console_settings(args))


def _subscribed(chosen: RunningCollector) -> Feed:
    """A console on the snapshots ``chosen`` publishes; after a restart, on those of a collect on its recording."""
    from watchtower.attach import find_collectors
    from watchtower.subscribe import Publisher, SubscribedFeed

    def publisher(found: RunningCollector) -> Publisher:
        assert found.snapshots is not None
        return Publisher(found.pid, found.snapshots, found.ask)

    def find() -> Publisher | None:
        again = [c for c in find_collectors() if c.recording == chosen.recording and c.snapshots is not None]
        return publisher(again[0]) if again else None

    return SubscribedFeed(publisher(chosen), where=str(chosen.recording), find=find)


def _follow(recording: Path, security: dict[str, Any] | None, cluster: Cluster | None, args: argparse.Namespace,
            ask: Callable[[], dict[str, Any] | None] | None = None) -> int:
    """The console reads the recording itself and analyses it (``--follow``, or a collect that publishes none)."""
    from watchtower.feeds import AttachFeed

    try:
        feed = AttachFeed(recording, security=security, cluster=cluster, window_steps=_window(args), ask=ask)
    except OSError as exc:
        raise UsageError(f"cannot follow {recording}: {exc.strerror}") from None
    except RecordingError as exc:
        raise UsageError(f"cannot follow {recording}: {exc}") from None
    return _run_console(feed, _metrics(args.metrics), _console_settings(args))


def _prompt(text: str) -> str:
    print(text, end="", file=sys.stderr, flush=True)
    try:
        return input()
    except EOFError:
        return ""


def _replay(args: argparse.Namespace) -> int:
    from watchtower.feeds import ReplayFeed

    try:
        feed = ReplayFeed(args.recording, cluster=_cluster(args.cluster, args), speed=args.speed,
                          from_step=args.from_step, window_steps=_window(args))
    except RecordingError as exc:
        raise UsageError(str(exc)) from None
    return _run_console(feed, settings=_console_settings(args))


def _demo(args: argparse.Namespace) -> int:
    from watchtower.demo import run_demo

    return run_demo(live=args.live, speed=args.speed, ranks=int(args.ranks), window=_window(args),
                    run_console=lambda feed: _run_console(feed, settings=_console_settings(args)))


def _resume(path: Path) -> Ingest:
    """A collector restarted on its recording first reads what it already holds, so its loss figures (and
    the summary, metrics and consoles built on them) count the whole run, not just what came since."""
    ingest = Ingest()
    if not path.exists() or path.stat().st_size == 0:
        return ingest
    if path.suffix == ".gz":
        raise UsageError(f"{path} is compressed: record to a new file")
    try:
        with RecordingReader(path) as reader:
            ingest.feed_all(reader)
    except RecordingError as exc:
        raise UsageError(f"{path} exists and cannot be appended to: {exc}") from None
    return ingest


def _collect(args: argparse.Namespace) -> int:
    from watchtower.attach import Beacon

    security, keys = _listen(args.listen, args.insecure, args.keys)
    metrics = _metrics(args.metrics)
    try:
        ingest = _resume(args.record)
        recorder = _recorder(args.record, {"tool": "watchtower collect", "listen": args.listen, "security": security})
        collector = _collector(args.listen, ingest, recorder, keys)
    except UsageError:
        if metrics is not None:
            metrics.close()
        raise
    publisher = _publisher(ingest, collector.bound, security, recorder, _cluster(args.cluster, args), args.window)
    beacon = Beacon({"recording": str(args.record.resolve()), "listen": collector.bound, "security": security,
                     "snapshots": publisher.endpoint})
    stop = threading.Event()
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, lambda *_: stop.set())
    print(f"{PROG} collect: listening on {collector.bound} ({security['mode']}), recording to "
          f"{args.record.resolve()}; Ctrl+C stops", file=sys.stderr, flush=True)
    ticks = [publisher.tick]
    if metrics is not None:
        ticks.append(_snapshot_tick(ingest, collector.bound, security, metrics, recorder))
        print(f"{PROG} collect: metrics on {metrics.url}", file=sys.stderr, flush=True)
    try:
        collector.run(stop, args.duration, beacon, lambda: [tick() for tick in ticks])
    finally:
        beacon.close()
        publisher.close()
        collector.close()
        if metrics is not None:
            metrics.close()
    loss = ingest.ledger
    print(f"{PROG} collect: {len(ingest.store.ranks)} ranks from {len(loss.senders)} senders, "
          f"{ingest.steps} rank-steps, {loss.frames} frames, {loss.bad_total} bad, {loss.missing} missing, "
          f"{sum(loss.rejected.values())} refused handshakes -> {args.record}")
    print(f"{PROG} collect: {publisher.summary()}")
    if recorder.stops:
        state = recorder.status()
        print(f"{PROG} collect: {state['message'] or 'recording resumed'}; {recorder.stops} write failure(s), "
              f"{recorder.unrecorded} messages received but not recorded (they count as missing on replay)")
    return 0


def _publisher(ingest: Ingest, bound: str, security: dict[str, str | None], recorder: Recorder,
               cluster: Cluster | None, window: int) -> SnapshotPublisher:
    """Snapshots for attached consoles, gathered between drains and built on a thread of their own."""
    from watchtower.publish import SnapshotPublisher
    from watchtower.snapshot import cluster_for, gather_snapshot

    described = cluster_for({}, cluster)

    def gather() -> SnapshotParts:
        return gather_snapshot(ingest, described, source={"kind": "live", "where": bound}, security=security,
                               window_steps=window, recorder=recorder.status(), now_ns=time.time_ns())

    def warn(line: str) -> None:
        print(f"{PROG} collect: warning: {line}", file=sys.stderr, flush=True)

    return SnapshotPublisher(gather, on_error=warn)


def _snapshot_tick(ingest: Ingest, bound: str, security: dict[str, str | None],
                   metrics: MetricsServer, recorder: Recorder) -> Callable[[], None]:
    """For headless `collect`: a snapshot for the metrics every few seconds, built in the collector's loop."""
    from watchtower.metrics import COLLECT_PERIOD_S, Every
    from watchtower.snapshot import build_snapshot

    cluster = Cluster.default()

    def publish() -> None:
        metrics.metrics.update(build_snapshot(ingest, cluster, source={"kind": "live", "where": bound},
                                              security=security, recorder=recorder.status(),
                                              now_ns=time.time_ns()))

    return Every(COLLECT_PERIOD_S, publish)


def _relay(args: argparse.Namespace) -> int:
    from agent.keys import KeyFileError, curve_keys
    from watchtower.relay import Relay

    _, keys = _listen(args.listen, args.insecure, args.keys)
    try:
        parse_endpoint(args.collector, binding=False)
    except EndpointError as exc:
        raise UsageError(str(exc)) from None
    if (args.uplink_key is None) != (args.server_key is None):
        raise UsageError("--uplink-key and --server-key go together")
    try:
        uplink = None if args.uplink_key is None else curve_keys(args.uplink_key, args.server_key)
    except KeyFileError as exc:
        raise UsageError(str(exc)) from None
    try:
        relay = Relay(args.listen, args.collector, keys=keys, uplink_keys=uplink)
    except EndpointError as exc:
        raise UsageError(str(exc)) from None
    stop = threading.Event()
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, lambda *_: stop.set())
    print(f"{PROG} relay: {relay.bound} -> {args.collector}", file=sys.stderr, flush=True)
    try:
        relay.serve(stop, args.duration)
    finally:
        relay.close()
    return 0


def _keys_init(args: argparse.Namespace) -> int:
    from watchtower.keys import AGENTS, init_keys

    public, secret = init_keys(args.dir)
    print(f"head key pair made in {args.dir}:\n"
          f"  public  {public}  (copy to every node: watchtower-agent ... --server-key {public.name})\n"
          f"  secret  {secret}  (stays on this node; keep it private)\n"
          f"allow-list: {args.dir / AGENTS}/ (add agents with: watchtower keys agent NAME --dir {args.dir})\n"
          f"listen with: watchtower collect --keys {args.dir} --listen tcp://*:5555 --record run.wtrace")
    return 0


def _keys_agent(args: argparse.Namespace) -> int:
    from watchtower.keys import HEAD, new_agent

    folder = args.dir or Path(os.environ.get(KEYS_ENV) or DEFAULT_KEYS)
    files = new_agent(args.name, folder)
    print(f"agent {args.name!r}: public key {files.public} is in the allow-list\n"
          f"  secret key: {files.secret}\n"
          f"copy to the node: {files.secret} and {folder / f'{HEAD}.key'}, then start its agents with\n"
          f"  watchtower-agent run --keys {files.secret.name} --server-key {HEAD}.key --collector tcp://HEAD:5555\n"
          f"keep the secret file private (mode 0600) and delete this copy once it is on the node: whoever holds "
          f"it can send figures as this agent")
    return 0


def _merge(args: argparse.Namespace) -> int:
    from watchtower.merge import merge

    result = merge(args.out, args.inputs)
    for line in result.lines():
        print(line)
    return 0


def _report(args: argparse.Namespace) -> int:
    from watchtower.report import run_report

    if args.json and args.format not in (None, "json"):
        raise UsageError(f"--json and --format {args.format} disagree: give one")
    output = "json" if args.json else args.format or "text"
    width = args.width or shutil.get_terminal_size().columns
    return run_report(args.recording, output=output, cluster=_cluster(args.cluster, args), window=args.window,
                      width=max(width, MIN_WIDTH), table=args.table)


def main(argv: Sequence[str] | None = None) -> int:
    try:
        args = build_parser().parse_args(argv)
        return args.run(args)
    except WatchtowerError as exc:
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except SystemExit as exc:  # --help and --version: argparse printed them and wants to exit
        return exc.code if isinstance(exc.code, int) else 0
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())

"""``watchtower-agent``: run the node daemon, or the miniature halo-exchange job to watch.

Usage errors and start-up failures print one line, ``watchtower-agent: error: <reason>``, and exit 2;
a job that fails while running (a neighbour went away) exits 1. Endpoints are checked here, before
ZeroMQ sees them, so a typo reads as a sentence rather than an errno.
"""

from __future__ import annotations

import argparse
import ipaddress
import math
import re
import signal
import socket
import sys
import threading
from collections.abc import Callable, Sequence
from importlib import metadata
from typing import NoReturn

import psutil

from agent import wire
from agent.checkfile import CheckFileError, load_check_file
from agent.checkplan import DEFAULT_BUDGET
from agent.daemon import CheckOptions, DaemonError, default_local_endpoint, run_daemon
from agent.keys import KeyFileError, curve_keys
from agent.workload import MAX_HALO_BYTES, ConnectError, WorkloadConfig, WorkloadError, run_workload

PROG = "watchtower-agent"
DISTRIBUTION = "watchtower-fabric"
USAGE_ERROR = 2
RUN_ERROR = 1
MAX_IPC_PATH = 107  # sun_path holds 108 bytes including the terminating NUL
_HOSTNAME = re.compile(r"^(?=.{1,253}$)[A-Za-z0-9_]([A-Za-z0-9_-]{0,62})(\.[A-Za-z0-9_]([A-Za-z0-9_-]{0,62}))*\.?$")


def version() -> str:
    """The installed distribution's version (the node side cannot import ``watchtower`` to ask it)."""
    try:
        return metadata.version(DISTRIBUTION)
    except metadata.PackageNotFoundError:
        return "(not installed)"


class UsageError(Exception):
    """A bad command line: reported as one line with exit status 2."""


class _Parser(argparse.ArgumentParser):
    """argparse that raises instead of printing usage and exiting, so ``main`` can return a status."""

    def error(self, message: str) -> NoReturn:
        raise UsageError(message)


# ---------------------------------------------------------------------------------------- validation

def _host(text: str) -> str:
    """A host name or an IP address (IPv6 in brackets); returns it without brackets."""
    if text.startswith("[") and text.endswith("]"):
        try:
            return str(ipaddress.IPv6Address(text[1:-1]))
        except ValueError:
            raise ValueError(f"bad IPv6 address {text!r}") from None
    if not _HOSTNAME.match(text):
        raise ValueError(f"bad host {text!r}")
    return text


def _port(text: str) -> int:
    if not text.isdigit() or not 0 < int(text) < 65536:
        raise ValueError(f"bad port {text!r} (expected 1-65535)")
    return int(text)


def host_port(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[v6]:PORT`` for IPv6) -> (host, port)."""
    host, sep, port = text.rpartition(":")
    if not sep or not host:
        raise ValueError(f"{text!r} is not HOST:PORT")
    return _host(host), _port(port)


def endpoint(text: str) -> str:
    """A ZeroMQ endpoint this tool accepts: ``tcp://host:port`` or ``ipc://path``."""
    scheme, sep, rest = text.partition("://")
    if not sep or scheme not in ("tcp", "ipc"):
        raise argparse.ArgumentTypeError(f"{text!r} is not tcp://HOST:PORT or ipc://PATH")
    if scheme == "ipc":
        if not rest or len(rest.encode()) > MAX_IPC_PATH or "\0" in rest:
            raise argparse.ArgumentTypeError(f"{text!r}: ipc path must be 1-{MAX_IPC_PATH} bytes")
        return text
    try:
        host_port(rest)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"{text!r}: {exc}") from None
    return text


def peer_list(text: str) -> tuple[tuple[str, int], ...]:
    try:
        peers = tuple(host_port(item.strip()) for item in text.split(","))
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    if len(set(peers)) != len(peers):
        raise argparse.ArgumentTypeError("the same HOST:PORT is listed twice")
    return peers


def host_port_arg(text: str) -> tuple[str, int]:
    try:
        return host_port(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _share(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0 < value <= 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be a share in (0, 1], e.g. 0.01 for 1 %")
    return value


def _positive(kind: type[int] | type[float], allow_zero: bool = False) -> Callable[[str], int | float]:
    """An argparse type for a finite number above zero (or at least zero)."""
    def parse(text: str) -> int | float:
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
        if not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
            raise argparse.ArgumentTypeError(f"{text!r} must be {'>= 0' if allow_zero else '> 0'}")
        return value
    return parse


def node_name(text: str) -> str:
    """A node name the wire format carries (at most 256 UTF-8 bytes)."""
    try:
        return wire.check_name(text, "node name")
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _bounded(kind: type[int] | type[float], most: float, allow_zero: bool = False) -> Callable[[str], int | float]:
    """``_positive``, and at most ``most``."""
    check = _positive(kind, allow_zero)

    def parse(text: str) -> int | float:
        value = check(text)
        if value > most:
            raise argparse.ArgumentTypeError(f"{text!r} is above the limit of {most:,}")
        return value
    return parse


def _key_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--keys", metavar="AGENT_SECRET_FILE",
                        help="this agent's secret key file (watchtower keys agent): encrypt and authenticate")
    parser.add_argument("--server-key", metavar="HEAD_PUBLIC_FILE",
                        help="the collector's public key file (head.key); goes with --keys")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Node side of Watchtower.")
    parser.add_argument("--version", action="version", version=f"%(prog)s {version()}")
    commands = parser.add_subparsers(dest="command", metavar="{run,workload}")

    run = commands.add_parser("run", help="relay local probes to the collector and report node figures")
    run.add_argument("--collector", required=True, type=endpoint, help="collector endpoint, tcp://HOST:PORT")
    run.add_argument("--node", type=node_name, default=socket.gethostname(), help="node name (default: host name)")
    run.add_argument("--local", type=endpoint, default=None,
                     help=f"endpoint local probes publish to (default: {default_local_endpoint()})")
    run.add_argument("--interval", type=_positive(float), default=1.0,
                     help="seconds between node samples (default %(default)s)")
    run.add_argument("--pair-checks", action="store_true",
                     help="measure this node's links with light checks to the other daemons (for jobs that "
                          "only use collectives); see README, 'Pair checks'")
    run.add_argument("--check-budget", type=_share, default=None,
                     help=f"share of the nominal rate the checks may use (default {DEFAULT_BUDGET:g}, or the "
                          "cluster file's [checks] budget)")
    run.add_argument("--check-nominal", type=_positive(float), default=None, metavar="BYTES_PER_S",
                     help="this node's nominal rate in bytes/s (default: the cluster file, else the NIC's speed)")
    run.add_argument("--check-listen", type=host_port_arg, default=None, metavar="HOST:PORT",
                     help="where the check listener binds (default: the address that reaches the collector, "
                          "any free port)")
    run.add_argument("--cluster", metavar="FILE",
                     help="cluster file: nominal rates, [checks] budget and the listeners of every node")
    _key_options(run)

    job = commands.add_parser("workload", help="run one rank of a ring halo-exchange job to watch")
    job.add_argument("--rank", required=True, type=_positive(int, allow_zero=True),
                     help="this process's rank, 0 to world-1 (its place in --peers)")
    job.add_argument("--peers", required=True, type=peer_list,
                     help="HOST:PORT where each rank listens, in rank order (world = their count)")
    job.add_argument("--collector", required=True, type=endpoint,
                     help="where this rank's probe publishes (collector or node daemon)")
    job.add_argument("--node", type=node_name, default=socket.gethostname(), help="node name (default: host name)")
    job.add_argument("--steps", type=_positive(int, allow_zero=True), default=10,
                     help="training steps to run, then stop (default %(default)s)")
    job.add_argument("--layers", type=_positive(int), default=8,
                     help="layers per step, each computing then exchanging halos; at most 4096 (default %(default)s)")
    job.add_argument("--exchange-bytes", type=_bounded(int, MAX_HALO_BYTES // 2, allow_zero=True), default=65536,
                     help="mean halo size in bytes; layers vary from 1/8 to 2 times it; at most 512 MiB "
                          "(default %(default)s)")
    job.add_argument("--compute-ms", type=_positive(float, allow_zero=True), default=5.0,
                     help="compute time per layer in milliseconds (default %(default)s)")
    job.add_argument("--collective", action="store_true",
                     help="a job that only uses collectives: each step ends with a ring allreduce of "
                          "--exchange-bytes (no halo exchanges)")
    job.add_argument("--seed", type=int, default=0,
                     help="seed of the halo sizes and the weights; give every rank the same (default %(default)s)")
    job.add_argument("--connect-timeout", type=_positive(float), default=30.0,
                     help="seconds to wait for neighbours to come up (default %(default)s)")
    job.add_argument("--spool", metavar="FILE",
                     help="also append every monitoring frame to this local recording (see watchtower merge)")
    _key_options(job)
    return parser


# ---------------------------------------------------------------------------------------- commands

def _keys(args: argparse.Namespace) -> tuple[bytes, bytes, bytes] | None:
    if args.keys is None and args.server_key is None:
        return None
    if args.keys is None or args.server_key is None:
        raise UsageError("--keys and --server-key go together")
    try:
        return curve_keys(args.keys, args.server_key)
    except KeyFileError as exc:
        raise UsageError(str(exc)) from None


def _route_address(collector: str) -> str:
    """The local address this node uses to reach the collector: what other nodes can reach it at too."""
    if not collector.startswith("tcp://"):
        return "127.0.0.1"
    host, port = host_port(collector.removeprefix("tcp://"))
    try:
        family = socket.AF_INET6 if ":" in host else socket.AF_INET
        with socket.socket(family, socket.SOCK_DGRAM) as probe:
            probe.connect((host, port))  # UDP: picks the route, sends nothing
            return probe.getsockname()[0]
    except OSError:
        return "127.0.0.1"


def _nic_speed_Bps(address: str) -> float | None:
    """The link speed the kernel reports for the interface holding ``address`` (None when unknown)."""
    for name, addresses in psutil.net_if_addrs().items():
        if any(a.address == address for a in addresses):
            stats = psutil.net_if_stats().get(name)
            if stats is not None and stats.speed > 0:
                return stats.speed * 1e6 / 8
    return None


def _check_options(args: argparse.Namespace) -> CheckOptions | None:
    if not args.pair_checks:
        if args.check_budget is not None or args.check_nominal is not None or args.check_listen is not None:
            raise UsageError("--check-budget, --check-nominal and --check-listen need --pair-checks")
        return None
    try:
        file = load_check_file(args.cluster, args.node) if args.cluster else None
    except CheckFileError as exc:
        raise UsageError(str(exc)) from None
    address = _route_address(args.collector)
    host, port = args.check_listen or (address, 0)
    nominal = args.check_nominal or (file and file.nominal_Bps) or _nic_speed_Bps(host)
    if nominal is None:
        raise UsageError("--pair-checks needs the node's nominal rate: give --check-nominal BYTES_PER_S or a "
                         "cluster file with [network] nic_Bps")
    budget = args.check_budget or (file and file.budget) or DEFAULT_BUDGET
    endpoints = dict(file.endpoints) if file else {}
    if endpoints and args.node not in endpoints:
        raise UsageError(f"the cluster file's [checks.endpoints] does not list this node ({args.node})")
    if endpoints and args.check_listen is None:  # listen where the file says others will look
        host, port = host_port(endpoints[args.node])
    return CheckOptions(nominal_Bps=nominal, budget=budget, listen_host=host, listen_port=port,
                        advertise_host=host if host not in ("0.0.0.0", "::") else address, endpoints=endpoints)


def _run(args: argparse.Namespace) -> int:
    keys = _keys(args)
    checks = _check_options(args)
    stop = threading.Event()
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, lambda *_: stop.set())
    run_daemon(args.collector, args.node, args.local, args.interval, stop, curve_keys=keys, checks=checks,
               on_refused=lambda why: print(f"{PROG}: warning: the collector refuses this node's uplink: {why}; "
                                            "nothing from this node arrives until that is fixed", file=sys.stderr))
    return 0


def _workload(args: argparse.Namespace) -> int:
    if args.rank >= len(args.peers):
        raise UsageError(f"--rank {args.rank} is outside the {len(args.peers)} ranks listed in --peers")
    if args.layers > 4096:
        raise UsageError("--layers is capped at 4096 (the wire format's limit)")
    config = WorkloadConfig(rank=args.rank, peers=args.peers, collector=args.collector, node=args.node,
                            steps=args.steps, layers=args.layers, exchange_bytes=args.exchange_bytes,
                            compute_ms=args.compute_ms, seed=args.seed, connect_timeout_s=args.connect_timeout,
                            curve_keys=_keys(args), spool=args.spool, collective=args.collective)
    result = run_workload(config)
    print(f"rank {args.rank}: {result.steps} steps, {result.dropped} monitoring frames dropped")
    if result.refused:
        print(f"{PROG}: warning: the collector at {args.collector} refused this agent: {result.refused}; "
              "none of its monitoring frames arrived", file=sys.stderr)
    return 0


def _fail(message: str, status: int) -> int:
    print(f"{PROG}: error: {' '.join(message.split())}", file=sys.stderr)
    return status


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except UsageError as exc:
        return _fail(str(exc), USAGE_ERROR)
    except SystemExit as exc:  # --help, --version: argparse printed it and wants to exit
        return exc.code if isinstance(exc.code, int) else 0
    if args.command is None:  # bare: show what it can do rather than only a usage error
        print(parser.format_help(), end="")
        return USAGE_ERROR
    try:
        return _run(args) if args.command == "run" else _workload(args)
    except (UsageError, DaemonError, ConnectError) as exc:
        return _fail(str(exc), USAGE_ERROR)
    except WorkloadError as exc:
        return _fail(str(exc), RUN_ERROR)
    except MemoryError:
        return _fail("not enough memory for the halos and slabs asked for; try a smaller --exchange-bytes",
                     RUN_ERROR)
    except KeyboardInterrupt:
        return _fail("interrupted", 130)


if __name__ == "__main__":
    sys.exit(main())

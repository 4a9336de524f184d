"""OpenMetrics export: the job's figures from the latest snapshot, for time-series systems to keep.

The snapshot (docs/snapshot.md) is built where it always is (the console's feed, or the ``collect`` loop)
and handed over with ``SnapshotMetrics.update``; a scrape only reads the newest one, so the HTTP thread
never touches the store. Names are ours, prefixed ``watchtower_``, with units in the name (OpenMetrics
conventions: base units, ``_seconds``, ``_bytes_per_second``, ``_ratio``). A figure that is null in the
snapshot is left out of the scrape rather than sent as NaN. Label values (layer, node names) are passed
through as the wire gave them; the exposition format escapes them.
"""

from __future__ import annotations

import ipaddress
import re
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from prometheus_client import CollectorRegistry, start_http_server
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

if TYPE_CHECKING:  # the console package pulls in textual; headless `collect` needs none of it
    from watchtower.console.feed import Deliver, Feed, ReplayControls

PREFIX = "watchtower_"
COLLECT_PERIOD_S = 5.0  # headless `collect` builds a snapshot for scrapes this often (off the receive path)
_HOST_PORT = re.compile(r"^(?:(?P<host>\[[0-9a-fA-F:.]+\]|[^:\[\]\s]+):)?(?P<port>\d{1,5})$")
EFFICIENCIES = ("load_balance", "communication", "parallel", "serialisation", "transfer")
SPEEDUPS = ("achieved", "lost_to_interconnect", "lost_to_imbalance")


class MetricsAddressError(ValueError):
    """A ``--metrics`` value we cannot serve on; the message is one line for the user."""


@dataclass(frozen=True)
class MetricsAddress:
    host: str
    port: int


def parse_address(text: str) -> MetricsAddress:
    """``PORT`` (loopback) or ``HOST:PORT`` with an IP address or localhost; port 0 picks a free one."""
    match = _HOST_PORT.match(text)
    if not match:
        raise MetricsAddressError(f"bad metrics address {text!r}: expected HOST:PORT or PORT")
    port = int(match["port"])
    if port > 65535:
        raise MetricsAddressError(f"bad metrics address {text!r}: port {port} out of range")
    host = (match["host"] or "127.0.0.1").strip("[]")
    if host != "localhost":
        try:
            ipaddress.ip_address(host)
        except ValueError:
            raise MetricsAddressError(f"bad metrics address {text!r}: give an IP address or localhost") from None
    return MetricsAddress(host, port)


class SnapshotMetrics(Collector):
    """A registry collector over the newest snapshot: ``update`` from any thread, scraped from another."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._snapshot: dict[str, Any] | None = None

    def update(self, snapshot: dict[str, Any]) -> None:
        with self._lock:
            self._snapshot = snapshot

    def collect(self) -> Iterator[Metric]:
        with self._lock:
            snapshot = self._snapshot
        if snapshot is not None:
            yield from families(snapshot)


def _gauge(name: str, doc: str, labels: tuple[str, ...] = (), unit: str = "") -> GaugeMetricFamily:
    return GaugeMetricFamily(PREFIX + name, doc, labels=labels, unit=unit)


def _add(family: GaugeMetricFamily | CounterMetricFamily, labels: list[str], value: float | None) -> None:
    if value is not None:
        family.add_metric(labels, float(value))


def families(snapshot: dict[str, Any]) -> Iterator[Metric]:
    """Every exported figure of one snapshot as metric families (see the README for the list)."""
    job = _gauge("job", "1, labelled with the job's name and how the transport is secured", ("job", "security"))
    job.add_metric([str(snapshot.get("job", "")), str(snapshot["security"]["mode"])], 1.0)
    yield job
    for name, doc, value in (("ranks", "ranks heard from", snapshot["ranks"]),
                             ("world", "world size the ranks declare", snapshot["world"]),
                             ("last_step", "newest step index seen", snapshot["last_step"]),
                             ("eta_seconds", "time to finish at the recent pace", snapshot.get("eta_s"))):
        gauge = _gauge(name, doc)
        _add(gauge, [], value)
        yield gauge
    steps = CounterMetricFamily(PREFIX + "steps", "distinct steps seen")
    steps.add_metric([], snapshot["steps"])
    yield steps
    step_time = _gauge("step_seconds", "recent step time (the slowest rank's)", unit="seconds")
    _add(step_time, [], snapshot["step_time"]["recent_s"])
    yield step_time

    efficiency = _gauge("efficiency_ratio", "POP efficiencies over the window (1 is ideal)", ("figure",))
    for figure in EFFICIENCIES:
        _add(efficiency, [figure], snapshot["efficiency"].get(figure))
    yield efficiency
    workers = _gauge("speedup_workers", "speedup over one ideal worker, and the workers' worth lost, by cause",
                     ("kind",))
    for kind in SPEEDUPS:
        _add(workers, [kind], snapshot["speedup"].get(kind))
    yield workers
    at_stake = _gauge("time_at_stake_seconds", "time the slow links will cost over the rest of the run",
                      unit="seconds")
    _add(at_stake, [], None if snapshot.get("hours_at_stake") is None else snapshot["hours_at_stake"] * 3600.0)
    yield at_stake

    comm = _gauge("layer_comm_fraction_ratio", "exposed exchange over exchange plus compute, per layer", ("layer",))
    for layer in snapshot["layers"]:
        _add(comm, [layer["name"]], layer["comm_fraction"])
    yield comm

    pair = ("src", "dst")
    bandwidth = _gauge("link_bandwidth_bytes_per_second", "fitted bandwidth (beta) of a directed node pair", pair)
    throughput = _gauge("link_throughput_bytes_per_second", "what the pair's flows actually got", pair)
    latency = _gauge("link_latency_seconds", "fitted latency (alpha) of a directed node pair", pair)
    slow = _gauge("link_slow", "1 when the link is out of line with its peers or below nominal", pair)
    for link in snapshot["links"]:
        labels = [link["src"], link["dst"]]
        _add(bandwidth, labels, link["bandwidth_Bps"])
        _add(throughput, labels, link["throughput_Bps"])
        _add(latency, labels, link["latency_s"])
        _add(slow, labels, int(bool(link["slow"])))
    yield from (bandwidth, throughput, latency, slow)
    port = ("node", "direction")
    capacity = _gauge("port_capacity_bytes_per_second", "highest bandwidth of the links through a node's port", port)
    port_slow = _gauge("port_slow", "1 when a node's way out or in limits its links", port)
    for entry in snapshot["ports"]:
        labels = [entry["node"], entry["direction"]]
        _add(capacity, labels, entry["capacity_Bps"])
        _add(port_slow, labels, int(bool(entry["slow"])))
    yield from (capacity, port_slow)

    alerts = _gauge("alerts", "open degradation alerts, by kind", ("kind",))
    by_kind: dict[str, int] = {}
    for alert in snapshot["alerts"]:
        if alert.get("step_closed") is None:  # closed alerts (the series came back) are history, not open
            by_kind[alert["kind"]] = by_kind.get(alert["kind"], 0) + 1
    for kind, count in sorted(by_kind.items()):
        alerts.add_metric([kind], count)
    yield alerts
    yield from _loss(snapshot["loss"])


def _loss(loss: dict[str, Any]) -> Iterator[Metric]:
    """Loss accounting. ``missing`` is a gauge: a late frame that fills a gap takes one back off."""
    frames = CounterMetricFamily(PREFIX + "frames_received", "frames accepted from agents")
    frames.add_metric([], loss["frames"])
    missing = _gauge("frames_missing", "sequence gaps: frames that never arrived, wherever lost")
    missing.add_metric([], loss["missing"])
    duplicates = CounterMetricFamily(PREFIX + "frames_duplicate", "frames received twice (not delivered again)")
    duplicates.add_metric([], loss["duplicates"])
    dropped = CounterMetricFamily(PREFIX + "frames_dropped_at_senders", "frames senders could not queue "
                                  "(part of missing)")
    dropped.add_metric([], loss["dropped_at_senders"])
    bad = CounterMetricFamily(PREFIX + "frames_bad", "frames rejected by the decoder, by reason", labels=("reason",))
    for reason, count in loss["bad_reasons"].items():
        bad.add_metric([reason], count)
    refused = CounterMetricFamily(PREFIX + "handshakes_refused", "connections refused at the CURVE handshake",
                                  labels=("reason",))
    for reason, count in loss["rejected_reasons"].items():
        refused.add_metric([reason], count)
    yield from (frames, missing, duplicates, dropped, bad, refused)


class MetricsServer:
    """Serves ``/metrics`` (OpenMetrics when asked for it, else the classic text format) on its own thread."""

    def __init__(self, address: MetricsAddress) -> None:
        self.metrics = SnapshotMetrics()
        registry = CollectorRegistry(auto_describe=False)
        registry.register(self.metrics)
        try:
            self._server, self._thread = start_http_server(address.port, address.host, registry=registry)
        except OSError as exc:
            raise MetricsAddressError(f"cannot serve metrics on {address.host}:{address.port}: "
                                      f"{exc.strerror}") from None
        host, port = self._server.server_address[:2]
        self.url = f"http://{f'[{host}]' if ':' in host else host}:{port}/metrics"

    def close(self) -> None:
        self._server.shutdown()
        self._server.server_close()
        self._thread.join()


class PublishingFeed:
    """A console feed that also hands every snapshot it delivers to the metrics (``watch --metrics``)."""

    def __init__(self, feed: Feed, metrics: SnapshotMetrics) -> None:
        self.feed, self.metrics = feed, metrics
        self.controls: ReplayControls | None = feed.controls

    def start(self, deliver: Deliver) -> None:
        def both(snapshot: dict[str, Any]) -> None:
            self.metrics.update(snapshot)
            deliver(snapshot)

        self.feed.start(both)

    def stop(self) -> None:
        self.feed.stop()


class Every:
    """Calls ``action`` when ``period_s`` has passed since the last call: a tick for the ``collect`` loop."""

    def __init__(self, period_s: float, action: Callable[[], None],
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.period_s, self.action, self.clock = period_s, action, clock
        self._last = -float("inf")

    def __call__(self) -> None:
        now = self.clock()
        if now - self._last >= self.period_s:
            self._last = now
            self.action()

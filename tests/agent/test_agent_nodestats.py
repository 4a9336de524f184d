"""Node sampling: rates from fake counters, and psutil's parsing cross-checked against sysfs."""

from __future__ import annotations

import socket
import threading
from pathlib import Path

import numpy as np
import pytest

from agent import wire
from agent.nodestats import NicCounters, NodeSampler, nic_rates, psutil_counters


def test_rates_are_deltas_over_the_interval() -> None:
    before = {"eth0": NicCounters(1_000, 5_000), "lo": NicCounters(0, 0)}
    after = {"eth0": NicCounters(3_000, 5_500), "lo": NicCounters(800, 800)}
    names, values = nic_rates(before, after, 2.0)
    assert names == ("eth0", "lo")
    assert values.tolist() == [[1_000.0, 400.0], [250.0, 400.0], [3_000.0, 800.0], [5_500.0, 800.0]]
    assert values.shape == (len(wire.NIC_COLUMNS), 2)


def test_new_nic_and_reset_counter_have_no_rate_but_keep_totals() -> None:
    before = {"eth0": NicCounters(9_000, 9_000)}
    after = {"eth0": NicCounters(100, 200), "ib0": NicCounters(50, 60)}  # eth0 was re-created
    names, values = nic_rates(before, after, 1.0)
    assert names == ("eth0", "ib0")
    assert values[:2].tolist() == [[0.0, 0.0], [0.0, 0.0]]
    assert values[2:].tolist() == [[100.0, 50.0], [200.0, 60.0]]


def test_nic_count_and_name_length_respect_the_wire_caps() -> None:
    counters = {f"veth{i:03d}": NicCounters(i, i) for i in range(wire.MAX_NICS + 10)}
    counters["x" * (wire.MAX_NAME_BYTES + 1)] = NicCounters(1, 1)
    names, values = nic_rates(counters, counters, 1.0)
    assert len(names) == wire.MAX_NICS == values.shape[1]
    assert all(len(n) <= wire.MAX_NAME_BYTES for n in names)
    assert names == tuple(sorted(names))


def test_sampler_with_fake_sources_encodes_and_decodes() -> None:
    readings = iter([{"eth0": NicCounters(0, 0)}, {"eth0": NicCounters(4_000, 2_000)},
                     {"eth0": NicCounters(4_000, 2_500)}])
    times = iter([10.0, 10.5, 11.5])
    cpu = iter([0.0, 37.5, 12.0])
    sampler = NodeSampler(counters=lambda: next(readings), cpu_percent=lambda: next(cpu),
                          memory_percent=lambda: 61.25, clock=lambda: next(times))
    first = sampler.sample()
    assert (first.interval_s, first.cpu_percent, first.memory_percent) == (0.5, 37.5, 61.25)
    assert first.nic_values[:2, 0].tolist() == [8_000.0, 4_000.0]
    second = sampler.sample()
    assert second.interval_s == 1.0
    assert second.nic_values[:2, 0].tolist() == [0.0, 500.0]

    frames = wire.encode_node(7, 3, 1, cpu_percent=second.cpu_percent, memory_percent=second.memory_percent,
                              interval_s=second.interval_s, nics=second.nics, nic_values=second.nic_values)
    decoded = wire.decode(frames)
    assert isinstance(decoded, wire.NodeSample)
    assert decoded.nics == ("eth0",)
    np.testing.assert_array_equal(decoded.nic_values, second.nic_values)


def test_zero_interval_is_clamped_so_the_wire_accepts_it() -> None:
    sampler = NodeSampler(counters=lambda: {"lo": NicCounters(1, 1)}, cpu_percent=lambda: 0.0,
                          memory_percent=lambda: 0.0, clock=lambda: 5.0)
    figures = sampler.sample()
    assert figures.interval_s > 0
    frames = wire.encode_node(1, 0, 0, cpu_percent=0.0, memory_percent=0.0, interval_s=figures.interval_s,
                              nics=figures.nics, nic_values=figures.nic_values)
    assert isinstance(wire.decode(frames), wire.NodeSample)


def _sysfs_tx(nic: str) -> int:
    return int(Path(f"/sys/class/net/{nic}/statistics/tx_bytes").read_text())


def _send_over_loopback(nbytes: int) -> None:
    with socket.create_server(("127.0.0.1", 0)) as server:
        received = bytearray()

        def drain() -> None:
            conn, _ = server.accept()
            with conn:
                while chunk := conn.recv(65536):
                    received.extend(chunk)

        reader = threading.Thread(target=drain)
        reader.start()
        with socket.create_connection(server.getsockname()) as client:
            client.sendall(bytes(nbytes))
        reader.join(timeout=10)
        assert len(received) == nbytes


@pytest.mark.skipif(not Path("/sys/class/net/lo/statistics/tx_bytes").exists(), reason="needs Linux sysfs")
def test_psutil_loopback_counter_agrees_with_sysfs() -> None:
    nbytes = 2_000_000
    sampler = NodeSampler()
    sys_before = _sysfs_tx("lo")
    ours_before = psutil_counters()["lo"].bytes_sent
    _send_over_loopback(nbytes)
    ours_after = psutil_counters()["lo"].bytes_sent
    sys_after = _sysfs_tx("lo")
    figures = sampler.sample()
    # Other traffic may share loopback, so the kernel's own counter brackets ours; both saw our bytes.
    assert sys_before <= ours_before <= ours_after <= sys_after
    assert ours_after - ours_before >= nbytes
    lo = figures.nics.index("lo")
    assert figures.nic_values[2, lo] >= ours_after
    assert figures.nic_values[0, lo] * figures.interval_s >= nbytes * 0.999
    assert 0.0 <= figures.cpu_percent <= 100.0 and 0.0 < figures.memory_percent <= 100.0

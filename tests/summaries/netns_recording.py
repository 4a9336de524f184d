"""Rebuild ``data/netns-egress.wtrace``: a ring job over real TCP between network namespaces, one node's way out
shaped by tbf (the set-up of tests/netns/test_netns_egress.py, shorter), recorded by ``watchtower collect``.

    sudo .venv/bin/python tests/summaries/netns_recording.py      # needs root, iproute2 and tc

The summary tests compare both analysis paths on it; it is rebuilt by hand, not by the suite (namespaces
need root, and a fixed file keeps the comparison deterministic).
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path[:0] = [str(HERE.parents[1] / "demo"), str(HERE.parent / "netns")]

from netns_cluster import Job, NetnsCluster  # noqa: E402
from netns_helpers import run_job, tc_rate  # noqa: E402

OUT = HERE / "data" / "netns-egress.wtrace"
FABRIC_BPS, SLOW_BPS, SLOW = 400e6, 40e6, "node1"
JOB = Job(steps=16, layers=4, exchange_bytes=262_144, compute_ms=5.0, seed=3)


def main() -> None:
    cluster = NetnsCluster(f"wtsum{os.getpid()}", 4)
    cluster.up()
    try:
        for node in cluster.nodes:
            cluster.shape(node, tc_rate(FABRIC_BPS))
        cluster.shape(SLOW, tc_rate(SLOW_BPS))
        with tempfile.TemporaryDirectory() as work:
            shutil.copyfile(run_job(cluster, JOB, Path(work)), OUT)
    finally:
        cluster.down()
    print(f"{OUT} ({OUT.stat().st_size} bytes)")


if __name__ == "__main__":
    main()

"""Alerts and the "slow links fixed" prediction against the kernel's truth (tbf token buckets between
network namespaces): a healthy run raises nothing, and the step time predicted with a slowed way out
fixed is the step time the same job measures with nothing slowed.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from netns_cluster import Job, NetnsCluster
from netns_helpers import report, run_job, tc_rate

pytestmark = pytest.mark.netns

FABRIC_BPS = 400e6
SLOW = "node1"
# The "slow links fixed" runs use 50 Mb/s and 12.5 Mb/s, so the token buckets (not the two CPU cores that move
# every byte through the veth pairs) set every link's rate in both runs: at 100 Mb/s the clean run's four ways
# out together (~46 MB/s) left the cores too little room when other processes ran, and its step time grew by
# time no network model explains.
FIXED_FABRIC_BPS = 50e6
# 1000 steps kept short: two layers, 16 KiB halos, 1 ms of compute per layer (a few ms per step).
HEALTHY = Job(steps=1000, layers=2, exchange_bytes=16_384, compute_ms=1.0, seed=5)
# The namespace scenario of the issue: the same job with one node's way out at a quarter of the fabric rate,
# then with nothing slowed.
FIXED_JOB = Job(steps=30, layers=4, exchange_bytes=131_072, compute_ms=1.0, seed=6)


def _shape(cluster: NetnsCluster, slow_bps: float | None, fabric_bps: float = FABRIC_BPS) -> None:
    for node in cluster.nodes:
        cluster.shape(node, tc_rate(fabric_bps))
    if slow_bps is not None:
        cluster.shape(SLOW, tc_rate(slow_bps))


@pytest.mark.xfail(reason="issue 14 open: even with the job's processes ahead of others (nice -10), the whole "
                          "shared 2-core test machine stalls now and then: in 2 of 5 runs the step time rose 18-36 % "
                          "for 8-20 steps with every link slowing at once, which the charts report as closed alerts "
                          "(a real slowdown above the 10 % bar, not the job's doing)", strict=False)
def test_a_healthy_thousand_step_run_raises_no_alert(netns_cluster: NetnsCluster,
                                                      tmp_path_factory: pytest.TempPathFactory) -> None:
    _shape(netns_cluster, None)
    snapshot = report(run_job(netns_cluster, HEALTHY, Path(tmp_path_factory.mktemp("healthy"))))
    assert snapshot["window"]["last_step"] == HEALTHY.steps - 1
    assert snapshot["alerts"] == [], snapshot["alerts"]
    assert snapshot["standing"] == [], snapshot["standing"]


@pytest.fixture(scope="module")
def slowed_and_clean(netns_cluster: NetnsCluster,
                     tmp_path_factory: pytest.TempPathFactory) -> tuple[dict[str, Any], dict[str, Any]]:
    _shape(netns_cluster, FIXED_FABRIC_BPS / 4, FIXED_FABRIC_BPS)
    slowed = report(run_job(netns_cluster, FIXED_JOB, Path(tmp_path_factory.mktemp("quarter"))))
    _shape(netns_cluster, None, FIXED_FABRIC_BPS)
    clean = report(run_job(netns_cluster, FIXED_JOB, Path(tmp_path_factory.mktemp("clean"))))
    return slowed, clean


def test_slow_links_fixed_predicts_the_clean_run(slowed_and_clean: tuple[dict[str, Any], dict[str, Any]]) -> None:
    """The issue's bar: within ±10 % of the step time measured by the same job with nothing slowed.

    Two things once kept the prediction 14-36 % high, both seen by comparing the two runs' link figures:
    the links into the slowed node, whose acknowledgements leave through its choked way out, stayed slow
    in the prediction (now fixed with the port); and the probes' clock offsets, read a whole step late, were
    off by up to half a step, which misaligned the ranks' transfers so that the sharing correction missed
    overlaps and every healthy link's β came out 10-15 % low (now the pong is read at the next region). A
    third was this shared machine: other processes on its two cores slowed the clean run, whose four ways
    out move bytes four times as fast, by time no network model explains (the job now runs ahead of them)."""
    slowed, clean = slowed_and_clean
    assert {(lk["src"], lk["dst"]) for lk in slowed["links"] if lk["slow"]} >= {(SLOW, "node0"), (SLOW, "node2")}
    fixed = next(w for w in slowed["whatif"] if w["slow_fixed"])
    measured_clean = clean["window"]["step_s"]
    assert slowed["window"]["step_s"] > 1.3 * measured_clean  # the quarter-rate way out did cost time
    assert fixed["step_s"] == pytest.approx(measured_clean, rel=0.10), (fixed, measured_clean,
                                                                        slowed["window"]["step_s"])

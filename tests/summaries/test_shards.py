"""Past one head node: a recording split by rank into disjoint sets (rack shards, each holding the frames of
its own ranks, transfers recorded by their receiver) folds per shard, merges per step, and gives the figures
of one fold over all ranks.

Exact: every figure built from sums (layers, worst ranks, efficiencies, speedup, stragglers, link traffic,
the plain least-squares line) and the raw-time sketches (bucket for bucket). Not merged exactly, and so not
compared here: the sharing-corrected link fit, because a node's way out also carries flows that another
shard's ranks receive (docs/snapshot.md, "Past one head node").
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from tests.summaries.conftest import Folded, Recorded
from watchtower.analysis import Collectives, Transfers, Window
from watchtower.analysis.summaries import LinkSums, StepSummary, fold, merge_ranks
from watchtower.analysis.summary_window import Figures, SummaryWindow


def shard(window: Window, keep_node: np.ndarray) -> Window:
    """The part of ``window`` a collector for the ranks on ``keep_node`` nodes would hold."""
    rows = np.flatnonzero(keep_node[window.rank_node])
    ranks = set(window.ranks[rows].tolist())
    tr, col = window.transfers, window.collectives
    mine = np.array([d in ranks for d in tr.dst.tolist()], bool)
    coll = np.array([r in ranks for r in col.rank.tolist()], bool)
    return replace(window, ranks=window.ranks[rows], rank_node=window.rank_node[rows],
                   compute_s=window.compute_s[:, rows], exchange_s=window.exchange_s[:, rows],
                   step_s=window.step_s[:, rows],
                   transfers=Transfers(*(getattr(tr, f)[mine] for f in Transfers.__dataclass_fields__)),
                   collectives=Collectives(*(getattr(col, f)[coll] for f in Collectives.__dataclass_fields__)))


def figures(summaries: list[StepSummary], rec: Recorded) -> tuple[Figures, LinkSums]:
    """The window's figures and its link sums."""
    window = SummaryWindow(len(summaries))
    for s in summaries:
        window.push(s)
    return window.figures(rec.cluster), window.link_sums()


@pytest.fixture(scope="module")
def split(recorded: Recorded, folded: Folded) -> tuple[list[StepSummary], list[StepSummary],
                                                       tuple[Figures, LinkSums], tuple[Figures, LinkSums]]:
    window = recorded.window
    one = folded.own
    n_nodes = len(window.nodes)
    groups = [np.arange(n_nodes) < n_nodes // 2, np.arange(n_nodes) >= n_nodes // 2]  # two racks
    peers = (window.ranks, window.rank_node)  # where each sender sits: the cluster's map, known to every shard
    shards = [fold(shard(window, g), recorded.cluster, peers=peers) for g in groups]
    merged = [merge_ranks(parts) for parts in zip(*shards, strict=True)]
    return one, merged, figures(one, recorded), figures(merged, recorded)


def test_the_shards_split_the_ranks_and_keep_the_steps(recorded: Recorded, split) -> None:
    one, merged, _, _ = split
    low = shard(recorded.window, np.arange(len(recorded.window.nodes)) < len(recorded.window.nodes) // 2)
    assert 0 < len(low.ranks) < len(recorded.window.ranks)
    assert 0 < len(low.transfers) < len(recorded.window.transfers)
    assert [s.step for s in merged] == [s.step for s in one]
    np.testing.assert_array_equal(merged[-1].ranks, recorded.window.ranks)


def test_merged_rank_figures_equal_one_fold(split) -> None:
    _, _, (whole, _), (merged, _) = split
    for name in ("compute_s", "exchange_s", "comm_fraction", "comm_fraction_worst", "worst_rank", "comm_bound"):
        np.testing.assert_array_equal(getattr(merged.layers, name), getattr(whole.layers, name), err_msg=name)
    for name in ("rank", "compute_s", "exchange_s", "comm_fraction", "waits_on"):
        np.testing.assert_array_equal(getattr(merged.worst, name), getattr(whole.worst, name), err_msg=name)
    assert merged.efficiency.load_balance == whole.efficiency.load_balance
    assert merged.efficiency.communication == whole.efficiency.communication
    assert merged.efficiency.serialisation == whole.efficiency.serialisation
    np.testing.assert_array_equal(merged.efficiency.useful_s, whole.efficiency.useful_s)
    assert merged.speedup == whole.speedup
    assert merged.stragglers == whole.stragglers
    assert merged.step_s == whole.step_s


def test_merged_link_traffic_equals_one_fold(split) -> None:
    _, _, (whole, a), (merged, b) = split
    np.testing.assert_array_equal(a.link, b.link)
    for name in ("bytes", "transfers", "fit_count", "waits_known", "t_min_s", "t_max_s", "fastest_Bps",
                 "worst_receiver_s"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    np.testing.assert_allclose(b.busy_s, a.busy_s, rtol=1e-12)
    np.testing.assert_allclose(b.hockney, a.hockney, rtol=1e-12)
    np.testing.assert_allclose(b.plain_fit(), a.plain_fit(), rtol=1e-9)
    assert [(lk.src_name, lk.dst_name, lk.bytes, lk.transfers) for lk in merged.links] == \
        [(lk.src_name, lk.dst_name, lk.bytes, lk.transfers) for lk in whole.links]


def test_merged_raw_sketches_are_identical_and_give_the_same_latency_reference(split) -> None:
    one, merged, (whole, _), (merged_figures, _) = split
    for a, b in zip(one, merged, strict=True):
        np.testing.assert_array_equal(a.raw_s.key, b.raw_s.key)
        np.testing.assert_array_equal(a.raw_s.count, b.raw_s.count)
        np.testing.assert_array_equal(a.bin_bytes.key, b.bin_bytes.key)
        np.testing.assert_allclose(a.bin_bytes.value, b.bin_bytes.value, rtol=1e-12)
    np.testing.assert_allclose(merged_figures.reference.alpha_s, whole.reference.alpha_s, rtol=1e-9, atol=1e-15)


def test_merged_step_model_parts_equal_one_fold(split) -> None:
    """Collective calls add and their callers unite; halo groups unite (the model takes their max); the halo
    split by node pair adds up (a sender's rows come from the shards of its receivers)."""
    _, _, (whole, _), (merged, _) = split
    a, b = whole.model, merged.model
    assert len(a.row_pair) > 0
    for name in ("coll_op", "coll_group", "coll_nbytes", "coll_per_step", "halo_cell", "halo_msgs", "halo_bytes",
                 "group_cell", "row_group", "row_pair", "row_msgs", "row_bytes"):
        np.testing.assert_array_equal(getattr(b, name), getattr(a, name), err_msg=name)
    assert (a.workers, a.n_steps, a.work_s, a.path_s, a.measured_s) == (b.workers, b.n_steps, b.work_s, b.path_s,
                                                                         b.measured_s)

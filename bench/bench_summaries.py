"""One snapshot's figures from per-step summaries against the full analysis of the raw window, side by side.

    python bench/bench_summaries.py                 # 4096 ranks × 256 layers × 120 steps (bench_analysis' window)
    python bench/bench_summaries.py --steps 30      # smaller, for a quick look

The window is bench_analysis.py's (float32 cubes, two neighbours' transfers per rank and step, overlapping at
the ports, one allreduce per rank and step). Prints the cost of folding one step (once per step, in the
collector) and of building the window's figures from the summaries (every snapshot) next to ``analyse`` on
the raw window, and their ratio. Target: the figures from summaries in ≤ 50 ms.
"""

from __future__ import annotations

import argparse
import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import time

from bench_analysis import best_of, make_window

from watchtower.analysis import analyse
from watchtower.analysis.summaries import fold
from watchtower.analysis.summary_window import SummaryWindow
from watchtower.cluster import Cluster

TARGET_S = 0.050


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--ranks", type=int, default=4096)
    parser.add_argument("--layers", type=int, default=256)
    parser.add_argument("--steps", type=int, default=120)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()

    window = make_window(args.ranks, args.layers, args.steps, "float32")
    cluster = Cluster(total_steps=10 * args.steps, nic_Bps=12.5e9)
    t0 = time.perf_counter()
    first = SummaryWindow(args.steps)
    for summary in fold(window, cluster):
        first.push(summary)
    reference = first.figures(cluster).reference
    t1 = time.perf_counter()
    summaries = SummaryWindow(args.steps)
    for summary in fold(window, cluster, reference):  # as collect folds: against the newest snapshot's reference
        summaries.push(summary)
    t2 = time.perf_counter()
    fold_own, fold_ref = (t1 - t0) / args.steps, (t2 - t1) / args.steps
    from_summaries = best_of(lambda: summaries.figures(cluster), args.repeat)
    figures = summaries.figures(cluster)
    full = best_of(lambda: analyse(window, None, cluster), max(1, args.repeat - 1))

    print(f"window: {args.ranks} ranks × {args.layers} layers × {args.steps} steps, {len(window.transfers)} transfers, "
          f"{len(figures.links)} links, {len(figures.fit_steps)} steps in the link fit, "
          f"{len(figures.stale_steps)} stale")
    print(f"fold one step (own reference / window's):  {fold_own * 1e3:.1f} / {fold_ref * 1e3:.1f} ms per step")
    print(f"figures from summaries:                    {from_summaries * 1e3:.1f} ms "
          f"({'meets' if from_summaries <= TARGET_S else 'misses'} the {TARGET_S * 1e3:.0f} ms target)")
    print(f"full analysis of the raw window (analyse): {full * 1e3:.1f} ms")
    print(f"ratio full / summaries:                    {full / from_summaries:.1f}×")


if __name__ == "__main__":
    main()

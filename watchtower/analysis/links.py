"""Per directed node pair: traffic, the Hockney fit, throughput against nominal, slow-link verdicts and hours at stake.

Transfers between two ranks of the same node never touch the network (shared memory or the node's own
fabric), so they are kept apart as *local* links: fitted and reported, but neither judged slow against
network links nor counted in hours at stake.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from watchtower.analysis.checks import Checks, fit_checks
from watchtower.analysis.efficiency import FAR_BELOW_PEERS, OUTLIER_Z, RELATIVE_JITTER
from watchtower.analysis.robust import HockneyFit, fit_hockney, modified_z
from watchtower.analysis.sharing import bottleneck_share
from watchtower.analysis.window import RunSeries, Window
from watchtower.cluster import Cluster

SLOW_FRACTION = 0.5  # common practice, no source: a link under half its nominal rate is broken, not busy
WAITS_UNKNOWN_QUANTILE = 0.25  # per-size-bin time quantile when waiting could not be split off; no source
WAITS_KNOWN_QUANTILE = 0.5  # the same when the probe knew when the peer was ready; no source
# Link models and their sharing correction are fitted on the newest whole steps holding at most this many
# transfers: plenty for a fit, and it keeps the analysis of a 4096-rank window under a second. No source.
MAX_FIT_TRANSFERS = 200_000


@dataclass(frozen=True)
class LinkStats:
    """One directed node pair over the window.

    ``bandwidth_Bps``/``latency_s`` are the Hockney β/α (α NaN when one message size gave no slope), β
    being the rate a transfer gets with the path to itself (see ``link_stats``); ``throughput_Bps`` = bytes
    / busy time (transfer time, known waits excluded), what the link's flows actually got, shares and all;
    ``of_nominal`` = throughput / nominal rate: how much of the rate on paper the flows got while moving.
    ``latency_clamped`` marks an α whose fitted intercept was negative and is shown as 0. ``score`` is the
    modified z-score of log β within the link's class.
    ``hours_at_stake`` is the time the rest of the run would save if this slow link ran at its class's
    median β (0 for links not judged slow; None without a configured total of steps). ``port`` names the
    slow port that limits a slow link and ``unexplained`` marks a slow link no port explains (both set by
    ``ports.port_stats``).
    """

    src: int  # node index
    dst: int
    src_name: str
    dst_name: str
    link_class: str
    local: bool
    bytes: int
    transfers: int
    busy_s: float
    latency_s: float
    bandwidth_Bps: float
    throughput_Bps: float
    nominal_Bps: float | None
    of_nominal: float | None
    score: float
    slow: bool
    reason: str  # "" | "outlier" | "below-nominal" | "outlier, below-nominal"
    saving_per_step_s: float
    hours_at_stake: float | None
    latency_clamped: bool = False
    port: str | None = None  # "<node> out" | "<node> in"
    unexplained: bool = False
    measured_by: str = "job"  # "job": the job's own transfers; "check": the node daemons' pair checks
    check_every_s: float | None = None  # for checked links, the period within which every pair is checked


def link_stats(window: Window, cluster: Cluster, remaining_steps: int | None, *,
               slow_fraction: float = SLOW_FRACTION, threshold: float = -OUTLIER_Z,
               checks: Checks | None = None) -> tuple[LinkStats, ...]:
    """All directed node pairs that carried traffic in the window, network links first, then local ones.

    β is fitted on each transfer's time with its byte-moving part (the time less the raw fit's α) scaled
    by the transfer's share of its bottleneck port (``sharing.bottleneck_share``): two equal flows out of
    one port each took twice as long as the port needs for their bytes, so the fit sees the port's rate,
    not half of it. Latency is not shared, so α is left alone. Transfers between ranks of one node share
    no network port and are not corrected.

    Network pairs the job's own transfers do not cover (all of them, for a job that only uses
    collectives) come from the node daemons' pair ``checks`` when given (``measured_by`` "check"): they
    are judged together with the job's links, by the same rules; they put no hours at stake (what the
    job loses on a link it never addresses directly is not measured).
    """
    n_nodes, names = len(window.nodes), window.nodes
    tr = window.transfers
    job = len(tr) > 0 and len(window.ranks) > 0
    if job:
        paired = _pair_transfers(window, cluster)
        link, pairs, n_job = paired.link, paired.pairs, len(paired.pairs)
        fitted = paired.fitted
        fit_link, fit_bytes, fit_unshared = link[fitted], paired.nbytes[fitted], paired.unshared[fitted]
        fit = fit_hockney(fit_link, fit_bytes, fit_unshared, n_job, quantile=WAITS_UNKNOWN_QUANTILE)
        # Where the probe split waiting off (the peer's readiness was known), what is left is two-sided noise
        # and the odd late receiver: the bins' medians fit it without the low quartile's optimism. Where waits
        # are unknown, waiting dominates the upper part of each bin and the low quartile is the safer choice.
        known_waits = np.isfinite(tr.wait_s[paired.known][fitted])
        waits_known = np.bincount(fit_link, weights=known_waits, minlength=n_job) >= \
            0.5 * np.bincount(fit_link, minlength=n_job)
        if waits_known.any():
            fit = fit.where(waits_known, fit_hockney(fit_link, fit_bytes, fit_unshared, n_job,
                                                     quantile=WAITS_KNOWN_QUANTILE))
        secs, nbytes = paired.seconds, paired.nbytes
        alpha, beta, sizes, clamped = fit.alpha_s, fit.beta_Bps, fit.sizes, fit.clamped
        total_bytes = np.bincount(link, weights=nbytes, minlength=n_job)
        busy = np.bincount(link, weights=np.where(secs > 0, secs, 0.0), minlength=n_job)
        count = np.bincount(link, minlength=n_job)
    else:
        pairs, n_job = np.empty(0, np.int64), 0
        alpha = beta = total_bytes = busy = np.empty(0)
        sizes = count = np.empty(0, np.int64)
        clamped = np.empty(0, bool)
    period = None
    if checks is not None and len(checks):
        fits = fit_checks(checks, n_nodes)
        new = ~np.isin(fits.pairs, pairs)
        pairs = np.concatenate([pairs, fits.pairs[new]])
        alpha = np.concatenate([alpha, fits.fit.alpha_s[new]])
        beta = np.concatenate([beta, fits.fit.beta_Bps[new]])
        sizes = np.concatenate([sizes, fits.fit.sizes[new]])
        clamped = np.concatenate([clamped, fits.fit.clamped[new]])
        total_bytes = np.concatenate([total_bytes, fits.bytes[new]])
        busy = np.concatenate([busy, fits.busy_s[new]])
        count = np.concatenate([count, fits.count[new]])
        period = checks.period_s if np.isfinite(checks.period_s) else None
    if len(pairs) == 0:
        return ()

    def saving_per_step(shrink: np.ndarray) -> np.ndarray:
        saving = np.zeros(len(pairs))  # checks are not the job's time: no saving
        if job:
            saving[:n_job] = _saving_per_step(link, paired.step_index, paired.dst_index, secs, shrink[:n_job],
                                              len(window.steps), len(window.ranks))
        return saving

    return judge_links(pairs, names, cluster, HockneyFit(alpha, beta, sizes, clamped), total_bytes, busy, count,
                       remaining_steps, saving_per_step, n_job=n_job, check_every_s=period,
                       slow_fraction=slow_fraction, threshold=threshold)


def judge_links(pairs: np.ndarray, names: tuple[str, ...], cluster: Cluster, fit: HockneyFit,
                total_bytes: np.ndarray, busy: np.ndarray, count: np.ndarray, remaining_steps: int | None,
                saving_per_step: Callable[[np.ndarray], np.ndarray], *, n_job: int | None = None,
                check_every_s: float | None = None, slow_fraction: float = SLOW_FRACTION,
                threshold: float = -OUTLIER_Z) -> tuple[LinkStats, ...]:
    """Each link's figures and verdicts from its fit and sums (from a window's transfers, or from per-step
    summaries): network links first. The first ``n_job`` links (all, when None) are the job's, the rest pair
    checks' (every ``check_every_s``). ``saving_per_step`` maps each link's shrink (the share of its transfer
    time the class's median β would save) to the mean time per step that saves."""
    n_nodes, n_links = len(names), len(pairs)
    alpha, beta, sizes, clamped = fit.alpha_s, fit.beta_Bps, fit.sizes, fit.clamped
    period = check_every_s
    by_check = np.arange(n_links) >= (n_links if n_job is None else n_job)
    src, dst = pairs // n_nodes, pairs % n_nodes
    local = src == dst
    classes = [cluster.link_class(names[s], names[d]) for s, d in zip(src, dst, strict=True)]
    nominal = [None if lo else cluster.link_nominal_Bps(names[s], names[d])
               for s, d, lo in zip(src, dst, local, strict=True)]

    score = np.full(n_links, np.nan)
    median_beta = np.full(n_links, np.nan)
    for cls in set(classes):
        members = np.flatnonzero((np.array(classes) == cls) & ~local)
        if len(members) == 0:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            score[members] = modified_z(np.log(beta[members]), min_scale=RELATIVE_JITTER)
        median_beta[members] = np.nanmedian(beta[members]) if np.isfinite(beta[members]).any() else np.nan
    class_of = np.unique(classes, return_inverse=True)[1]
    class_size = np.bincount(class_of, weights=~local)[class_of]
    with np.errstate(invalid="ignore"):
        far_below = (beta < FAR_BELOW_PEERS * median_beta) & (class_size >= 3)
    outlier = (np.nan_to_num(score, nan=0.0) < threshold) | far_below
    # Only a true two-point fit gives an asymptotic β comparable with a NIC rate; the effective rate of one
    # small message size is mostly latency and would always look "below nominal".
    nominal_arr = np.array([np.nan if v is None else v for v in nominal], dtype=np.float64)
    below = (sizes >= 2) & (beta < slow_fraction * nominal_arr)

    # Every network link's possible saving: a link found slow later (through the port that limits it) needs
    # it too; only slow links' hours are added up as at stake. Checks are not the job's time: no saving.
    shrink = _shrink(beta, median_beta, local)
    saving = saving_per_step(shrink)
    with np.errstate(invalid="ignore", divide="ignore"):
        throughput = np.where(busy > 0, total_bytes / busy, np.nan)
    out = []
    for i in np.argsort(local, kind="stable"):
        nom = nominal[i]
        reason = ", ".join(r for r, hit in (("outlier", outlier[i]), ("below-nominal", below[i])) if hit)
        checked = bool(by_check[i])
        out.append(LinkStats(
            src=int(src[i]), dst=int(dst[i]), src_name=names[src[i]], dst_name=names[dst[i]],
            link_class=classes[i], local=bool(local[i]), bytes=int(total_bytes[i]), transfers=int(count[i]),
            busy_s=float(busy[i]), latency_s=float(alpha[i]), bandwidth_Bps=float(beta[i]),
            throughput_Bps=float(throughput[i]), nominal_Bps=nom,
            of_nominal=None if nom is None or checked or not np.isfinite(throughput[i])
            else float(throughput[i] / nom),
            score=float(score[i]), slow=bool(reason), reason=reason, saving_per_step_s=float(saving[i]),
            hours_at_stake=None if remaining_steps is None or checked
            else remaining_steps * float(saving[i]) / 3600.0,
            latency_clamped=bool(clamped[i]),
            measured_by="check" if checked else "job", check_every_s=period if checked else None,
        ))
    return tuple(out)


@dataclass(frozen=True)
class _Paired:
    """The window's transfers between known ranks, each with its directed node pair and unshared time."""

    known: np.ndarray  # bool over window.transfers
    dst_index: np.ndarray  # receiving rank's row in the window
    step_index: np.ndarray  # step's row in the window
    link: np.ndarray  # index into pairs
    pairs: np.ndarray  # src node * n_nodes + dst node
    nbytes: np.ndarray
    seconds: np.ndarray  # transfer time as measured
    unshared: np.ndarray  # the same as if it had had its bottleneck port to itself (NaN outside ``fitted``)
    fitted: np.ndarray  # bool: the transfers the link models are fitted on (see MAX_FIT_TRANSFERS)


def _pair_transfers(window: Window, cluster: Cluster) -> _Paired:
    tr = window.transfers
    si, src_ok = window.rank_index(tr.src)
    di, dst_ok = window.rank_index(tr.dst)
    step_idx, step_ok = window.step_index(tr.step)
    known = src_ok & dst_ok & step_ok
    si, di, step_idx = si[known], di[known], step_idx[known]
    n_nodes = len(window.nodes)
    rank_node = np.asarray(window.rank_node, np.int64)
    pairs, link = np.unique(rank_node[si] * n_nodes + rank_node[di], return_inverse=True)
    secs = tr.transfer_s[known]
    nbytes = np.asarray(tr.nbytes[known], np.float64)
    node_nominal = np.array([np.nan if (v := cluster.nominal_Bps(name)) is None else v for name in window.nodes],
                            np.float64)
    fitted = _newest_steps(step_idx, MAX_FIT_TRANSFERS)
    in_window = known.copy()
    in_window[known] = fitted
    unshared = np.full(len(secs), np.nan)
    unshared[fitted] = _unshared(window, in_window, link[fitted], pairs, nbytes[fitted], secs[fitted], node_nominal)
    return _Paired(known, di, step_idx, link, pairs, nbytes, secs, unshared, fitted)


def _newest_steps(step_idx: np.ndarray, limit: int) -> np.ndarray:
    """Which transfers belong to the newest whole steps holding at most ``limit`` of them (one step at least):
    whole steps, so that the flows sharing a port at any moment are all there."""
    if len(step_idx) <= limit:
        return np.ones(len(step_idx), bool)
    from_newest = np.cumsum(np.bincount(step_idx)[::-1])
    steps = max(1, int(np.searchsorted(from_newest, limit, side="right")))
    return step_idx >= len(from_newest) - steps


def link_rate_series(window: Window, cluster: Cluster) -> RunSeries:
    """Per step and directed network pair, the median of its transfers' rates with the port to themselves.

    What degradation alerts watch: a pair's raw throughput also falls when its transfers come to share a
    port with others more often (a neighbour slowed down and now everyone sends at once), which is no fault
    of the path; the rate with the sharing taken out (as for β) falls only when the path got slower."""
    tr = window.transfers
    n_nodes, n_steps = len(window.nodes), len(window.steps)
    step_s = np.max(np.nan_to_num(window.step_s, nan=0.0), axis=1, initial=0.0)  # the slowest rank's step
    empty = RunSeries(np.asarray(window.steps), step_s, (), np.zeros((n_steps, 0)), np.zeros((n_steps, 0)))
    if len(tr) == 0 or len(window.ranks) == 0:
        return empty
    paired = _pair_transfers(window, cluster)
    network = (paired.pairs // n_nodes != paired.pairs % n_nodes)[paired.link] & (paired.unshared > 0)
    if not network.any():
        return empty
    columns, column = np.unique(paired.link[network], return_inverse=True)
    rate = paired.nbytes[network] / paired.unshared[network]
    cell = paired.step_index[network] * len(columns) + column
    order = np.lexsort((rate, cell))
    cell, rate = cell[order], rate[order]
    starts = np.flatnonzero(np.r_[True, cell[1:] != cell[:-1]])
    ends = np.r_[starts[1:], len(cell)]
    medians = (rate[(starts + ends - 1) // 2] + rate[(starts + ends) // 2]) / 2.0
    grid = np.full(n_steps * len(columns), np.nan)
    grid[cell[starts]] = medians
    grid = grid.reshape(n_steps, len(columns))
    sums = np.zeros((n_steps * len(columns), 2))
    np.add.at(sums, cell, np.column_stack([paired.nbytes[network][order], paired.seconds[network][order]]))
    pairs = tuple((int(p // n_nodes), int(p % n_nodes)) for p in paired.pairs[columns])
    return RunSeries(np.asarray(window.steps), step_s, pairs, sums[:, 0].reshape(n_steps, -1),
                     sums[:, 1].reshape(n_steps, -1), link_watch_Bps=grid)


def _unshared(window: Window, known: np.ndarray, link: np.ndarray, pairs: np.ndarray, nbytes: np.ndarray,
              secs: np.ndarray, node_nominal: np.ndarray) -> np.ndarray:
    """Transfer times as if each network transfer had had its bottleneck port to itself."""
    n_nodes, n_links = len(window.nodes), len(pairs)
    src, dst = pairs[link] // n_nodes, pairs[link] % n_nodes
    lo = (window.transfers.start_s + np.nan_to_num(window.transfers.wait_s, nan=0.0))[known]
    moving = moving_transfers(src, dst, lo, nbytes, secs)
    if not moving.any():
        return secs
    share = bottleneck_share(src[moving], dst[moving], lo[moving], lo[moving] + secs[moving], nbytes[moving],
                             node_nominal)
    alpha = np.nan_to_num(fit_hockney(link, nbytes, secs, n_links).alpha_s, nan=0.0)
    return unshare(secs, moving, alpha[link[moving]], share)


def moving_transfers(src: np.ndarray, dst: np.ndarray, lo: np.ndarray, nbytes: np.ndarray,
                     secs: np.ndarray) -> np.ndarray:
    """The transfers the sharing correction applies to: over the network, moving bytes, with known times."""
    return (src != dst) & (secs > 0) & (nbytes > 0) & np.isfinite(secs) & np.isfinite(lo)


def unshare(secs: np.ndarray, moving: np.ndarray, alpha: np.ndarray, share: np.ndarray) -> np.ndarray:
    """The ``moving`` transfers' times with the byte-moving part (time − α) scaled by their share."""
    out = secs.copy()
    out[moving] = np.minimum(alpha, secs[moving]) + share * np.maximum(secs[moving] - alpha, 0.0)
    return out


def _shrink(beta: np.ndarray, median_beta: np.ndarray, local: np.ndarray) -> np.ndarray:
    """Share of each network link's transfer time that running at its class's median β would save."""
    with np.errstate(invalid="ignore", divide="ignore"):
        shrink = np.where(~local & (beta < median_beta), 1.0 - beta / median_beta, 0.0)
    return np.nan_to_num(shrink, nan=0.0)


def _saving_per_step(link: np.ndarray, step_idx: np.ndarray, dst_idx: np.ndarray, secs: np.ndarray,
                     shrink: np.ndarray, n_steps: int, n_ranks: int) -> np.ndarray:
    """Mean time per step saved if each link's transfers shrank by ``shrink`` (0 for links already fast).

    Model: in each step, the rank that spent longest receiving over the link is taken to be on the
    critical path, and its transfer time on the link shrinks by β / β_median. It is an upper estimate: it
    assumes that rank's exchange is not hidden behind another rank's longer one.
    """
    n_links = len(shrink)
    sel = shrink[link] > 0
    if not sel.any() or n_steps == 0:
        return np.zeros(n_links)
    links_hit, dense = np.unique(link[sel], return_inverse=True)
    # One int64 key per (link, step, receiving rank); sorted, so each (link, step) is a contiguous run.
    key, inv = np.unique((dense * n_steps + step_idx[sel]) * n_ranks + dst_idx[sel], return_inverse=True)
    per_rank = np.bincount(inv, weights=np.maximum(secs[sel], 0.0), minlength=len(key))
    link_step = key // n_ranks
    starts = np.flatnonzero(np.r_[True, link_step[1:] != link_step[:-1]])
    worst = np.maximum.reduceat(per_rank, starts)
    saved = np.zeros(n_links)
    saved[links_hit] = np.bincount(link_step[starts] // n_steps, weights=worst, minlength=len(links_hit))
    return saved * shrink / n_steps

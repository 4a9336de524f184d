"""Degradation alerts: one-sided tabular CUSUM (Page, 1954; Montgomery, Introduction to Statistical
Quality Control, tabular CUSUM) on per-link throughput (drops) and on step time (rises)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from watchtower.analysis.window import RunSeries

K_SIGMA = 0.5  # Montgomery: k = 0.5σ detects a 1σ shift quickly
H_SIGMA = 5.0  # Montgomery: h = 5σ with k = 0.5σ is the usual design
WARMUP = 40  # steps that set μ0 and σ; common practice, no source
BLOCK = 4  # steps per block median fed to the CUSUM; common practice, no source
CLIP_SIGMA = 2.5  # largest deviation one block may add, in σ; common practice, no source
MIN_CHANGE = 0.05  # smallest lasting step-time change worth an alert (5 %); common practice, no source
# A link's per-step rate also moves when the flows sharing its ports shift in time (the correction for
# sharing is approximate), not only when the link degrades: only a fall by 40 % or more is worth an
# operator's look. Common practice, no source.
MIN_LINK_CHANGE = 0.4
# Flows that share a port make a link's per-step rate bimodal (alone / halved), and a short warm-up then
# puts σ near half of μ0, too wide to see even a link that lost 90 %: σ is capped at a quarter of μ0 for
# links, so a lasting fall of 60 % or more always alarms within four blocks. Common practice, no source.
MAX_LINK_SIGMA = 0.25
MIN_REL_SIGMA = 0.01  # σ floor as a fraction of |μ0|: a flat warm-up (replay, synthetic) must not alarm on jitter

Side = Literal["upper", "lower"]


@dataclass(frozen=True)
class Cusum:
    """A one-sided tabular CUSUM over a series (NaN points are skipped: the sum carries over).

    ``alarm`` is the index of the first point where the sum exceeded H (−1: none); ``began`` the last
    index at or before it where the sum was zero (the process was last in control there and the change
    started after it; −1 means it never returned to zero since the start).
    """

    sums: np.ndarray
    alarm: int
    began: int


def tabular_cusum(x: np.ndarray, mu0: float, sigma: float, *, side: Side = "upper", k: float = K_SIGMA,
                  h: float = H_SIGMA) -> Cusum:
    """C⁺_i = max(0, x_i − (μ0 + kσ) + C⁺_{i−1}) (upper) or C⁻_i = max(0, (μ0 − kσ) − x_i + C⁻_{i−1}) (lower).

    The recursion is sequential by nature; it runs over at most one value per step and series, so a
    plain loop is cheap next to everything else.
    """
    x = np.asarray(x, dtype=np.float64)
    dev = x - (mu0 + k * sigma) if side == "upper" else (mu0 - k * sigma) - x
    limit = h * sigma
    sums = np.zeros(len(x))
    c, last_zero, alarm, began = 0.0, -1, -1, -1
    for i, d in enumerate(dev.tolist()):
        if d == d:  # not NaN
            c = max(0.0, c + d)
        sums[i] = c
        if c == 0.0:
            last_zero = i
        elif alarm < 0 and c > limit:
            alarm = i
            began = last_zero
    return Cusum(sums, alarm, began)


@dataclass(frozen=True)
class Alert:
    """A degradation alarm: what (``kind``), on what (``subject``), when it began and when it was seen.

    ``baseline`` is the warm-up median μ0, ``recent`` the median level of the blocks that raised the alarm.
    ``port`` is the node port likely behind a link's drop ("<node> out" | "<node> in"), named afterwards
    by ``ports.name_alert_ports``.
    """

    kind: str  # "link-throughput" | "step-time"
    subject: str
    step_began: int
    step_detected: int
    baseline: float
    recent: float
    message: str
    port: str | None = None


def warmup_reference(x: np.ndarray, warmup: int = WARMUP) -> tuple[float, float, int] | None:
    """μ0 and σ from the first ``warmup`` finite points, and the index after them; None if too few.

    Median and 1.4826 × MAD rather than mean and standard deviation: one hiccup in the warm-up must not
    set the scale (Iglewicz & Hoaglin 1993 for the MAD's normal-consistency factor)."""
    finite = np.flatnonzero(np.isfinite(x))
    if len(finite) < max(warmup, 2) + 1:
        return None
    ref = x[finite[:warmup]]
    mu0 = float(np.median(ref))
    sigma = max(1.4826 * float(np.median(np.abs(ref - mu0))), MIN_REL_SIGMA * abs(mu0))
    return mu0, sigma, int(finite[warmup - 1]) + 1


def block_medians(x: np.ndarray, block: int) -> np.ndarray:
    """Medians of consecutive blocks of ``block`` points (NaN-aware; a block of NaNs stays NaN).

    Real links hiccup: a retransmission or a busy core makes one step's throughput fall by half and the
    next is back. A CUSUM fed single steps alarms on those; fed block medians it sees only what lasts."""
    n = len(x) // block * block
    blocks = np.asarray(x[:n], np.float64).reshape(-1, block)
    out = np.full(len(blocks), np.nan)
    finite = np.isfinite(blocks).any(axis=1)
    out[finite] = np.nanmedian(blocks[finite], axis=1)
    return out


def refine_change(x: np.ndarray, mu0: float, first: int, last: int) -> int:
    """The change point in ``x[first:last + 1]`` by least squares: the split that best explains the points
    before it by μ0 and the points from it on by their own mean (Hinkley 1970, from memory).

    The CUSUM's own estimate (where the sum last left zero) runs early whenever noise just before the change
    sat a little above μ0 + kσ; the split does not."""
    segment = np.asarray(x[first:last + 1], np.float64)
    segment = np.where(np.isfinite(segment), segment, mu0)
    best, best_cost = first, np.inf
    for split in range(len(segment)):
        before, after = segment[:split], segment[split:]
        cost = float(np.sum((before - mu0) ** 2) + np.sum((after - after.mean()) ** 2))
        if cost < best_cost:
            best, best_cost = first + split, cost
    return best


def degradation_alerts(series: RunSeries, nodes: tuple[str, ...], *, links: RunSeries | None = None,
                       warmup: int = WARMUP, block: int = BLOCK,
                       k: float = K_SIGMA, h: float = H_SIGMA, clip: float = CLIP_SIGMA,
                       min_change: float = MIN_CHANGE, min_link_change: float = MIN_LINK_CHANGE,
                       ) -> tuple[Alert, ...]:
    """Step time rising, and each link's rate (``RunSeries.link_rate``) falling, by a lasting amount.

    Link rates come from ``links`` when given (the analysis's sharing-corrected series over the steps it
    still holds), else from ``series``.

    Each series is reduced to medians of ``block`` steps; μ0 and σ come from the first ``warmup`` steps'
    blocks; the CUSUM runs on the blocks after them, each clipped to μ0 ± ``clip``·σ so that no single
    block, however bad, alarms alone: with clip 2.5, k 0.5 and h 5 it takes three blocks in a row
    (winsorised CUSUM, after Lucas & Crosier 1982, from memory). An alarm is reported when the block after
    it is still off by ``min_change`` (``min_link_change`` for a link) or more and so is the level since the
    change (the median of the
    blocks from the refined change point to that confirming block); otherwise it was a passing burst or a
    change too small to act on, and the CUSUM restarts at the confirming block, so a later, larger change
    is still caught. The first reported alarm ends the watch on that series.
    Steps in which a link moved nothing are NaN and skipped.
    """
    alerts = []
    link_series = series if links is None else links
    rate = link_series.link_rate()
    candidates: list[tuple[str, str, Side, np.ndarray, np.ndarray]] = [
        ("step-time", "step time", "upper", np.asarray(series.step_s, np.float64), np.asarray(series.steps))]
    for j, (s, d) in enumerate(link_series.links):
        candidates.append(("link-throughput", f"{_node(nodes, s)}→{_node(nodes, d)}", "lower", rate[:, j],
                           np.asarray(link_series.steps)))
    for kind, subject, side, x, steps in candidates:
        material = min_change if kind == "step-time" else min_link_change
        blocks = block_medians(x, block)
        ref = warmup_reference(blocks, max(2, warmup // block))
        if ref is None:
            continue
        mu0, sigma, start = ref
        if kind != "step-time":
            sigma = min(sigma, MAX_LINK_SIGMA * abs(mu0))
        while start < len(blocks):
            clipped = np.clip(blocks[start:], mu0 - clip * sigma, mu0 + clip * sigma)
            run = tabular_cusum(clipped, mu0, sigma, side=side, k=k, h=h)
            if run.alarm < 0:
                break
            detected = start + run.alarm
            confirm = detected + 1
            if confirm >= len(blocks):
                break  # one more block decides: a burst of hiccups passes, a change holds
            began = refine_change(blocks, mu0, start + run.began + 1, detected)
            level = float(np.nanmedian(blocks[began:confirm + 1]))
            if abs(level / mu0 - 1.0) >= material and abs(blocks[confirm] / mu0 - 1.0) >= material:
                step_began, step_detected = int(steps[began * block]), int(steps[confirm * block + block - 1])
                alerts.append(Alert(kind, subject, step_began, step_detected, mu0, level,
                                    _message(kind, subject, mu0, level, step_began)))
                break
            start = confirm  # passing, or too small to act on: watch on from the next block
    return tuple(alerts)


def _node(nodes: tuple[str, ...], index: int) -> str:
    """A node's name, or its index when the series names a node the window does not have."""
    return nodes[index] if 0 <= index < len(nodes) else f"node#{index}"


def _message(kind: str, subject: str, baseline: float, recent: float, began: int) -> str:
    if kind == "step-time":
        return f"step time rose from {baseline:.3g} s to {recent:.3g} s, from about step {began}"
    return f"link {subject} slowed from {baseline / 1e6:.4g} MB/s to {recent / 1e6:.4g} MB/s, from about step {began}"

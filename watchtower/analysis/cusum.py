"""Degradation alerts: robust per-step CUSUM charts (Page, 1954; Montgomery, Introduction to Statistical
Quality Control, tabular CUSUM) on log step time (rises) and each link's log rate (falls), re-armed after
every change with a fast initial response (Lucas & Crosier, 1982), thresholds set from Siegmund's
approximation of the in-control average run length so a whole job expects under one false alarm a day.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist
from typing import Literal

import numpy as np

from watchtower.analysis.window import RunSeries

K_SIGMA = 0.5  # Montgomery's usual design: k = 0.5σ (with h = 5σ), the defaults of ``tabular_cusum``
H_SIGMA = 5.0
# 1 / Φ⁻¹(3/4) = 1.4826…: the MAD of a normal sample times this estimates σ (Iglewicz & Hoaglin 1993).
MAD_TO_SIGMA = 1.0 / NormalDist().inv_cdf(0.75)
WARMUP = 40  # steps that set μ0 and σ; common practice, no source
# Two charts per direction: the fast one (k = 1σ, tuned to shifts of about 2σ and more) catches a halved
# link in two or three steps; the patient one (k = 0.5σ, tuned to shifts of about 1σ) catches drifts
# the fast one misses. Montgomery: k is half the shift to detect quickly.
K_FAST = 1.0
K_SLOW = 0.5
CLIP_SIGMA = 4.0  # each standardised point is clipped to ±4σ, so no single hiccup alarms; no source
FIR_HEAD_START = 0.5  # after a re-arm the charts start at h/2 (Lucas & Crosier 1982)
REFERENCE_EVERY = 20  # points between updates of μ0 and σ from the in-control period; no source
REFERENCE_MAX = 400  # newest in-control points that set them; common practice, no source
# The slow chart waits for this many in-control points: a 1σ drift cannot be told from the error of a
# level and scale learned from fewer (their error is about 1.25/√n σ and 0.18 σ at n = 40); no source.
SLOW_AFTER = 200
RELEARN = 8  # points from a change's onset that set the new in-control level; common practice, no source
MIN_LOG_SIGMA = 0.01  # σ floor of a log series (1 %): a flat warm-up (replay, synthetic) must not alarm on jitter
# Flows that share a port make a link's per-step rate bimodal (alone / halved): σ of a link's log rate is
# capped at 0.25 so a lasting fall to half (log 2 ≈ 2.8σ) is always seen. Common practice, no source.
MAX_LINK_SIGMA = 0.25
# False-alarm budget: a whole job, every chart of every series together, at one step per second.
FALSE_ALERTS_PER_DAY = 1.0
STEPS_PER_DAY = 86_400.0
# Worth acting on (cluster file / flags may change both): a change must move the step time by this
# fraction, or put this many hours of the remaining run at stake. Common practice, no source.
MIN_EFFECT = 0.10
MIN_HOURS = 1.0
# A link alert also needs the link itself to have fallen this much: the step time may have risen for
# another cause while the link only wobbled with the flows sharing its ports. Common practice, no source.
MIN_LINK_CHANGE = 0.4

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
                  h: float = H_SIGMA, head_start: float = 0.0) -> Cusum:
    """C⁺_i = max(0, x_i − (μ0 + kσ) + C⁺_{i−1}) (upper) or C⁻_i = max(0, (μ0 − kσ) − x_i + C⁻_{i−1}) (lower),
    alarm when C > hσ. ``head_start`` is C_0 as a fraction of hσ (the fast initial response, Lucas &
    Crosier 1982: 0.5 after a re-arm).

    The recursion is sequential by nature; it runs over at most one value per step and series, so a
    plain loop is cheap next to everything else.
    """
    x = np.asarray(x, dtype=np.float64)
    dev = x - (mu0 + k * sigma) if side == "upper" else (mu0 - k * sigma) - x
    limit = h * sigma
    sums = np.zeros(len(x))
    c = head_start * limit
    last_zero, alarm, began = -1, -1, -1
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


def siegmund_arl(k: float, h: float, shift: float = 0.0) -> float:
    """Average run length of a one-sided CUSUM (k, h in σ) for a mean shift of ``shift``σ in its direction.

    Siegmund (1985), as given by Montgomery (SQC, §9.1, eq. 9.13 in the editions we know; from memory):
    ARL = (exp(−2Δb) + 2Δb − 1) / (2Δ²), Δ = shift − k, b = h + 1.166; b² when Δ = 0.
    """
    delta, b = shift - k, h + 1.166
    if abs(delta) < 1e-12:
        return b * b
    return (math.exp(-2.0 * delta * b) + 2.0 * delta * b - 1.0) / (2.0 * delta * delta)


def threshold_for_arl(arl: float, k: float) -> float:
    """The h (in σ) whose in-control ARL by Siegmund's approximation is ``arl`` (bisection: ARL grows in h)."""
    lo, hi = 0.0, 200.0
    for _ in range(200):
        mid = (lo + hi) / 2.0
        lo, hi = (mid, hi) if siegmund_arl(k, mid) < arl else (lo, mid)
    return hi


def chart_thresholds(n_series: int, *, false_alerts_per_day: float = FALSE_ALERTS_PER_DAY,
                     steps_per_day: float = STEPS_PER_DAY) -> tuple[float, float, float]:
    """(in-control ARL each chart needs, h of the fast chart, h of the slow chart) for a job watching
    ``n_series`` series, each with four one-sided charts (fast and slow, both directions: a series is
    also watched for its return). False alarms of independent charts add up, so each chart's in-control
    ARL must be 4 × n_series × steps per day / false alerts per day."""
    arl = 4.0 * max(1, n_series) * steps_per_day / false_alerts_per_day
    return arl, threshold_for_arl(arl, K_FAST), threshold_for_arl(arl, K_SLOW)


def warmup_reference(x: np.ndarray, warmup: int = WARMUP, *, floor: float = 0.0) -> tuple[float, float, int] | None:
    """μ0 and σ from the first ``warmup`` finite points, and the index after them; None if too few.

    Median and MAD_TO_SIGMA × MAD rather than mean and standard deviation: one hiccup in the warm-up must
    not set the scale (Iglewicz & Hoaglin 1993). σ is at least ``floor``."""
    finite = np.flatnonzero(np.isfinite(x))
    if len(finite) < max(warmup, 2) + 1:
        return None
    ref = x[finite[:warmup]]
    mu0 = float(np.median(ref))
    sigma = max(MAD_TO_SIGMA * float(np.median(np.abs(ref - mu0))), floor)
    return mu0, sigma, int(finite[warmup - 1]) + 1


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


@dataclass(frozen=True)
class Change:
    """One lasting move of a watched log series: indices of its onset (least-squares change point) and of
    its confirmed detection, the in-control level before it and the median level from onset to detection
    (both log), its direction and the chart that saw it ("fast" | "slow")."""

    began: int
    detected: int
    before: float
    after: float
    up: bool
    chart: str


def watch_series(x: np.ndarray, h_fast: float, h_slow: float, *, warmup: int = WARMUP, k_fast: float = K_FAST,
                 k_slow: float = K_SLOW, clip: float = CLIP_SIGMA, relearn: int = RELEARN,
                 floor: float = MIN_LOG_SIGMA, cap: float = math.inf) -> tuple[Change, ...]:
    """Every lasting change of ``x`` (a log series; NaN points skipped), up or down, in order.

    μ0 and σ (median, MAD_TO_SIGMA × MAD; σ within [floor, cap]) come from the in-control period: the first
    ``warmup`` points, then, every ``REFERENCE_EVERY`` points, every point since the last change up to
    where all charts were last at zero (at most ``REFERENCE_MAX`` of the newest): estimated from 40 points
    they are off by about a fifth of σ, which cuts the in-control ARL a hundredfold; from hundreds they are
    not (self-starting CUSUM, Hawkins 1987, from memory). Four one-sided charts (fast k, slow k; up, down)
    run on the points standardised and clipped to ±clip. A chart's alarm counts when the next point is
    still beyond k on its side (otherwise the charts restart at that point with the fast initial response);
    the change began at the least-squares split after the chart last left zero. Then the level is re-learned
    as the median of ``relearn`` points from the onset, and the charts re-arm from there with the fast
    initial response (fast charts at h/2; the slow ones at 0, since a level learned from a few points is
    itself off by a fraction of σ that a slow chart would soon take for a drift). The slow charts watch
    only once the reference holds ``SLOW_AFTER`` points.
    """
    x = np.asarray(x, np.float64)
    ref = warmup_reference(x, warmup, floor=floor)
    if ref is None:
        return ()
    mu, sigma, i = ref
    sigma = max(min(sigma, cap), floor)
    n, origin, n_ref = len(x), 0, warmup
    finite = np.isfinite(x)
    state = (0.0, 0.0, 0.0, 0.0)
    changes: list[Change] = []
    while i < n:
        stop = min(n, i + REFERENCE_EVERY)
        patient = h_slow if n_ref >= SLOW_AFTER else math.inf
        scale = sigma * (1.0 + 1.0 / math.sqrt(n_ref))
        hit, state, quiet = _first_alarm(x, i, stop, mu, scale, state, h_fast, patient, k_fast, k_slow, clip)
        if hit is None:
            i = stop
            known = np.flatnonzero(finite[origin:quiet + 1]) + origin
            if len(known) > warmup:
                n_ref = min(len(known), REFERENCE_MAX)
                ref_points = x[known[-REFERENCE_MAX:]]
                mu = float(np.median(ref_points))
                sigma = max(min(MAD_TO_SIGMA * float(np.median(np.abs(ref_points - mu))), cap), floor)
            continue
        up, chart, zero, alarm = hit
        after_alarm = np.flatnonzero(finite[alarm + 1:])
        if len(after_alarm) == 0:
            break  # one more point decides: a burst of hiccups passes, a change holds
        confirm = alarm + 1 + int(after_alarm[0])
        k = k_fast if chart == "fast" else k_slow
        if (x[confirm] - mu) / scale * (1.0 if up else -1.0) <= k:
            # a passing burst decays from h/2 at once; a real change alarms again soon
            i, state = confirm, (FIR_HEAD_START * h_fast,) * 2 + (0.0, 0.0) + state[4:]  # onsets still from before
            continue
        began = refine_change(x, mu, zero + 1, confirm)
        changes.append(Change(began, confirm, mu, float(np.nanmedian(x[began:confirm + 1])), up, chart))
        end = max(began + relearn, confirm + 1)
        if end > n or not finite[began:end].any():
            break
        mu, i, origin, n_ref = float(np.nanmedian(x[began:end])), end, began, relearn
        state = (FIR_HEAD_START * h_fast,) * 2 + (0.0, 0.0) + (end - 1,) * 4
    return tuple(changes)


def _first_alarm(x: np.ndarray, start: int, stop: int, mu: float, sigma: float, state: tuple[float, ...],
                 h_fast: float, h_slow: float, k_fast: float, k_slow: float, clip: float,
                 ) -> tuple[tuple[bool, str, int, int] | None, tuple[float, ...], int]:
    """The first alarm in ``x[start:stop]``: ((up, chart, index where that chart was last zero, alarm index)
    or None, the charts' state after the last point looked at (four sums, then where each was last zero;
    four sums alone mean zero just before ``start``), the last index where all four were zero at once)."""
    z = np.clip((x[start:stop] - mu) / sigma, -clip, clip).tolist()
    up_f, down_f, up_s, down_s = state[:4]
    zero = list(state[4:]) if len(state) > 4 else [start - 1] * 4  # last zero of up_f, down_f, up_s, down_s
    quiet = start - 1 if not any(state[:4]) else -1
    for j, v in enumerate(z):
        if v != v:  # NaN: the sums carry over
            continue
        i = start + j
        up_f, down_f = max(0.0, up_f + v - k_fast), max(0.0, down_f - v - k_fast)
        up_s, down_s = max(0.0, up_s + v - k_slow), max(0.0, down_s - v - k_slow)
        sums = (up_f, down_f, up_s, down_s)
        for c, value in enumerate(sums):
            if value == 0.0:
                zero[c] = i
        if not any(sums):
            quiet = i
        if up_f > h_fast or down_f > h_fast or up_s > h_slow or down_s > h_slow:
            # The fast chart first: it saw the larger change; its onset is the sharper.
            for c, (value, h) in enumerate(zip(sums, (h_fast, h_fast, h_slow, h_slow), strict=True)):
                if value > h:
                    return (c % 2 == 0, "fast" if c < 2 else "slow", zero[c], i), (*sums, *zero), quiet
    return None, (up_f, down_f, up_s, down_s, *zero), quiet


def cusum_batch(z: np.ndarray, k: float, h: float, start: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The upper tabular CUSUM of standardised points ``z`` [T, S] (μ0 = 0, σ = 1), run on every column at
    once: (index of each column's first sum above h, −1 for none; the sums after the last row). NaN points
    are skipped (the sum carries over); ``start`` [S] are the sums before the first row (0 by default).
    Run it on −z for the lower chart."""
    sums = np.zeros(z.shape[1]) if start is None else np.asarray(start, np.float64).copy()
    alarm = np.full(z.shape[1], -1, np.int64)
    for t, row in enumerate(np.asarray(z, np.float64)):
        sums = np.where(np.isnan(row), sums, np.maximum(0.0, sums + row - k))
        alarm[(alarm < 0) & (sums > h)] = t
    return alarm, sums


def any_alarm(z: np.ndarray, h_fast: float, h_slow: float, *, k_fast: float = K_FAST,
              k_slow: float = K_SLOW) -> np.ndarray:
    """Per column of standardised, clipped points ``z`` [T, S] (NaN: skipped), whether any of the four
    charts would alarm: the recursions run across all series at once, so the many series of a healthy job
    cost a few array operations per step and only the ones that moved go through ``watch_series``."""
    hit = np.zeros(z.shape[1], bool)
    for sign in (1.0, -1.0):
        for k, h in ((k_fast, h_fast), (k_slow, h_slow)):
            hit |= cusum_batch(sign * z, k, h)[0] >= 0
    return hit


@dataclass(frozen=True)
class Alert:
    """A degradation worth acting on: what (``kind``), on what (``subject``), when it began, when it was
    seen and, once the series returned to its earlier level, when that return began (``step_closed``).

    ``baseline`` is the in-control level before the change, ``recent`` the level from the change to its
    detection (seconds for step time, B/s for a link). ``effect`` is the step time's relative change over
    the same steps and ``hours_at_stake`` remaining steps × that step-time difference (DESIGN §3), None
    without a configured total. ``port`` is the node port likely behind a link's drop ("<node> out" |
    "<node> in"), named afterwards by ``ports.name_alert_ports``. Kind "recovered" marks a return.
    """

    kind: str  # "link-throughput" | "step-time" | "recovered"
    subject: str
    step_began: int
    step_detected: int
    baseline: float
    recent: float
    message: str
    port: str | None = None
    step_closed: int | None = None
    effect: float = math.nan
    hours_at_stake: float | None = None


@dataclass(frozen=True)
class Watch:
    """What the charts found: ``alerts`` (open and closed), ``recoveries`` (kind "recovered"), and
    ``changes`` — lasting changes below the bar (recorded in the report, no alert)."""

    alerts: tuple[Alert, ...]
    recoveries: tuple[Alert, ...]
    changes: tuple[Alert, ...]
    n_series: int
    arl: float
    h_fast: float
    h_slow: float


def watch_run(series: RunSeries, nodes: tuple[str, ...], *, links: RunSeries | None = None,
              warmup: int = WARMUP, remaining_steps: int | None = None, min_effect: float = MIN_EFFECT,
              min_hours: float = MIN_HOURS, min_link_change: float = MIN_LINK_CHANGE,
              false_alerts_per_day: float = FALSE_ALERTS_PER_DAY) -> Watch:
    """Watch step time (for rises) and each link's rate (``RunSeries.link_rate``, for falls) over the run.

    Link rates come from ``links`` when given (the analysis's sharing-corrected series over the steps it
    still holds), else from ``series``. Thresholds come from ``chart_thresholds`` for 1 + links series.
    A worsening change is an alert when it is worth acting on: the step time rose by ``min_effect`` or more
    (the level from the onset to detection over the level before), or the rise puts ``min_hours`` or more of
    the remaining run at stake; a link's fall (by ``min_link_change`` or more itself) is worth it when the
    step time rose so at about the same step. Otherwise it is a recorded change. A change back to a level
    nearer an open alert's baseline than its degraded level
    closes the alert and records a recovery.
    """
    link_series = series if links is None else links
    rate = link_series.link_rate()
    n_series = 1 + len(link_series.links)
    arl, h_fast, h_slow = chart_thresholds(n_series, false_alerts_per_day=false_alerts_per_day)
    step_s = np.asarray(series.step_s, np.float64)
    step_steps = np.asarray(series.steps)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_step = np.log(np.where(step_s > 0, step_s, np.nan))
        log_rate = np.log(np.where(rate > 0, rate, np.nan))
    candidates: list[tuple[str, str, np.ndarray, np.ndarray, float]] = [
        ("step-time", "step time", log_step, step_steps, math.inf)]
    columns = _moving_columns(log_rate, warmup, h_fast, h_slow) if log_rate.size else []
    for j in columns:
        s, d = link_series.links[j]
        candidates.append(("link-throughput", f"{_node(nodes, s)}→{_node(nodes, d)}", log_rate[:, j],
                           np.asarray(link_series.steps), MAX_LINK_SIGMA))
    alerts: list[Alert] = []
    recoveries: list[Alert] = []
    changes: list[Alert] = []
    rises: list[Alert] = []  # the step time's upward changes: what a link's fall must have cost to matter
    dips: list[float] = []  # the step time's level before each fall that closed no alert
    for kind, subject, x, steps, cap in candidates:
        open_: list[Alert] = []
        for ch in watch_series(x, h_fast, h_slow, warmup=warmup, cap=cap):
            began, detected = int(steps[ch.began]), int(steps[ch.detected])
            before, after = math.exp(ch.before), math.exp(ch.after)
            if kind == "step-time":
                # A rise back from a dip is no degradation: measured against the level before the dip.
                ref = before if not dips or open_ else max(before, dips[-1])
                effect = after / ref - 1.0
                hours = None if remaining_steps is None else remaining_steps * max(0.0, after - ref) / 3600.0
            else:
                # A link's fall is worth acting on when the step time rose with it (an upward step-time change
                # with its onset within RELEARN steps): that rise is the fall's cost. A fall the step time did
                # not feel (flows that shift between ports, a link off the critical path) costs nothing.
                felt = [r for r in rises if abs(r.step_began - began) <= RELEARN]
                effect = max((r.effect for r in felt), default=math.nan)
                hours = max((r.hours_at_stake for r in felt if r.hours_at_stake is not None), default=None)
            worse = ch.up == (kind == "step-time")
            if worse:
                material = kind == "step-time" or 1.0 - after / before >= min_link_change
                worth = effect >= min_effect or (hours is not None and hours >= min_hours)
                al = Alert(kind, subject, began, detected, before, after,
                           _message(kind, subject, before, after, began), effect=effect, hours_at_stake=hours)
                if kind == "step-time":
                    rises.append(al)
                if material and worth:
                    open_.append(al)
                else:
                    changes.append(al)
                continue
            back = [al for al in open_ if abs(ch.after - math.log(al.baseline)) < abs(ch.after - math.log(al.recent))]
            for al in back:
                open_.remove(al)
                alerts.append(_closed(al, began))
            if back:
                first = min(back, key=lambda al: al.step_began)
                recoveries.append(Alert("recovered", subject, began, detected, before, after,
                                        f"{subject} back near {_level(kind, first.baseline)} (now "
                                        f"{_level(kind, after)}) from about step {began}, after the change "
                                        f"from step {first.step_began}"))
            if not back:
                if kind == "step-time":
                    dips.append(before)
                changes.append(Alert(kind, subject, began, detected, before, after,
                                     _message(kind, subject, before, after, began), effect=effect))
        alerts.extend(open_)
    for found in (alerts, changes):
        found.sort(key=lambda al: (al.step_began, al.kind, al.subject))
    return Watch(tuple(alerts), tuple(recoveries), tuple(changes), n_series, arl, h_fast, h_slow)


def _closed(al: Alert, step: int) -> Alert:
    return Alert(al.kind, al.subject, al.step_began, al.step_detected, al.baseline, al.recent,
                 f"{al.message}; recovered from about step {step}", al.port, step, al.effect, al.hours_at_stake)


def _moving_columns(log_rate: np.ndarray, warmup: int, h_fast: float, h_slow: float) -> list[int]:
    """The link columns whose charts alarm at all (before confirmation and re-arming)."""
    z = np.full(log_rate.shape, np.nan)
    for j in range(log_rate.shape[1]):
        ref = warmup_reference(log_rate[:, j], warmup, floor=MIN_LOG_SIGMA)
        if ref is not None:
            mu, sigma, start = ref
            sigma = max(min(sigma, MAX_LINK_SIGMA), MIN_LOG_SIGMA)
            z[start:, j] = np.clip((log_rate[start:, j] - mu) / sigma, -CLIP_SIGMA, CLIP_SIGMA)
    return np.flatnonzero(any_alarm(z, h_fast, h_slow)).tolist()


def _node(nodes: tuple[str, ...], index: int) -> str:
    """A node's name, or its index when the series names a node the window does not have."""
    return nodes[index] if 0 <= index < len(nodes) else f"node#{index}"


def _level(kind: str, value: float) -> str:
    """A level with the unit that keeps three significant digits, as the console and report show figures."""
    units = [(1.0, "s"), (1e-3, "ms"), (1e-6, "µs")] if kind == "step-time" else \
        [(1e12, "TB/s"), (1e9, "GB/s"), (1e6, "MB/s"), (1e3, "kB/s"), (1.0, "B/s")]
    scale, unit = next(((f, u) for f, u in units if abs(value) >= f), units[-1])
    return f"{value / scale:.3g} {unit}"


def _message(kind: str, subject: str, baseline: float, recent: float, began: int) -> str:
    verb = "rose" if recent > baseline else "fell"
    if kind == "step-time":
        return f"step time {verb} from {_level(kind, baseline)} to {_level(kind, recent)}, from about step {began}"
    verb = "slowed" if recent < baseline else "sped up"
    return f"link {subject} {verb} from {_level(kind, baseline)} to {_level(kind, recent)}, from about step {began}"

"""The robust Hockney fit and the link models against an independent path written here with numpy.

Reference (the method as ``fit_hockney`` documents it, Hockney 1994 for the model t(n) = α + n/β): messages
are binned by size, 8 bins per octave (bin = floor(8 log2 n)); each bin is represented by its mean size and
the q-quantile of its times (``numpy.quantile(method="lower")``: the lower of the two middle candidates,
as a sorted pick at floor(q (count − 1)) is); a line is fitted through the bins by ``numpy.polyfit`` with
relative weights count / t² (polyfit's ``w`` multiplies residuals, so w = sqrt(count) / t); a negative
intercept is latency 0. Each case also shows that the obvious slip (weights count / t, bins per decade, a
wrong quantile, abs of the intercept) would give a different answer, so the comparison can fail.
"""

from __future__ import annotations

import numpy as np
import pytest

from watchtower.analysis import Transfers, Window, analyse, fit_hockney
from watchtower.cluster import Cluster

ALPHA, BETA = 20e-6, 5e9


def reference_fit(n: np.ndarray, t: np.ndarray, *, quantile: float = 0.25, bins_per_octave: float = 8,
                  log=np.log2, weight=lambda count, tq: count / tq**2) -> tuple[float, float, int]:
    """(α, β, bins) by per-bin loops, numpy.quantile and numpy.polyfit; α clamped at 0."""
    bins = np.floor(log(n) * bins_per_octave)
    xs, ys, ws = [], [], []
    for b in np.unique(bins):
        sel = bins == b
        tq = float(np.quantile(t[sel], quantile, method="lower"))
        xs.append(float(n[sel].mean()))
        ys.append(tq)
        ws.append(weight(sel.sum(), tq))
    slope, intercept = np.polyfit(xs, ys, 1, w=np.sqrt(ws))
    return max(float(intercept), 0.0), float(1.0 / slope), len(xs)


def waiting_link(rng: np.random.Generator, count: int = 3000, *, alpha: float = ALPHA,
                 lo: float = 1e3, hi: float = 1e8) -> tuple[np.ndarray, np.ndarray]:
    """Log-uniform sizes; 3 % timer noise; 40 % of transfers inflated by waiting (0.2 to 4 × plus up to 50 µs)."""
    n = np.exp(rng.uniform(np.log(lo), np.log(hi), count)).round()
    t = (alpha + n / BETA) * (1.0 + 0.03 * rng.standard_normal(count))
    hit = rng.random(count) < 0.4
    return n, t + hit * (t * rng.uniform(0.2, 4.0, count) + rng.uniform(0.0, 5e-5, count))


def one_link(n: np.ndarray, t: np.ndarray, **kw):
    fit = fit_hockney(np.zeros(len(n), np.int64), n, t, 1, **kw)
    return float(fit.alpha_s[0]), float(fit.beta_Bps[0]), int(fit.sizes[0])


def differs(a: tuple[float, float, int], b: tuple[float, float, int], rel: float = 1e-3) -> bool:
    return abs(a[0] - b[0]) > rel * abs(b[0]) or abs(a[1] - b[1]) > rel * abs(b[1]) or a[2] != b[2]


def test_robust_fit_matches_the_reference_with_its_defaults(rng: np.random.Generator) -> None:
    n, t = waiting_link(rng)
    ref = reference_fit(n, t)  # q = 0.25, 8 bins per octave, weights count / t²
    got = one_link(n, t)  # the function's own defaults
    assert got[0] == pytest.approx(ref[0], rel=1e-9)
    assert got[1] == pytest.approx(ref[1], rel=1e-9)
    assert got[2] == ref[2]
    # The comparison can fail: each slip gives another line.
    assert differs(reference_fit(n, t, weight=lambda count, tq: count / tq), ref)
    assert differs(reference_fit(n, t, log=np.log10), ref)  # bins per decade
    for q in (0.175, 0.325):
        assert differs(reference_fit(n, t, quantile=q), ref)
    for bins in (6, 10):
        assert differs(reference_fit(n, t, bins_per_octave=bins), ref)
    # And the fit is near the truth through 40 % waiting (stated tolerance: 10 %).
    assert got[1] == pytest.approx(BETA, rel=0.10)


@pytest.mark.parametrize("quantile", [0.5, 0.1])
def test_robust_fit_matches_the_reference_at_other_quantiles(rng: np.random.Generator, quantile: float) -> None:
    n, t = waiting_link(rng)
    got, ref = one_link(n, t, quantile=quantile), reference_fit(n, t, quantile=quantile)
    assert got[:2] == pytest.approx(ref[:2], rel=1e-9)


def test_weights_decide_the_line() -> None:
    # A protocol switch (from memory: eager sends up to some tens of kB, a rendezvous handshake above) puts
    # α at 5 µs for messages up to 64 kB and 40 µs above. No line fits both, so the weights decide which
    # part it follows: relative weights (count / t²) keep it on the small messages' latency; count / t
    # would move α by a third and β by a tenth.
    n = np.repeat(np.geomspace(1e3, 1e8, 16).round(), 10)
    t = np.where(n <= 64e3, 5e-6, 40e-6) + n / BETA
    ref = reference_fit(n, t)
    other = reference_fit(n, t, weight=lambda count, tq: count / tq)
    assert abs(other[0] / ref[0] - 1) > 0.3 and abs(other[1] / ref[1] - 1) > 0.08
    got = one_link(n, t)
    assert got[0] == pytest.approx(ref[0], rel=1e-9)
    assert got[1] == pytest.approx(ref[1], rel=1e-9)


def test_negative_intercept_is_zero_latency(rng: np.random.Generator) -> None:
    # Times that extrapolate below zero at n = 0 (a timer that starts late: t = n/β − 5 µs): the line's
    # intercept is negative; latency cannot be, so α is 0 — not |intercept| — and β keeps the line's slope.
    n = np.repeat(np.geomspace(1e5, 1e7, 9).round(), 4)
    t = (n / BETA - 5e-6) * (1.0 + 0.01 * rng.standard_normal(len(n)))
    slope, intercept = np.polyfit(*_bins(n, t), 1, w=np.sqrt(_bins(n, t, weights=True)))
    assert intercept < -4e-6
    alpha, beta, _ = one_link(n, t)
    assert alpha == 0.0
    assert beta == pytest.approx(1.0 / slope, rel=1e-9)
    assert (alpha, beta) == pytest.approx(reference_fit(n, t)[:2], rel=1e-9)


def _bins(n: np.ndarray, t: np.ndarray, *, weights: bool = False):
    """Per-octave bins by hand for the negative-intercept case (sizes are 9 distinct values, one per bin)."""
    sizes = np.unique(n)
    tq = np.array([np.quantile(t[n == s], 0.25, method="lower") for s in sizes])
    counts = np.array([np.count_nonzero(n == s) for s in sizes])
    return counts / tq**2 if weights else (sizes, tq)


def test_octave_bins_split_sizes_a_decade_bin_would_merge() -> None:
    # Exact times at 1.0, 1.2 and 1.44 MB: a factor 1.2 apart, more than an eighth of an octave (2^(1/8) =
    # 1.09), less than an eighth of a decade (10^(1/8) = 1.33). Per octave: three bins, the exact line.
    n = np.repeat([1.0e6, 1.2e6, 1.44e6], 3)
    t = ALPHA + n / BETA
    alpha, beta, bins = one_link(n, t)
    assert bins == 3
    assert (alpha, beta) == pytest.approx((ALPHA, BETA), rel=1e-6)
    assert reference_fit(n, t, log=np.log10)[2] < 3


# ------------------------------------------------------------------------------- through the analysis
def link_window(n: np.ndarray, t: np.ndarray, wait: np.ndarray, steps: np.ndarray | None = None) -> Window:
    """Two nodes, one rank each; every transfer n0 → n1 in its own slot (no port sharing)."""
    k = len(n)
    start = np.arange(k) * 1.0
    step = np.zeros(k, np.int64) if steps is None else steps
    tr = Transfers(step, np.zeros(k, np.int32), np.zeros(k, np.int32), np.ones(k, np.int32), n.astype(np.int64),
                   start, start + np.nan_to_num(wait) + t, wait)
    n_steps = int(step.max()) + 1
    return Window(("l",), ("n0", "n1"), np.arange(2, dtype=np.int32), np.arange(2, dtype=np.int32),
                  np.arange(n_steps), np.ones((n_steps, 2, 1)), np.zeros((n_steps, 2, 1)), np.ones((n_steps, 2)),
                  tr)


@pytest.mark.parametrize(("waits_known", "quantile"), [(False, 0.25), (True, 0.5)])
def test_link_model_uses_the_quantile_its_waits_call_for(rng: np.random.Generator, waits_known: bool,
                                                         quantile: float) -> None:
    # Waits unknown: each bin's 25 % quantile; waits split off by the probe: each bin's median (see
    # links.bandwidth_Bps in HOW; both no source). The times fitted are the transfer times less known waits.
    n, t = waiting_link(rng, 1500)
    wait = rng.uniform(0.0, 1e-3, len(n)) if waits_known else np.full(len(n), np.nan)
    (link,) = analyse(link_window(n, t, wait), None, Cluster()).links
    ref = reference_fit(n, t, quantile=quantile)
    assert link.latency_s == pytest.approx(ref[0], rel=1e-9)
    assert link.bandwidth_Bps == pytest.approx(ref[1], rel=1e-9)
    for q in (0.7 * quantile, 1.3 * quantile):  # the comparison can fail
        assert differs(reference_fit(n, t, quantile=q), ref)


def test_link_model_fits_the_newest_whole_steps_under_the_cap(rng: np.random.Generator) -> None:
    # The cap is 200,000 transfers (see links.bandwidth_Bps in HOW; no source). Five steps of 49,999
    # transfers each, every step at its own β: the fit must use the newest four steps (199,996 transfers,
    # the most whole steps under the cap), not three, not five.
    per_step = 49_999
    steps = np.repeat(np.arange(5), per_step)
    n = np.exp(rng.uniform(np.log(1e4), np.log(1e7), len(steps))).round()
    t = ALPHA + n / (BETA * (1.0 + 0.15 * steps))
    (link,) = analyse(link_window(n, t, np.full(len(n), np.nan), steps), None, Cluster()).links
    newest = [reference_fit(n[steps >= first], t[steps >= first]) for first in (1, 2, 0)]
    # (rel 1e-6: the sharing correction integrates over a quarter of a million seconds of slots)
    assert link.bandwidth_Bps == pytest.approx(newest[0][1], rel=1e-6)
    assert differs(newest[1], newest[0]) and differs(newest[2], newest[0])

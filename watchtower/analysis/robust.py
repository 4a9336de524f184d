"""Robust statistics: the modified z-score and the Hockney link fit.

Both are written for numbers that come with one-sided contamination: a transfer that includes waiting for
a peer is only ever slower than the wire, and a bad link or a straggler is only a handful of a large fleet.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

Z_CONSISTENCY = 0.6745  # Iglewicz & Hoaglin (1993): Φ⁻¹(0.75) ≈ 1/1.4826, makes MAD estimate σ for normal data
MEAN_AD_CONSISTENCY = 1.253314  # sqrt(π/2): mean absolute deviation × this estimates σ for normal data


def modified_z(x: np.ndarray, *, min_scale: float = 0.0) -> np.ndarray:
    """Modified z-score M = 0.6745 (x − median) / MAD (Iglewicz & Hoaglin, 1993); NaN in, NaN out.

    When MAD is 0 (more than half the values identical, e.g. a uniform fleet) the scale falls back to the
    mean absolute deviation × 1.253314, as Iglewicz & Hoaglin suggest, so one odd value among many equal
    ones still stands out. ``min_scale`` (in σ units of x) keeps near-identical values, whose spread is
    measurement jitter, from producing huge scores; when every value is equal all scores are 0.
    """
    x = np.asarray(x, dtype=np.float64)
    out = np.full(x.shape, np.nan)
    ok = np.isfinite(x)
    if not ok.any():
        return out
    v = x[ok]
    dev = v - np.median(v)
    sigma = np.median(np.abs(dev)) / Z_CONSISTENCY
    if sigma == 0.0:
        sigma = MEAN_AD_CONSISTENCY * np.mean(np.abs(dev))
    sigma = max(sigma, min_scale)
    out[ok] = dev / sigma if sigma > 0.0 else 0.0
    return out


@dataclass(frozen=True)
class HockneyFit:
    """t(n) = α + n/β per group (Hockney, 1994); arrays of length G, NaN where a group could not be fitted.

    ``sizes`` counts the distinct message-size bins behind each fit: with one bin α and β cannot be told
    apart, so α is NaN and β is the effective rate n/t of that size (latency included).
    """

    alpha_s: np.ndarray
    beta_Bps: np.ndarray
    sizes: np.ndarray  # int64, size bins used
    clamped: np.ndarray  # bool: the line's intercept came out negative and α was set to 0 (α below the noise)

    def where(self, choose_other: np.ndarray, other: HockneyFit) -> HockneyFit:
        """Per group, this fit or ``other`` where ``choose_other`` is true."""
        return HockneyFit(np.where(choose_other, other.alpha_s, self.alpha_s),
                          np.where(choose_other, other.beta_Bps, self.beta_Bps),
                          np.where(choose_other, other.sizes, self.sizes),
                          np.where(choose_other, other.clamped, self.clamped))


def hockney_lstsq(nbytes: np.ndarray, seconds: np.ndarray, weights: np.ndarray | None = None) -> tuple[float, float]:
    """Plain (weighted) least squares of t = α + n/β for one link: returns (α, β).

    Weights multiply squared residuals. This is the textbook fit (what ``numpy.polyfit`` does with
    ``w = sqrt(weights)``) and is not robust to waiting; ``fit_hockney`` feeds it a lower envelope.
    """
    n = np.asarray(nbytes, dtype=np.float64)
    w = np.ones_like(n) if weights is None else np.asarray(weights, dtype=np.float64)
    a, b = _wls_lines(np.zeros(len(n), np.int64), n, np.asarray(seconds, np.float64), w, 1)
    return float(a[0]), float(1.0 / b[0]) if b[0] > 0 else float("nan")


def fit_hockney(group: np.ndarray, nbytes: np.ndarray, seconds: np.ndarray, n_groups: int, *,
                quantile: float = 0.25, bins_per_octave: int = 8) -> HockneyFit:
    """Fit t(n) = α + n/β per group through the lower envelope of the measured times.

    Why this way: a transfer's time is the wire time plus, often, waiting that the probe could not split
    off; that error is one-sided and heavy (a wait can be many times the transfer). Least squares on the raw
    points follows the waits. So (1) messages are binned by size (``bins_per_octave`` log-spaced bins, so
    a layer's fixed message size is one bin), (2) each bin is represented by the ``quantile`` of its times
    (0.25: the bin still sits on clean transfers when up to 75 % of them are inflated, yet is far less
    biased by timer noise than the minimum), and (3) a line is fitted through the bins by least squares
    with relative weights (count / t²), so α — tiny next to the time of a large message — is fitted too.
    Everything is vectorised over groups (one sort), so thousands of links cost one pass.
    """
    group = np.asarray(group, dtype=np.int64)
    n = np.asarray(nbytes, dtype=np.float64)
    t = np.asarray(seconds, dtype=np.float64)
    ok = (n > 0) & np.isfinite(t) & (t > 0)
    group, n, t = group[ok], n[ok], t[ok]
    alpha = np.full(n_groups, np.nan)
    beta = np.full(n_groups, np.nan)
    sizes = np.zeros(n_groups, np.int64)
    if len(n) == 0:
        return HockneyFit(alpha, beta, sizes, np.zeros(n_groups, bool))

    size_bin = np.floor(np.log2(n) * bins_per_octave).astype(np.int64)
    size_bin -= size_bin.min()
    cell = group * (int(size_bin.max()) + 1) + size_bin  # one id per (group, size bin), ordered by both
    # Sort by cell, then time, with one float argsort (several times faster than a lexsort): the time,
    # scaled into [0, 0.5] so rounding never carries into the next cell, is the fraction. At 2^26 cells
    # float64 still orders times ~1e-7 of the longest apart; closer ones tie, which moves a quantile by less.
    order = np.argsort(cell + 0.5 * t / t.max())
    cell, g, n, t = cell[order], group[order], n[order], t[order]
    starts = np.flatnonzero(np.r_[True, cell[1:] != cell[:-1]])
    counts = np.diff(np.r_[starts, len(g)])
    pick = starts + np.floor(quantile * (counts - 1)).astype(np.int64)
    bin_n = np.add.reduceat(n, starts) / counts  # mean size of the bin's messages
    return fit_bins(g[starts], bin_n, t[pick], counts, n_groups)


def fit_bins(bin_group: np.ndarray, bin_n: np.ndarray, bin_t: np.ndarray, counts: np.ndarray,
             n_groups: int) -> HockneyFit:
    """The line of ``fit_hockney`` through size bins given as (group, mean size, time quantile, count),
    ordered by group: from a window's transfers, or from the per-step summaries' sketches."""
    alpha = np.full(n_groups, np.nan)
    beta = np.full(n_groups, np.nan)
    weight = counts / bin_t**2
    sizes = np.bincount(bin_group, minlength=n_groups)
    a, b = _wls_lines(bin_group, bin_n, bin_t, weight, n_groups)
    fitted = (sizes >= 2) & (b > 0) & np.isfinite(b)
    alpha[fitted] = np.maximum(a[fitted], 0.0)  # a negative intercept is noise around 0 latency
    clamped = fitted & (a < 0)
    beta[fitted] = 1.0 / b[fitted]
    # One size only (or a non-positive slope from noise): the effective rate at the sizes seen.
    single = (sizes >= 1) & ~fitted
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = np.bincount(bin_group, weights=weight * bin_n, minlength=n_groups) / np.bincount(
            bin_group, weights=weight * bin_t, minlength=n_groups)
    beta[single] = rate[single]
    return HockneyFit(alpha, beta, sizes, clamped)


def _wls_lines(group: np.ndarray, x: np.ndarray, y: np.ndarray, w: np.ndarray,
               n_groups: int) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares lines y = a + b·x for every group at once (centred sums for accuracy)."""
    sw = np.bincount(group, weights=w, minlength=n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        xm = np.bincount(group, weights=w * x, minlength=n_groups) / sw
        ym = np.bincount(group, weights=w * y, minlength=n_groups) / sw
        dx, dy = x - xm[group], y - ym[group]
        sxx = np.bincount(group, weights=w * dx * dx, minlength=n_groups)
        sxy = np.bincount(group, weights=w * dx * dy, minlength=n_groups)
        b = np.where(sxx > 0, sxy / np.where(sxx > 0, sxx, 1.0), np.nan)
    return ym - b * xm, b

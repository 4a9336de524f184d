"""The Hockney link fit and the modified z-score against outside references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from watchtower.analysis import fit_hockney, hockney_lstsq, modified_z

ALPHA, BETA = 20e-6, 5e9  # 20 µs, 5 GB/s


def _samples(rng: np.random.Generator, noise: float = 0.02, repeats: int = 30) -> tuple[np.ndarray, np.ndarray]:
    sizes = np.repeat(np.geomspace(1e3, 1e8, 16).round(), repeats)
    t = (ALPHA + sizes / BETA) * (1.0 + noise * rng.standard_normal(len(sizes)))
    return sizes, t


def _inflate(rng: np.random.Generator, t: np.ndarray, share: float = 0.3) -> np.ndarray:
    """Add waiting to ``share`` of the transfers: 0.5 to 5 times the transfer itself, plus up to 1 ms."""
    hit = rng.random(len(t)) < share
    return t + hit * (t * rng.uniform(0.5, 5.0, len(t)) + rng.uniform(0.0, 1e-3, len(t)))


def test_lstsq_matches_polyfit_and_linregress(rng: np.random.Generator) -> None:
    # Reference: numpy.polyfit and scipy.stats.linregress fit the same straight line t = α + n·(1/β).
    n, t = _samples(rng)
    alpha, beta = hockney_lstsq(n, t)
    slope, intercept = np.polyfit(n, t, 1)
    lr = stats.linregress(n, t)
    assert alpha == pytest.approx(intercept, rel=1e-9, abs=1e-15)
    assert 1 / beta == pytest.approx(slope, rel=1e-9)
    assert alpha == pytest.approx(lr.intercept, rel=1e-9, abs=1e-15)
    assert 1 / beta == pytest.approx(lr.slope, rel=1e-9)
    # Weighted: numpy.polyfit's w multiplies residuals, ours squared residuals.
    w = 1.0 / t**2
    alpha_w, beta_w = hockney_lstsq(n, t, w)
    slope_w, intercept_w = np.polyfit(n, t, 1, w=np.sqrt(w))
    assert alpha_w == pytest.approx(intercept_w, rel=1e-7)
    assert 1 / beta_w == pytest.approx(slope_w, rel=1e-7)


def test_robust_fit_recovers_clean_link(rng: np.random.Generator) -> None:
    n, t = _samples(rng)
    fit = fit_hockney(np.zeros(len(n), np.int64), n, t, 1)
    # Tolerance: 2 % timer noise and the 25 % quantile bias α and β by about 0.67 × 2 % ≈ 1.3 %.
    assert fit.alpha_s[0] == pytest.approx(ALPHA, rel=0.05)
    assert fit.beta_Bps[0] == pytest.approx(BETA, rel=0.05)
    assert fit.sizes[0] == 16


def test_robust_fit_survives_waiting_where_least_squares_does_not(rng: np.random.Generator) -> None:
    n, t = _samples(rng)
    t_wait = _inflate(rng, t)
    fit = fit_hockney(np.zeros(len(n), np.int64), n, t_wait, 1)
    # Stated tolerance: within 5 % of the true α and β with 30 % of transfers inflated by waiting.
    assert fit.alpha_s[0] == pytest.approx(ALPHA, rel=0.05)
    assert fit.beta_Bps[0] == pytest.approx(BETA, rel=0.05)
    # Plain least squares (as numpy.polyfit) recovers β on the clean data but not on the inflated data,
    # and relative-weighted least squares through all points does worse than the lower envelope.
    assert 1 / np.polyfit(n, t, 1)[0] == pytest.approx(BETA, rel=0.05)
    slope, _ = np.polyfit(n, t_wait, 1)
    assert abs(1 / slope / BETA - 1) > 0.2
    _, beta_w = hockney_lstsq(n, t_wait, 1.0 / t_wait**2)
    assert abs(beta_w / BETA - 1) > abs(fit.beta_Bps[0] / BETA - 1)


def test_fit_many_links_at_once(rng: np.random.Generator) -> None:
    betas = np.array([1e9, 2e9, 4e9, 0.5e9])
    sizes = np.tile(np.geomspace(1e4, 1e7, 8), 10)
    group = np.repeat(np.arange(4), len(sizes))
    n = np.tile(sizes, 4)
    t = 10e-6 + n / betas[group]
    fit = fit_hockney(group, n, t, 5)  # group 4 has no transfers
    assert fit.beta_Bps[:4] == pytest.approx(betas, rel=1e-9)
    assert fit.alpha_s[:4] == pytest.approx(np.full(4, 10e-6), rel=1e-6)
    assert np.isnan(fit.beta_Bps[4]) and fit.sizes[4] == 0


def test_single_size_gives_effective_rate() -> None:
    n = np.full(10, 1e6)
    t = np.full(10, 1e-4 + 1e6 / 1e9)
    fit = fit_hockney(np.zeros(10, np.int64), n, t, 1)
    assert np.isnan(fit.alpha_s[0])
    assert fit.beta_Bps[0] == pytest.approx(1e6 / (1e-4 + 1e-3))


def test_modified_z_matches_scipy_mad(rng: np.random.Generator) -> None:
    # Iglewicz & Hoaglin (1993): M = 0.6745 (x − median)/MAD; 0.6745 ≈ 1/1.4826, and
    # scipy.stats.median_abs_deviation(scale="normal") is MAD × 1.4826, so M = (x − median)/that.
    x = rng.standard_normal(101)
    x[:3] = [-9.0, 7.5, 12.0]
    expected = (x - np.median(x)) / stats.median_abs_deviation(x, scale="normal")
    assert modified_z(x) == pytest.approx(expected, rel=2e-4)
    assert np.abs(modified_z(x)[:3]).min() > 3.5


def test_modified_z_when_mad_is_zero() -> None:
    # Iglewicz & Hoaglin (1993) fall back to the mean absolute deviation × 1.253314 when MAD = 0.
    # Ten equal links and one at half their value: deviations (0 ×10, −1), mean AD = 1/11,
    # so M = −1 / (1.253314 / 11) = −8.777 by hand.
    x = np.r_[np.full(10, 2.0), 1.0]
    assert modified_z(x)[-1] == pytest.approx(-11 / 1.253314)
    assert modified_z(np.full(5, 3.0)) == pytest.approx(np.zeros(5))
    # The scale floor stops jitter on an otherwise even fleet from scoring as an outlier.
    jitter = np.r_[np.full(10, 1.0), 1.0 + 1e-9]
    assert abs(modified_z(jitter, min_scale=0.02)[-1]) < 1e-6


def test_modified_z_keeps_nan() -> None:
    z = modified_z(np.array([1.0, np.nan, 2.0, 3.0]))
    assert np.isnan(z[1]) and np.isfinite(z[[0, 2, 3]]).all()

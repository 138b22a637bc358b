"""Median, MAD and counts read from per-pixel histograms, against numpy/scipy on the samples themselves, and the
standard errors against the spread of repeated Gaussian samples (numpy) and the textbook quantile variance."""

import numpy as np
import pytest
from scipy import stats

from trackfit.pixels.robust import (
    MAD_TO_SIGMA,
    MEDIAN_STANDARD_ERROR,
    SIGMA_STANDARD_ERROR,
    clipped_noise,
    count_above,
    histogram_median_mad,
    histogram_quantile,
    lower_quantile,
    small_sample_factor,
)

N_BINS, FIRST_EDGE = 96, -47


def histogram(values, first_edge=FIRST_EDGE, bin_width=1, n_bins=N_BINS):
    """Rows of integer values -> the kernel's histogram layout (underflow, regular bins, overflow)."""
    values = np.asarray(values)
    bins = np.clip(np.floor_divide(values - first_edge, bin_width) + 1, 0, n_bins - 1)
    hist = np.zeros((values.shape[0], n_bins), np.uint32)
    np.add.at(hist, (np.repeat(np.arange(values.shape[0]), values.shape[1]), bins.ravel()), 1)
    return hist


def test_constants_against_scipy():
    # 1 / Phi^-1(3/4) (scipy.stats.norm)
    assert MAD_TO_SIGMA == pytest.approx(1 / stats.norm.ppf(0.75), rel=1e-12)
    # sample-median variance pi sigma^2 / (2 n) = 1 / (4 n f(0)^2); MAD: p(1-p) / (n g(MAD)^2) with g the density
    # of |X - median| (textbook asymptotic variance of sample quantiles)
    assert MEDIAN_STANDARD_ERROR == pytest.approx(np.sqrt(0.25) / stats.norm.pdf(0), rel=1e-12)
    g = 2 * stats.norm.pdf(stats.norm.ppf(0.75))
    assert SIGMA_STANDARD_ERROR == pytest.approx(MAD_TO_SIGMA * 0.5 / g, rel=1e-12)


def test_median_and_mad_of_continuous_samples_match_numpy_and_scipy():
    # samples on a fine grid (0.01 count): the histogram of 0.01-wide bins is the samples themselves
    rng = np.random.default_rng(1)
    x = rng.normal(0.3, 5.0, size=(200, 301))
    values = np.rint(x * 100).astype(np.int64)
    n, median, mad, outside = histogram_median_mad(histogram(values, -4000, 1, 8002), -4000, 1)
    assert np.all(outside == 0) and np.all(n == 301)
    np.testing.assert_allclose(median / 100, np.median(values / 100, axis=1), atol=0.02)
    expected = stats.median_abs_deviation(values / 100, axis=1)  # scipy, the same definition of the MAD
    np.testing.assert_allclose(mad / 100, expected, rtol=0.01)


@pytest.mark.parametrize("sigma", [0.7, 1.4, 2.0, 2.6])
def test_rounded_gaussian_noise_gives_unbiased_estimates(sigma):
    # integer-rounded Gaussian samples (numpy): the interpolated median and MAD have no rounding bias
    rng = np.random.default_rng(int(sigma * 10))
    n = 400
    mu = rng.uniform(-1, 1, 3000)
    values = np.rint(mu[:, None] + sigma * rng.standard_normal((3000, n))).astype(np.int64)
    _, median, mad, _ = histogram_median_mad(histogram(values), FIRST_EDGE, 1)
    noise = MAD_TO_SIGMA * mad * small_sample_factor(n)
    assert np.mean((median - mu) / sigma) == pytest.approx(0.0, abs=0.01)
    assert np.mean(noise / sigma) == pytest.approx(1.0, abs=0.006)
    # spread of the estimates against the standard errors (asymptotic formulas): pulls with sd near 1
    pull_pedestal = (median - mu) / (MEDIAN_STANDARD_ERROR * sigma / np.sqrt(n))
    pull_noise = (noise - sigma) / (SIGMA_STANDARD_ERROR * sigma / np.sqrt(n))
    assert 0.85 < pull_pedestal.std() < 1.1
    assert 0.8 < pull_noise.std() < 1.1


def test_small_sample_factor_removes_the_bias_at_50_samples():
    # Croux & Rousseeuw 1992 (from memory): the MAD of n Gaussian samples is low by about 0.8 / n
    rng = np.random.default_rng(5)
    values = np.rint(2.0 * rng.standard_normal((40000, 50))).astype(np.int64)
    _, _, mad, _ = histogram_median_mad(histogram(values), FIRST_EDGE, 1)
    raw = MAD_TO_SIGMA * mad / 2.0
    corrected = raw * small_sample_factor(50)
    assert raw.mean() < 0.985
    assert corrected.mean() == pytest.approx(1.0, abs=0.008)


def test_quantiles_and_outside_flags():
    rng = np.random.default_rng(2)
    values = np.rint(rng.normal(3.0, 4.0, (500, 800))).astype(np.int64)
    q25, out = histogram_quantile(histogram(values), FIRST_EDGE, 1, 0.25)
    assert np.all(out == 0)
    # Gaussian lower quartile (scipy.stats.norm), within a few standard errors of a sample quantile
    assert np.mean(q25) == pytest.approx(stats.norm.ppf(0.25, 3.0, 4.0), abs=0.05)
    high = np.full((3, 10), 500)
    n, median, mad, outside = histogram_median_mad(histogram(high), FIRST_EDGE, 1)
    assert np.all(outside == 1) and np.all(np.isnan(median)) and np.all(np.isnan(mad))
    low = np.full((3, 10), -500)
    assert np.all(histogram_median_mad(histogram(low), FIRST_EDGE, 1)[3] == -1)
    empty = np.zeros((2, N_BINS), np.uint32)
    n, median, mad, outside = histogram_median_mad(empty, FIRST_EDGE, 1)
    assert np.all(n == 0) and np.all(np.isnan(median)) and np.all(outside == 0)


@pytest.mark.parametrize("threshold", [-3.7, 0.0, 2.5, 4.49, 9.0, 46.2, 80.0])
def test_count_above_is_exact_for_unit_bins(threshold):
    rng = np.random.default_rng(3)
    values = np.rint(rng.normal(0.0, 8.0, (50, 300))).astype(np.int64)
    values[:, :5] = 400  # above the range: counted above any threshold
    counted = count_above(histogram(values), FIRST_EDGE, 1, np.full(50, threshold))
    if threshold < FIRST_EDGE + N_BINS - 2:
        np.testing.assert_array_equal(counted, (values > threshold).sum(axis=1))  # numpy count
    assert np.all(count_above(histogram(values), FIRST_EDGE, 1, np.full(50, np.nan)) == 0)


@pytest.mark.parametrize("share", [0.0, 0.3, 0.6, 0.8])
def test_lower_quantile_ignores_one_sided_contamination(share):
    rng = np.random.default_rng(4)
    k = 64
    noise = np.rint(rng.normal(700.0, 2.0, (2000, k)))
    tracks = rng.uniform(750, 3000, (2000, k))
    contaminated = rng.random((2000, k)) < share  # samples that carry track charge, always above the pedestal
    store = np.where(contaminated, tracks, noise).astype(np.int16)
    low = lower_quantile(store, np.full(2000, 70), 0.05)
    # between 1.645 sigma below the pedestal (scipy.stats.norm.ppf(0.05)) and the pedestal, up to sampling noise
    lower = 700 + stats.norm.ppf(0.05) * 2.0
    near = (low > lower - 5) & (low < 700 + 5)
    # it breaks down only for the rare pixels with fewer than about 5 noise samples among 64 (binomial tail)
    assert near.mean() >= (1.0 if share <= 0.6 else 0.99)
    if share == 0.0:
        np.testing.assert_allclose(low, np.quantile(store, 0.05, axis=1))  # numpy's linear quantile
    partial = lower_quantile(store, np.array([0, 1] + [k] * 1998))
    assert np.isnan(partial[0]) and partial[1] == store[1, 0]


def test_clipped_noise_of_noise_with_tracks():
    rng = np.random.default_rng(6)
    values = np.concatenate([rng.normal(0, 3.0, 90000), rng.uniform(20, 2000, 10000)])
    assert clipped_noise(values) == pytest.approx(3.0, rel=0.03)
    assert clipped_noise(np.zeros(100)) == 0.0

"""Log-sum-of-kernel curve, its slope and the settings recommendation."""

import numpy as np
import pytest
from scipy.spatial.distance import pdist, squareform
from scipy.special import erf, ive
from sklearn.datasets import load_digits

from eigenstream.config import GraphConfig, KernelConfig
from eigenstream.core.neighbors import exact_knn
from eigenstream.core.tuning import (
    bandwidth_range,
    dimension_from_slope,
    kernel_sum_curve,
    kernel_sum_slope,
    recommend,
)


def _circle_slope(eps):
    # methods.md §9.8 [derived]: unit circle, uniform, z = 2/eps: S/n^2 = e^-z I0(z), so
    # d log S / d log eps = z (1 - I1(z)/I0(z)) (ive = exponentially scaled Bessel I).
    z = 2.0 / eps
    return z * (1.0 - ive(1, z) / ive(0, z))


def _square_slope(eps):
    # methods.md §9.8 [derived]: unit square, per axis g = sqrt(pi eps) erf(1/sqrt eps) -
    # eps (1 - e^(-1/eps)); slope = 2 dlog g / dlog eps (central difference, step 1e-5).
    def log_g(e):
        return np.log(np.sqrt(np.pi * e) * erf(1 / np.sqrt(e)) - e * (1 - np.exp(-1 / e)))

    h = 1e-5
    return 2 * (log_g(eps * np.exp(h)) - log_g(eps * np.exp(-h))) / (2 * h)


def test_circle_slope_matches_bessel_formula(rng):
    # n = 3000 uniform angles, dense distance matrix, diagonal included; tolerance 0.02
    # (methods.md §9.8: sample curves match within 0.015 for eps in [1e-2, 1]).
    theta = rng.uniform(0, 2 * np.pi, 3000)
    dense = squareform(pdist(np.c_[np.cos(theta), np.sin(theta)]))
    eps = np.geomspace(0.02, 20, 40)
    slope = kernel_sum_slope(np.log(eps), kernel_sum_curve(dense, eps))
    check = (eps >= 0.05) & (eps <= 3.0)
    np.testing.assert_allclose(slope[check], _circle_slope(eps[check]), atol=0.02)
    # Small-eps linear region: slope ~ 1/2 (d = 1); overshoot max 0.609 near eps = 1.18.
    assert np.all(np.abs(slope[(eps >= 0.05) & (eps <= 0.1)] - 0.5) < 0.02)
    assert slope.max() == pytest.approx(0.609, abs=0.02)
    assert 0.8 < eps[np.argmax(slope)] < 1.6


def test_square_in_ten_dimensions_has_slope_near_one(rng):
    # Unit square mapped isometrically into R^10 (random orthonormal 10x2). d/2 = 1, but the
    # boundary keeps the continuum slope below 1 (0.94 at eps = 0.01, methods.md §9.8) and at
    # small eps the diagonal pulls the sample slope down: expect a maximum about 0.93 (n = 3000).
    basis, _ = np.linalg.qr(rng.normal(size=(10, 2)))
    X = rng.uniform(size=(3000, 2)) @ basis.T
    eps = np.geomspace(1e-4, 10, 41)
    slope = kernel_sum_slope(np.log(eps), kernel_sum_curve(pdist(X), eps))
    assert 0.85 <= slope.max() <= 1.15
    check = (eps >= 0.02) & (eps <= 1.0)
    np.testing.assert_allclose(slope[check], _square_slope(eps[check]), atol=0.02)
    assert dimension_from_slope(slope.max()) == pytest.approx(2 * slope.max())


def test_layouts_agree_and_limits_hold(rng):
    X = rng.normal(size=(60, 3))
    cond = pdist(X)
    dense = squareform(cond)
    eps = np.geomspace(1e-4, 1e4, 30)
    log_s = kernel_sum_curve(dense, eps)
    np.testing.assert_array_equal(kernel_sum_curve(cond, eps), log_s)
    # kNN lists with k = n - 1 hold every ordered pair once: the same sum as the dense matrix.
    _, knn = exact_knn(X, 59)
    np.testing.assert_allclose(kernel_sum_curve(knn, eps), log_s, rtol=1e-13)
    # Direct sum, with and without the diagonal.
    direct = [np.log(np.exp(-(dense**2) / e).sum()) for e in eps[10:]]
    np.testing.assert_allclose(log_s[10:], direct, rtol=1e-12)
    off = kernel_sum_curve(dense, eps, include_self=False)
    np.testing.assert_allclose(np.exp(off[10:]), np.exp(log_s[10:]) - 60, rtol=1e-9)
    # methods.md §2.4 limits: S -> n (diagonal only) as eps -> 0, S -> n^2 as eps -> inf.
    assert log_s[0] == pytest.approx(np.log(60), abs=1e-9)
    assert log_s[-1] == pytest.approx(np.log(60**2), abs=1e-3)
    assert np.isfinite(off).all()  # no log(0) even where every term underflows


def test_slope_of_power_law_is_its_exponent():
    # log S = a log eps + c has slope a everywhere, on an uneven grid too.
    log_eps = np.log(np.array([0.01, 0.02, 0.1, 0.3, 2.0, 5.0]))
    np.testing.assert_allclose(kernel_sum_slope(log_eps, 1.5 * log_eps + 4.0), 1.5, rtol=1e-12)
    with pytest.raises(ValueError):
        kernel_sum_slope(log_eps[::-1], log_eps)


def test_bandwidth_range_is_the_run_around_the_peak():
    eps = np.geomspace(1e-3, 1e3, 13)
    slopes = np.array([0.0, 0.1, 0.3, 0.6, 0.9, 1.0, 0.8, 0.55, 0.4, 0.2, 0.6, 0.1, 0.0])
    # Peak 1.0 at index 5; >= 0.5 from index 3 to 7; the later 0.6 is a separate run.
    assert bandwidth_range(eps, slopes) == (eps[3], eps[7], eps[5])
    assert bandwidth_range(eps, slopes, fraction=0.25) == (eps[2], eps[8], eps[5])


def test_recommend_on_digits():
    # methods.md §9.6/§9.8 (measured): Levina-Bickel inverse average 7.09; 2 x max slope 5.10 at
    # eps = 424 (median r_10^2 = 524).
    rec = recommend(load_digits().data)
    assert rec["intrinsic_dimension"] == pytest.approx(7.09, abs=0.01)
    assert rec["slope_dimension"] == pytest.approx(5.10, abs=0.1)
    low, high = rec["bandwidth_range"]
    best = rec["bandwidth_best"]
    assert np.isfinite([low, high, best]).all() and 0 < low < best < high
    assert best**2 == pytest.approx(424, rel=0.25)  # sigma units: eps = sigma^2
    curve = rec["curve"]
    assert len(curve["eps"]) == len(curve["log_sum"]) == len(curve["slope"])
    assert max(curve["slope"]) == pytest.approx(rec["slope_dimension"] / 2)
    settings = rec["recommended"]
    graph = GraphConfig(**settings["graph"])  # the suggestion is a valid configuration
    kernel = KernelConfig(**settings["kernel"])
    assert graph.neighbors == 30  # 5 x 7 exceeds the grid: the largest connected candidate
    assert kernel.alpha == 1.0
    assert set(rec["reasons"]) >= {"neighbors", "bandwidth", "bandwidth_neighbor", "alpha"}
    assert rec["components"] == {10: 1, 15: 1, 30: 1}  # methods.md §1: digits k >= 10 connected


def test_recommend_uniform_square_vs_gaussian_blob(rng):
    # Uniform density -> one global sigma = median r_k (methods.md §2.1, common practice);
    # a Gaussian blob's density varies a lot -> per-row (self-tuning) bandwidths.
    square = rng.uniform(size=(1500, 2))
    rec = recommend(square)
    assert rec["intrinsic_dimension"] == pytest.approx(2, abs=0.1)
    assert rec["recommended"]["graph"]["neighbors"] == 10  # 5 x round(d) = 10
    sigma = rec["recommended"]["kernel"]["bandwidth"]
    _, dist = exact_knn(square, 10)
    assert sigma == pytest.approx(np.sqrt(np.median(dist[:, 9] ** 2)), rel=1e-12)
    # A sample standing for 100x more rows: kNN radii shrink like n^(-1/d).
    scaled = recommend(square, n_rows=150_000)["recommended"]["kernel"]["bandwidth"]
    assert scaled == pytest.approx(sigma * 100 ** (-1 / rec["intrinsic_dimension"]), rel=1e-9)
    blob = recommend(rng.normal(size=(1500, 2)))
    assert blob["recommended"]["kernel"]["bandwidth"] == "adaptive"
    assert blob["recommended"]["kernel"]["bandwidth_neighbor"] == 7

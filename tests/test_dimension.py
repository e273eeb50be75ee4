"""Levina-Bickel intrinsic dimension against uniform samples and its Poisson-model law."""

import numpy as np
import pytest
from sklearn.datasets import load_digits

from eigenstream.core.dimension import levina_bickel, levina_bickel_per_k
from eigenstream.core.neighbors import exact_knn
from eigenstream.errors import InputError


def _sphere(rng, n, d):
    g = rng.normal(size=(n, d + 1))  # normalized Gaussians are uniform on S^d
    return g / np.linalg.norm(g, axis=1, keepdims=True)


@pytest.mark.parametrize("d", [2, 3, 5])
def test_uniform_sphere_within_ten_percent(rng, d):
    # Levina & Bickel 2005, k = 10..20; methods.md §9.9 measured (n = 2000, inverse average):
    # S^2 1.99, S^3 3.01, S^5 4.86. Sample size n = 2000.
    _, dist = exact_knn(_sphere(rng, 2000, d), 20)
    est = levina_bickel(dist)
    assert abs(est - d) <= 0.1 * d
    if d <= 3:
        assert abs(est - d) <= 0.1  # methods.md §9.9 pass bar for spheres, d <= 3


@pytest.mark.parametrize("d", [2, 3])
def test_uniform_cube_within_ten_percent(rng, d):
    # methods.md §9.9 measured (n = 2000): cube 1.96 (d=2), 2.86 (d=3); the boundary biases low.
    _, dist = exact_knn(rng.uniform(size=(2000, d)), 20)
    est = levina_bickel(dist)
    assert abs(est - d) <= 0.1 * d
    assert est < d  # boundary effect: fewer neighbours than the interior law predicts


@pytest.mark.parametrize("d", [1, 2, 5, 10])
def test_exact_poisson_law_is_recovered(rng, d):
    # Levina & Bickel's local model (methods.md §6, derived): ball volumes to the j-th neighbour
    # are partial sums of Exp(1) gaps, so T_j = (sum of j gaps)^(1/d) and S_k/(k-1) has mean 1/d
    # exactly (sd 1/(d sqrt(k-1)) per row). n = 20000 rows; 4 standard errors at k = 10.
    n = 20000
    T = np.cumsum(rng.exponential(size=(n, 20)), axis=1) ** (1.0 / d)
    assert levina_bickel(T) == pytest.approx(d, rel=4 / np.sqrt(n * 9))


def test_per_k_formula_and_average(rng):
    # Direct evaluation of m_k = [mean_x (1/(k-1)) sum_{j<k} log(T_k/T_j)]^-1 (methods.md §6).
    _, dist = exact_knn(rng.normal(size=(300, 4)), 20)
    per_k = levina_bickel_per_k(dist, [12, 5, 20])
    assert list(per_k) == [12, 5, 20]
    for k, value in per_k.items():
        s = np.array([sum(np.log(row[k - 1] / row[j]) for j in range(k - 1)) for row in dist])
        assert value == pytest.approx(1.0 / np.mean(s / (k - 1)), rel=1e-12)
    full = levina_bickel_per_k(dist, range(10, 21))
    assert levina_bickel(dist) == pytest.approx(np.mean(list(full.values())), rel=1e-14)


def test_digits_published_value():
    # methods.md §9.6/§9.9 measured: sklearn digits, inverse average over k = 10..20 -> 7.09.
    _, dist = exact_knn(load_digits().data, 20)
    assert levina_bickel(dist) == pytest.approx(7.09, abs=0.01)


def test_duplicate_rows_are_left_out_and_bad_input_rejected(rng):
    _, dist = exact_knn(rng.normal(size=(200, 3)), 20)
    with_dup = np.vstack([np.r_[0.0, dist[0, 1:]], dist])  # a row with a duplicate neighbour
    assert levina_bickel(with_dup) == levina_bickel(dist)
    with pytest.raises(InputError):
        levina_bickel(np.zeros((5, 20)))
    with pytest.raises(ValueError, match="sorted"):
        levina_bickel(dist[:, ::-1])
    with pytest.raises(ValueError):
        levina_bickel(dist, k_max=25)
    with pytest.raises(ValueError):
        levina_bickel_per_k(dist, [1])

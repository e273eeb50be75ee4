"""Harmonic-eigenvector residuals: analytic eigenfunctions, scikit-learn, the definition."""

import tracemalloc
import warnings

import numpy as np
import pytest
from scipy.spatial.distance import pdist
from scipy.stats import spearmanr
from sklearn.datasets import make_swiss_roll
from sklearn.linear_model import LinearRegression
from sklearn.manifold import SpectralEmbedding

from eigenstream.core import harmonics
from eigenstream.core.harmonics import choose_coordinates, harmonic_residuals

LONG, SHORT = 4.0, 1.0  # Neumann rectangle side lengths, L1/L2 = 4


def _rectangle_modes(tie_order):
    """First six non-constant Neumann modes (a, b), ordered by a^2/L1^2 + b^2/L2^2.

    (4, 0) and (0, 1) share the eigenvalue pi^2 at L1/L2 = 4; ``tie_order`` picks which comes first.
    """
    pairs = [(a, b) for a in range(8) for b in range(3) if (a, b) != (0, 0)]
    level = {ab: ab[0] ** 2 / LONG**2 + ab[1] ** 2 / SHORT**2 for ab in pairs}
    return sorted(pairs, key=lambda ab: (level[ab], ab[0] if tie_order == "a" else ab[1]))[:6]


def _rectangle_columns(n, seed, modes):
    # methods.md §9.2 (standard): Neumann eigenfunctions cos(a pi x/L1) cos(b pi y/L2).
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(0, LONG, n), rng.uniform(0, SHORT, n)
    return np.column_stack(
        [np.cos(a * np.pi * x / LONG) * np.cos(b * np.pi * y / SHORT) for a, b in modes]
    )


@pytest.mark.parametrize("tie_order", ["a", "b"])
def test_neumann_rectangle_flags_long_direction_harmonics(tie_order):
    modes = _rectangle_modes(tie_order)
    r = harmonic_residuals(_rectangle_columns(2000, 11, modes))
    at = {ab: r[modes.index(ab)] for ab in modes}
    # Analytic: (0,1) does not depend on x, so no function of the earlier (a,0) columns fits it.
    # Measured 1.00 (seeds 0..3 and 11, both tie orders); bar 0.9 leaves a 10% margin.
    assert at[(1, 0)] == 1.0 and at[(0, 1)] > 0.9
    # Chebyshev: cos(a t) = T_a(cos t), so each (a,0) with a >= 2 is a function of (1,0); (1,1) is
    # the product (1,0)*(0,1). Measured 0.049-0.074 for (2..4,0), 0.009-0.010 for (1,1) (seeds
    # 0..3 and 11); bar 0.15 is about twice the largest. A local linear fit of a curved function keeps
    # an O(bandwidth^2) bias, so these do not reach 0.
    for harmonic in [(2, 0), (3, 0), (4, 0), (1, 1)]:
        assert at[harmonic] < 0.15, (harmonic, r)
    chosen = choose_coordinates(r, 2)
    assert chosen.tolist() == [modes.index((1, 0)), modes.index((0, 1))]


def test_swiss_roll_selection_contains_arc_length_and_height():
    # methods.md §9.5 (measured): on make_swiss_roll, scikit-learn's SpectralEmbedding puts t in
    # component 1 (|Spearman| 1.000) and the height first at component 4; pass bars from §9.5.
    X, t = make_swiss_roll(n_samples=2000, noise=0, random_state=0)
    emb = SpectralEmbedding(
        n_components=8, n_neighbors=15, affinity="nearest_neighbors", random_state=0
    ).fit_transform(X)
    height = [abs(spearmanr(emb[:, j], X[:, 1])[0]) for j in range(emb.shape[1])]
    assert abs(spearmanr(emb[:, 0], t)[0]) >= 0.99  # §9.5 bar; measured 0.999
    assert max(height) >= 0.65  # §9.5 bar; measured 0.831 at column 3
    r = harmonic_residuals(emb)
    # Measured r = 1.00 0.067 0.059 0.934 0.071 0.225 0.029 0.070; §9.5's own pipeline also
    # selects psi_1 and psi_4.
    assert choose_coordinates(r, 2).tolist() == [0, int(np.argmax(height))]


def _reference_residuals(vectors, scale=3.0):
    # Definition (Dsilva et al., ACHA 2018; methods.md §3.6) evaluated row by row with
    # scikit-learn's LinearRegression(sample_weight) and scipy's pdist for the bandwidth.
    out = [1.0]
    for k in range(1, vectors.shape[1]):
        earlier, target = vectors[:, :k], vectors[:, k]
        width = np.median(pdist(earlier)) / scale
        fit = np.empty(len(target))
        for i in range(len(target)):
            w = np.exp(-np.sum((earlier - earlier[i]) ** 2, axis=1) / width**2)
            w[i] = 0.0
            model = LinearRegression().fit(earlier, target, sample_weight=w)
            fit[i] = model.predict(earlier[i : i + 1])[0]
        out.append(np.linalg.norm(target - fit) / np.linalg.norm(target))
    return np.array(out)


@pytest.mark.parametrize("scratch", [None, 10_000])
def test_matches_row_by_row_weighted_least_squares(rng, monkeypatch, scratch):
    # 10_000 bytes forces blocks of 7-8 rows with a ragged last block.
    if scratch is not None:
        monkeypatch.setattr(harmonics, "_SCRATCH_BYTES", scratch)
    s = rng.uniform(0, 1, 150)
    vectors = np.column_stack(
        [np.cos(np.pi * s), rng.normal(size=150), np.cos(2 * np.pi * s), rng.normal(size=150)]
    )
    vectors[:, 2] += 0.05 * rng.normal(size=150)
    # Measured agreement <= 1e-9 at scale 3 and 1.5 (float64 round-off through the local normal
    # equations). Narrow kernels (scale 6 here) leave rows with one or two effective neighbours
    # and Gram condition numbers ~1e10; there the fits differ by ~1e-4, so they are not compared.
    for scale in (3.0, 1.5):
        np.testing.assert_allclose(
            harmonic_residuals(vectors, scale=scale),
            _reference_residuals(vectors, scale),
            rtol=0,
            atol=1e-7,
        )


def test_independent_noise_columns_are_new_directions(rng):
    # Derived: leave-one-out makes fit_i independent of an i.i.d. zero-mean target y_i, so
    # E||y - fit||^2 = E||y||^2 + E||fit||^2 and r >= 1 in expectation. Measured 1.004-1.20 (seeds
    # 0..3); with the row's own weight left in, the fit chases y_i and r fell to 0.64-0.86.
    r = harmonic_residuals(rng.normal(size=(400, 6)))
    assert np.all(r[1:] > 0.95), r


def test_invariant_to_global_scale_and_signs(rng):
    # Derived from the definition: a common factor scales distances and bandwidth alike, sign
    # flips keep distances, and the fit is linear in the target, so r cannot change.
    vectors = _rectangle_columns(400, 3, _rectangle_modes("a"))
    base = harmonic_residuals(vectors)
    flipped = vectors * np.array([1, -1, 1, -1, -1, 1]) * 37.5
    np.testing.assert_allclose(harmonic_residuals(flipped), base, rtol=0, atol=1e-9)
    rescaled = vectors.copy()
    rescaled[:, -1] *= 1e-3  # the last column is only ever a target
    np.testing.assert_allclose(harmonic_residuals(rescaled), base, rtol=0, atol=1e-9)


def test_sampling_reproducible_and_close_to_full_sample():
    vectors = _rectangle_columns(3000, 7, _rectangle_modes("a"))
    full = harmonic_residuals(vectors, sample=3000)
    first = harmonic_residuals(vectors, sample=1500, seed=4)
    np.testing.assert_array_equal(first, harmonic_residuals(vectors, sample=1500, seed=4))
    other = harmonic_residuals(vectors, sample=1500, seed=5)
    assert not np.array_equal(first, other)  # the seed decides which rows are used
    # Measured max |r_sample - r_full| = 0.0009-0.0033 over seeds 0..4 (sample 1500 of 3000);
    # tolerance 0.02 leaves about 6x margin.
    for r in (first, other):
        np.testing.assert_allclose(r, full, rtol=0, atol=0.02)
    # With n <= sample every row is used, so the seed cannot matter.
    np.testing.assert_array_equal(harmonic_residuals(vectors, seed=9), full)


def test_scratch_memory_stays_bounded():
    # Requirement of the brief: leave-one-out fits in blocks, scratch under ~64 MiB at sample=3000.
    vectors = np.random.default_rng(5).normal(size=(3000, 4))
    tracemalloc.start()
    try:
        harmonic_residuals(vectors)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 64 * 2**20  # measured 34 MiB (m = 8) and 45 MiB (m = 20)


def test_zero_column_and_trivial_shapes(rng):
    vectors = rng.normal(size=(50, 3))
    vectors[:, 1] = 0.0
    r = harmonic_residuals(vectors)
    assert r[0] == 1.0 and r[1] == 0.0 and r[2] > 0  # zero column: r = 0 by the documented rule
    assert harmonic_residuals(vectors[:, :1]).tolist() == [1.0]
    assert harmonic_residuals(vectors[:, :0]).shape == (0,)


@pytest.mark.parametrize(
    "bad",
    [np.zeros(5), np.zeros((1, 2)), np.array([[0.0, 1.0], [np.nan, 2.0]])],
)
def test_rejects_malformed_vectors(bad):
    with pytest.raises(ValueError):
        harmonic_residuals(bad)


def test_rejects_bad_sample_and_scale(rng):
    vectors = rng.normal(size=(10, 2))
    with pytest.raises(ValueError):
        harmonic_residuals(vectors, sample=1)
    with pytest.raises(ValueError):
        harmonic_residuals(vectors, scale=0.0)


def test_choose_coordinates_ties_and_column_zero():
    # API contract: column 0 always kept, largest residuals next, equal residuals -> lower index.
    r = np.array([1.0, 0.4, 0.9, 0.9, 0.95])
    assert choose_coordinates(r, 1).tolist() == [0]
    assert choose_coordinates(r, 2).tolist() == [0, 4]
    assert choose_coordinates(r, 3).tolist() == [0, 2, 4]
    assert choose_coordinates(r, 4).tolist() == [0, 2, 3, 4]
    assert choose_coordinates([0.1, 0.5, 0.2], 2).tolist() == [0, 1]  # 0 kept though smallest
    assert choose_coordinates([1.0, 0.3, 0.3, 0.3], 3).tolist() == [0, 1, 2]
    assert choose_coordinates(r, 3).dtype.kind == "i"


@pytest.mark.parametrize("count", [0, -1, 6])
def test_choose_coordinates_rejects_count_out_of_range(count):
    with pytest.raises(ValueError, match="count must be between 1 and 5"):
        choose_coordinates(np.ones(5), count)


def _strip_table(tmp_path, n=1500, seed=5):
    """An invented flat 3.5 x 1 strip of sensor readings, rotated into 6 columns, small noise."""
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(0, 3.5, n), rng.uniform(0, 1.0, n)
    rotation = np.linalg.qr(rng.standard_normal((6, 6)))[0][:2]
    X = np.c_[x, y] @ rotation + 0.005 * rng.standard_normal((n, 6))
    np.save(tmp_path / "strip.npy", X)
    return y


def _run_strip(tmp_path, choose_from):
    import eigenstream

    cfg = {
        "input": {"path": str(tmp_path / "strip.npy")},
        "graph": {"neighbors": 12},
        "embedding": {"components": 2, "choose_from": choose_from},
        "run": {"workdir": str(tmp_path / f"w{choose_from}")},
        "cluster": {"workers": 1},
    }
    return eigenstream.run(cfg, progress=False)


def test_run_keeps_the_short_direction_of_a_strip(tmp_path):
    # methods.md §9.2 (Neumann rectangle, standard): on a 3.5 x 1 strip the first three
    # non-trivial eigenfunctions are cos(a pi x/3.5), a = 1..3, and the short direction y
    # first appears at the fourth. The leading pair is then two harmonics of x; choosing among
    # the leading five must keep eigenvectors 1 and 4 (Dsilva et al. 2018).
    y = _strip_table(tmp_path)
    leading = _run_strip(tmp_path, 0)
    Y0 = np.asarray(leading.coordinates[...])
    assert abs(spearmanr(Y0[:, 1], y)[0]) < 0.3  # leading pair: no short direction
    chosen = _run_strip(tmp_path, 5)
    summary = chosen._wd.stage_state("solve")["summary"]
    assert summary["eigenvectors_kept"] == [1, 4]
    assert len(summary["candidate_harmonic_residuals"]) == 5 and len(summary["candidate_eigenvalues"]) == 5
    Y = np.asarray(chosen.coordinates[...])
    assert abs(spearmanr(Y[:, 1], y)[0]) > 0.9
    # the kept pairs are the solved pairs 1 and 4, with their own eigenvalues
    assert np.allclose(chosen.eigenvalues, np.asarray(summary["candidate_eigenvalues"])[[0, 3]])
    assert "Kept eigenvectors [1, 4]" in (chosen._wd.path / "report.html").read_text()
    # the quality stage flags the leading pair's second coordinate as a harmonic, not the kept
    verdicts = [
        {c["name"]: c["status"] for c in run._wd.stage_state("quality")["summary"]["checks"]}
        for run in (leading, chosen)
    ]
    assert [v["harmonic_residual"] for v in verdicts] == ["warn", "pass"]


def test_isolated_rows_and_indicator_like_vectors_stay_finite(rng):
    # Definition (Dsilva et al. 2018): an unpredictable column has r near 1. Here the earlier
    # vector is indicator-like, as for well separated groups: most rows crowd one value, a
    # small group sits far away, and a chain of rows ~27 bandwidths apart has kernel weights in
    # the subnormal range (exp(-27^2) ~ 1e-317). Found on an invented table of household load
    # profiles, where the residual came out infinite with an overflow warning.
    body = np.r_[rng.uniform(-0.45, -0.43, 2700), 2.3 + 1e-4 * rng.standard_normal(290)]
    width = np.median(pdist(body[:, None])) / 3  # harmonics' bandwidth rule, applied by hand
    for _ in range(3):  # the chain shifts the median a little; settle it
        chain = 3.0 + np.cumsum(np.linspace(26.8, 27.2, 10)) * width
        first = np.r_[body, chain]
        width = np.median(pdist(first[:, None])) / 3
    vectors = np.c_[first, rng.standard_normal(first.size)]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no overflow or invalid-value warnings either
        r = harmonic_residuals(vectors)
    assert np.all(np.isfinite(r))
    assert 0.9 < r[1] < 1.2

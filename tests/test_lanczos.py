"""Thick-restart Lanczos against ARPACK, analytic spectra, and its own resumed runs."""

import json

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
import zarr
from scipy.sparse.linalg import LinearOperator, eigsh
from sklearn.neighbors import NearestNeighbors

from eigenstream.core.lanczos import (
    LanczosResult,
    LanczosState,
    default_basis_size,
    thick_restart_lanczos,
)
from eigenstream.core.spectral import SpectralResult
from eigenstream.errors import CheckpointError, NotConverged

TOL = 1e-10


class Counted:
    """A sparse matrix as a matvec callable that counts its applications."""

    def __init__(self, A):
        self.A = A
        self.calls = 0

    def __call__(self, x):
        self.calls += 1
        return self.A @ x


def _knn_gaussian_operator(n: int, k: int, seed: int) -> sp.csr_matrix:
    """A = D^-1/2 K D^-1/2 for a kNN Gaussian affinity of a uniform sample of the unit square.

    Built with scikit-learn alone (methods.md §1, §3.1): K = max(W, W^T) with
    W_ij = exp(-d_ij^2 / eps) on the k nearest neighbours, eps = median squared k-th distance.
    """
    X = np.random.default_rng(seed).uniform(size=(n, 2))
    dist, idx = NearestNeighbors(n_neighbors=k + 1).fit(X).kneighbors(X)
    dist, idx = dist[:, 1:], idx[:, 1:]  # drop self
    eps = np.median(dist[:, -1] ** 2)
    rows = np.repeat(np.arange(n), k)
    W = sp.csr_matrix((np.exp(-(dist.ravel() ** 2) / eps), (rows, idx.ravel())), shape=(n, n))
    K = W.maximum(W.T)
    inv_sqrt_d = 1.0 / np.sqrt(np.asarray(K.sum(axis=1)).ravel())
    return sp.csr_matrix(sp.diags(inv_sqrt_d) @ K @ sp.diags(inv_sqrt_d))


def _random_sparse_symmetric(n: int, seed: int) -> sp.csr_matrix:
    S = sp.random(
        n,
        n,
        density=4.0 / n,
        random_state=seed,
        data_rvs=np.random.default_rng(seed).standard_normal,
    )
    return sp.csr_matrix(S + S.T)


def _cycle_operator(n: int) -> sp.csr_matrix:
    """D^-1/2 W D^-1/2 of the cycle C_n (degree 2 everywhere, so W / 2)."""
    i = np.arange(n)
    rows = np.concatenate([i, i])
    cols = np.concatenate([(i + 1) % n, (i - 1) % n])
    return sp.csr_matrix((np.full(2 * n, 0.5), (rows, cols)), shape=(n, n))


@pytest.fixture(scope="module")
def knn_op() -> sp.csr_matrix:
    return _knn_gaussian_operator(4000, 10, seed=7)


def _arpack(A, count, ncv, v0, tol=1e-12):
    """Reference pairs from scipy eigsh (ARPACK; Lehoucq, Sorensen & Yang 1998), descending."""
    counted = Counted(A)
    op = LinearOperator(A.shape, matvec=counted, dtype=np.float64)
    values, vectors = eigsh(op, k=count, which="LA", ncv=ncv, v0=v0, tol=tol)
    order = np.argsort(values)[::-1]
    return values[order], vectors[:, order], counted.calls


def _true_residuals(A, values, vectors):
    return np.linalg.norm(A @ vectors - vectors * values, axis=0)


def _distance_up_to_sign(a, b):
    return min(np.linalg.norm(a - b), np.linalg.norm(a + b))


def _check_against_reference(A, res, ref_values, ref_vectors, ref_residuals, norm_A):
    """Values to 1e-8 ||A||, residuals <= tol ||A||, vectors within the Davis-Kahan bound."""
    count = res.values.size
    np.testing.assert_allclose(res.values, ref_values[:count], rtol=0, atol=1e-8 * norm_A)
    ours = _true_residuals(A, res.values, res.vectors)
    assert ours.max() <= TOL * norm_A, ours
    for j in range(count):
        # Davis & Kahan 1970 (methods.md §4.3): sin angle(v, u_j) <= r / gap, with the gap from
        # the Ritz value to the rest of the (reference) spectrum; both residuals count.
        gap = np.delete(np.abs(ref_values - res.values[j]), j).min()
        bound = 2 * (ours[j] + ref_residuals[j]) / gap + 1e-12
        err = _distance_up_to_sign(res.vectors[:, j], ref_vectors[:, j])
        assert err <= bound, f"pair {j}: vector error {err:.2e} > Davis-Kahan bound {bound:.2e}"


# ---------------------------------------------------------------------------------------------
# 1. Against ARPACK


def test_knn_gaussian_operator_matches_arpack(knn_op):
    # scipy eigsh = ARPACK implicitly restarted Lanczos (Lehoucq, Sorensen & Yang 1998).
    n, count = knn_op.shape[0], 7
    v0 = np.random.default_rng(1).uniform(-1, 1, n)
    m = default_basis_size(n, count)
    ref_values, ref_vectors, _ = _arpack(knn_op, count + 1, m, v0)
    ref_res = _true_residuals(knn_op, ref_values, ref_vectors)
    res = thick_restart_lanczos(Counted(knn_op), n, count, v0=v0, tol=TOL)
    assert isinstance(res, LanczosResult) and isinstance(res, SpectralResult)
    # methods.md §3.1: lambda_0 = 1 for D^-1/2 K D^-1/2 (eigenvector sqrt(d)), ||A||_2 = 1.
    assert abs(res.values[0] - 1.0) < 1e-12
    _check_against_reference(knn_op, res, ref_values, ref_vectors, ref_res, norm_A=1.0)
    # The relation's residual estimates agree with the true residuals (full reorthogonalisation).
    true = _true_residuals(knn_op, res.values, res.vectors)
    assert np.all(true <= res.residuals + 1e-13)


def test_random_sparse_symmetric_matches_arpack():
    # scipy eigsh (ARPACK) as the reference; ||A||_2 from eigsh 'LM' scales the tolerances.
    A = _random_sparse_symmetric(3000, seed=3)
    n, count = A.shape[0], 6
    norm_A = float(np.abs(eigsh(A, k=1, which="LM", tol=1e-10)[0]).max())
    v0 = np.random.default_rng(2).uniform(-1, 1, n)
    ref_values, ref_vectors, _ = _arpack(A, count + 1, default_basis_size(n, count), v0)
    ref_res = _true_residuals(A, ref_values, ref_vectors)
    res = thick_restart_lanczos(lambda x: A @ x, n, count, v0=v0, tol=TOL)
    _check_against_reference(A, res, ref_values, ref_vectors, ref_res, norm_A=norm_A)


def test_matvec_counts_comparable_to_arpack(knn_op):
    # Wu & Simon 2000: thick restart is mathematically equivalent to implicit restart with
    # exact shifts, so with the same basis size (ncv) the matvec counts should be close.
    # The 1.25 margin is ours (common practice for "comparable"), not from the paper.
    rows = []
    problems = [(knn_op, 7), (_knn_gaussian_operator(3000, 10, seed=3), 10)]
    for A, count in problems:
        n = A.shape[0]
        v0 = np.random.default_rng(4).uniform(-1, 1, n)
        m = default_basis_size(n, count)
        *_, arpack_calls = _arpack(A, count, m, v0, tol=TOL)
        plain = thick_restart_lanczos(
            Counted(A), n, count, v0=v0, tol=TOL, basis_size=m, check_multiplicity=False
        )
        checked = thick_restart_lanczos(Counted(A), n, count, v0=v0, tol=TOL, basis_size=m)
        rows.append((n, count, m, arpack_calls, plain.matvecs, checked.matvecs))
        assert plain.matvecs <= 1.25 * arpack_calls
        np.testing.assert_allclose(checked.values, plain.values, rtol=0, atol=1e-12)
    print("\n(n, count, ncv, eigsh matvecs, TRL matvecs, TRL + multiplicity check):", rows)


# ---------------------------------------------------------------------------------------------
# 2. Analytic spectrum with exactly repeated eigenvalues


@pytest.mark.parametrize("start", ["random", "eigenvector"])
def test_cycle_graph_double_eigenvalues(start):
    # Chung 1997, Spectral Graph Theory, ch. 1: D^-1/2 W D^-1/2 of C_n has eigenvalues
    # cos(2 pi k / n), each k != 0, n/2 twice, eigenvectors cos(2 pi k j / n), sin(2 pi k j / n).
    # Starting from the exact top eigenvector (constant) makes the Krylov space invariant after
    # one step, so the solver must carry on from a fresh direction.
    n, count = 400, 5
    A = _cycle_operator(n)
    v0 = np.ones(n) if start == "eigenvector" else None
    res = thick_restart_lanczos(lambda x: A @ x, n, count, v0=v0, tol=TOL, rng=11)
    k = np.array([0, 1, 1, 2, 2])
    np.testing.assert_allclose(res.values, np.cos(2 * np.pi * k / n), rtol=0, atol=1e-10)
    assert _true_residuals(A, res.values, res.vectors).max() <= TOL
    j = np.arange(n)
    for freq, cols in ((1, [1, 2]), (2, [3, 4])):
        exact = np.column_stack(
            [np.cos(2 * np.pi * freq * j / n), np.sin(2 * np.pi * freq * j / n)]
        )
        # Repeated eigenvalues: only the eigenspace is defined (methods.md §3.6), compare by
        # principal angles; Davis & Kahan 1970 with gap cos(2pi f/n) - cos(2pi (f+1)/n) gives
        # sin angle <= 2 tol / gap ~ 1e-6.
        angle = scipy.linalg.subspace_angles(res.vectors[:, cols], exact).max()
        assert angle < 1e-5, (freq, angle)


def test_small_operator_solved_densely():
    # Chung 1997: C_30 eigenvalues cos(2 pi k/30); n <= basis_size + 16 takes the dense path
    # (n matvecs, one per identity column).
    n = 30
    A = _cycle_operator(n)
    counted = Counted(A)
    res = thick_restart_lanczos(counted, n, 3)
    np.testing.assert_allclose(res.values, np.cos(2 * np.pi * np.array([0, 1, 1]) / n), atol=1e-14)
    assert res.matvecs == counted.calls == n and res.restarts == 0


# ---------------------------------------------------------------------------------------------
# 3. Resume from stored states: bit-identical


def _store(state: LanczosState, root) -> None:
    """Arrays to zarr, scalars to JSON, as a checkpointing caller would (no pickle)."""
    group = zarr.open_group(str(root / "arrays.zarr"), mode="w")
    for name, arr in state.arrays().items():
        target = group.create_array(name, shape=arr.shape, dtype="float64")
        target[...] = arr
    (root / "scalars.json").write_text(json.dumps(state.scalars()))


def _load(root) -> LanczosState:
    group = zarr.open_group(str(root / "arrays.zarr"), mode="r")
    arrays = {name: group[name][...] for name in group.array_keys()}
    return LanczosState.from_parts(arrays, json.loads((root / "scalars.json").read_text()))


def test_resume_is_bit_identical(knn_op, tmp_path):
    # Wu & Simon 2000: after a restart the Krylov-Schur relation A Y = Y diag(theta) + q s^T
    # is the whole state; resuming from it must repeat the uninterrupted run exactly.
    n, count = knn_op.shape[0], 6
    saved = []

    def keep(state):
        saved.append(
            LanczosState.from_parts(
                {k: v.copy() for k, v in state.arrays().items()},
                json.loads(json.dumps(state.scalars())),
            )
        )

    counted = Counted(knn_op)
    full = thick_restart_lanczos(counted, n, count, tol=TOL, on_restart=keep, rng=5)
    assert full.matvecs == counted.calls and full.restarts == len(saved)
    main = [s for s in saved if s.check_round == 0]
    checking = [s for s in saved if s.check_round > 0]
    assert main and checking  # the multiplicity check ran and is covered below
    picks = [main[0], main[len(main) // 2], main[-1], checking[0], checking[-1]]
    for pick in picks:
        _store(pick, tmp_path)
        loaded = _load(tmp_path)
        later = []
        counted = Counted(knn_op)
        resumed = thick_restart_lanczos(
            counted, n, count, tol=TOL, state=loaded, on_restart=later.append
        )
        assert np.array_equal(resumed.values, full.values)
        assert np.array_equal(resumed.vectors, full.vectors)
        assert np.array_equal(resumed.residuals, full.residuals)
        # Counters carry over: the resumed run reports totals.
        assert resumed.matvecs == full.matvecs == pick.matvecs + counted.calls
        assert resumed.restarts == full.restarts == pick.restarts + len(later)


def test_runs_are_deterministic(knn_op):
    # Same seed, same inputs: identical bits (no hidden randomness or thread-order effects).
    n = knn_op.shape[0]
    a = thick_restart_lanczos(lambda x: knn_op @ x, n, 4, tol=1e-9, rng=3)
    b = thick_restart_lanczos(lambda x: knn_op @ x, n, 4, tol=1e-9, rng=np.random.default_rng(3))
    assert np.array_equal(a.values, b.values) and np.array_equal(a.vectors, b.vectors)
    assert a.matvecs == b.matvecs


def test_state_from_damaged_parts_is_refused(knn_op):
    n = knn_op.shape[0]
    states = []
    thick_restart_lanczos(
        lambda x: knn_op @ x, n, 3, tol=1e-6, on_restart=states.append, max_matvecs=10_000
    )
    arrays, scalars = states[0].arrays(), states[0].scalars()
    with pytest.raises(CheckpointError, match="coupling"):
        LanczosState.from_parts({k: v for k, v in arrays.items() if k != "coupling"}, scalars)
    short = dict(arrays, residual=arrays["residual"][:-1])
    with pytest.raises(CheckpointError):
        LanczosState.from_parts(short, scalars)


# ---------------------------------------------------------------------------------------------
# 4. Budget exhausted


def test_budget_exhausted_raises_with_partial_pairs(knn_op):
    n, count, budget = knn_op.shape[0], 5, 45
    counted = Counted(knn_op)
    with pytest.raises(NotConverged, match="max_matvecs") as info:
        thick_restart_lanczos(counted, n, count, tol=TOL, max_matvecs=budget, rng=2)
    err = info.value
    assert counted.calls == budget  # the budget is used up and never exceeded
    assert err.eigenvalues.shape == (count,) and err.eigenvectors.shape == (n, count)
    # Partial pairs are Ritz pairs: Rayleigh quotients of orthonormal vectors, so each value is
    # v^T A v and lies below lambda_max = 1 (Courant-Fischer; Parlett 1998).
    V = err.eigenvectors
    np.testing.assert_allclose(np.einsum("ij,ij->j", V, knn_op @ V), err.eigenvalues, atol=1e-12)
    assert np.all(err.eigenvalues <= 1 + 1e-12)
    # Resuming from the attached state with a larger budget continues the same run.
    straight = thick_restart_lanczos(lambda x: knn_op @ x, n, count, tol=TOL, rng=2)
    resumed = thick_restart_lanczos(lambda x: knn_op @ x, n, count, tol=TOL, state=err.state)
    assert np.array_equal(resumed.vectors, straight.vectors)
    assert resumed.matvecs == straight.matvecs


# ---------------------------------------------------------------------------------------------
# 5. Orthogonality and ghosts


def test_orthonormal_vectors_and_no_ghost_eigenvalues():
    # Paige 1971 (thesis; year from memory) and Parlett 1998, The Symmetric Eigenvalue Problem:
    # without reorthogonalisation Lanczos loses orthogonality once a Ritz pair converges and
    # repeats it ("ghost" copies of simple eigenvalues); methods.md §4.1 says check V^T V = I. The operator
    # diag(1, 0.99, 0.98, ...) in a random orthogonal-like basis has simple eigenvalues
    # 1 - 0.01 i: copies would show up as repeated values or as V^T V != I.
    n, count = 1500, 8
    rng = np.random.default_rng(9)
    spectrum = np.concatenate(
        [1.0 - 0.01 * np.arange(count + 4), rng.uniform(-1, 0.85, n - count - 4)]
    )
    # Conjugating by a Householder reflection keeps the operator symmetric with this spectrum.
    h = rng.standard_normal(n)
    h /= np.linalg.norm(h)

    def matvec(x):
        y = x - 2 * h * (h @ x)
        y = spectrum * y
        return y - 2 * h * (h @ y)

    res = thick_restart_lanczos(matvec, n, count, tol=TOL, rng=1, max_matvecs=20_000)
    assert res.restarts > 10  # long enough for ghosts to appear without reorthogonalisation
    np.testing.assert_allclose(res.vectors.T @ res.vectors, np.eye(count), rtol=0, atol=1e-10)
    np.testing.assert_allclose(res.values, 1.0 - 0.01 * np.arange(count), rtol=0, atol=1e-10)
    assert np.diff(res.values).max() < -0.005  # no value returned twice


def test_rejects_bad_arguments(knn_op):
    n = knn_op.shape[0]
    with pytest.raises(ValueError, match="count"):
        thick_restart_lanczos(lambda x: knn_op @ x, n, 0)
    with pytest.raises(ValueError, match="basis_size"):
        thick_restart_lanczos(lambda x: knn_op @ x, n, 10, basis_size=11)
    with pytest.raises(ValueError, match="v0"):
        thick_restart_lanczos(lambda x: knn_op @ x, n, 3, v0=np.zeros(n))

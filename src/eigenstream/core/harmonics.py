"""Harmonic eigenvectors: detection by local linear regression (methods.md §3.6).

A later Laplacian eigenvector can be a function of earlier ones -- on a long strip cos(2 pi s/L)
of the same arc-length coordinate s as the first -- and then adds no new direction to an
embedding. Dsilva, Talmon, Coifman & Kevrekidis (Appl. Comput. Harmon. Anal. 44(3), 2018)
regress each psi_k on psi_1..psi_{k-1} with a Gaussian-weighted local linear fit evaluated
leave-one-out and use the normalized residual r_k = ||psi_k - fit|| / ||psi_k|| (r_1 = 1):
r_k near 1 marks a new direction, r_k << 1 a harmonic.

Implementation notes. The kernel bandwidth is the median pairwise distance between rows of
(psi_1..psi_{k-1}) divided by ``scale`` (3 is the published default, as recalled from memory).
Each row's fit solves the weighted normal equations of [1, Phi - Phi_i] (centred at the row, in
units of the bandwidth, so the intercept is the fitted value) through a batched Hermitian
pseudo-inverse, which also covers singular systems (isolated rows get the fit 0). The weighted
sums behind those equations come from one matrix product of a block of kernel rows with
per-row moment features, so scratch memory is ``_SCRATCH_BYTES`` plus the feature table
(n x (m^2 + 2m + 2) floats) and, before the blocks run, one condensed distance vector
(n(n-1)/2 floats: 34 MiB at n = 3000). Forming the centred sums from uncentred ones costs
accuracy only in rows whose local system is badly conditioned (few effective neighbours).
"""

from __future__ import annotations

import numpy as np
from scipy.spatial.distance import cdist, pdist

_SCRATCH_BYTES = 32 * 2**20  # working memory of one block of leave-one-out fits
_RCOND = 1e-12  # eigenvalues of a local Gram matrix below this fraction of its largest are dropped
# Ridge on the slope block of each local Gram matrix: _RIDGE of the row's total weight (points
# are in bandwidth units, so a well-spread neighbourhood has slope entries near the weight) plus
# _RIDGE_ROUNDING of the uncentred second moment, 1e5 times the rounding left in the centred
# block by the cancellation (~1e-16 of it). Where the neighbours do not spread in some
# direction (e.g. an indicator-like eigenvector whose rows share one value, far from the mean
# in bandwidth units) that block is rounding noise; the ridge keeps its inverse bounded and
# turns the fit there into a local average.
_RIDGE = 1e-8
_RIDGE_ROUNDING = 1e-11
# Total kernel weight below which a row has no neighbour (exp(-d^2) with d > ~5.3 bandwidths).
_MIN_WEIGHT = 1e-12


def harmonic_residuals(
    vectors: np.ndarray, *, sample: int = 3000, seed: int = 0, scale: float = 3.0
) -> np.ndarray:
    """Leave-one-out local linear regression residual of each eigenvector on the earlier ones.

    Parameters
    ----------
    vectors : ndarray, shape (n, m)
        Non-trivial eigenvectors as columns, in eigenvalue order (the constant one removed).
    sample : int
        When ``n > sample``, the residuals are computed on ``sample`` rows drawn uniformly
        without replacement; otherwise on all rows.
    seed : int
        Seed of ``numpy.random.default_rng`` for that draw.
    scale : float
        The regression kernel bandwidth is the median pairwise distance between rows of the
        earlier eigenvectors divided by ``scale``.

    Returns
    -------
    ndarray, shape (m,)
        ``r[0] = 1`` by definition; for ``k >= 1``, ``r[k] = ||psi_k - fit|| / ||psi_k||`` on the
        rows used, near 1 for a new direction and near 0 for a function of columns ``0..k-1``.
        A column that is zero on the rows used gets ``r = 0``.

    Raises
    ------
    ValueError
        On a non-2-D or non-finite ``vectors``, fewer than two rows, ``sample < 2`` or a
        non-positive ``scale``.
    """
    phi = _checked_columns(vectors)
    if int(sample) < 2:
        raise ValueError(f"sample must be at least 2; got {sample}.")
    if not (np.isfinite(scale) and scale > 0):
        raise ValueError(f"scale must be a positive number; got {scale}.")
    phi = _sample_rows(phi, int(sample), seed)
    residuals = np.zeros(phi.shape[1])
    residuals[:1] = 1.0
    for k in range(1, phi.shape[1]):
        residuals[k] = _residual(phi[:, :k], phi[:, k], float(scale))
    return residuals


def choose_coordinates(residuals: np.ndarray, count: int) -> np.ndarray:
    """Columns to keep: column 0 and the ``count - 1`` others with the largest residuals.

    Parameters
    ----------
    residuals : ndarray, shape (m,)
        Output of :func:`harmonic_residuals`.
    count : int
        Number of columns to keep, ``1 <= count <= m``.

    Returns
    -------
    ndarray of int, shape (count,)
        Ascending column indices; among equal residuals the lower index wins.

    Raises
    ------
    ValueError
        When ``count`` is outside ``[1, m]`` or ``residuals`` is not a finite 1-D array.
    """
    r = np.asarray(residuals, dtype=np.float64)
    if r.ndim != 1 or not np.all(np.isfinite(r)):
        raise ValueError("residuals must be a finite 1-D array.")
    if not 1 <= count <= r.size:
        raise ValueError(
            f"count must be between 1 and {r.size} (the number of residuals); got {count}."
        )
    others = 1 + np.argsort(-r[1:], kind="stable")[: count - 1]
    return np.sort(np.concatenate(([0], others))).astype(np.intp)


def keep_coordinates(
    vectors: np.ndarray, count: int, choose_from: int, *, seed: int = 0
) -> tuple[np.ndarray, list[float] | None]:
    """The columns of ``vectors`` that become map coordinates, and the residuals behind them.

    Parameters
    ----------
    vectors : ndarray, shape (n, m)
        Non-trivial eigenvectors in eigenvalue order.
    count : int
        Coordinates wanted.
    choose_from : int
        0: the leading ``count`` columns (no residuals). Otherwise ``vectors`` holds the leading
        ``choose_from`` and the kept ones are :func:`choose_coordinates` of
        :func:`harmonic_residuals` (sample drawn with ``seed``).

    Returns
    -------
    kept : ndarray of int
        Ascending column indices.
    residuals : list of float or None
    """
    if not choose_from:
        return np.arange(count), None
    residuals = harmonic_residuals(vectors, seed=seed)
    return choose_coordinates(residuals, count), residuals.tolist()


def _checked_columns(vectors: np.ndarray) -> np.ndarray:
    """``vectors`` as a float64 (n, m) array, n >= 2, all finite."""
    phi = np.asarray(vectors, dtype=np.float64)
    if phi.ndim != 2:
        raise ValueError(f"vectors must be a 2-D (rows x eigenvectors) array; got {phi.ndim} dims.")
    if phi.shape[0] < 2:
        raise ValueError(f"vectors need at least 2 rows; got {phi.shape[0]}.")
    if not np.all(np.isfinite(phi)):
        raise ValueError("vectors hold NaN or infinite values.")
    return phi


def _sample_rows(phi: np.ndarray, sample: int, seed: int) -> np.ndarray:
    """``phi`` itself, or ``sample`` of its rows drawn uniformly without replacement."""
    n = phi.shape[0]
    if n <= sample:
        return phi
    rows = np.random.default_rng(seed).choice(n, size=sample, replace=False)
    return phi[np.sort(rows)]


def _residual(earlier: np.ndarray, target: np.ndarray, scale: float) -> float:
    """Normalized leave-one-out residual of ``target`` regressed on the columns of ``earlier``."""
    norm = np.linalg.norm(target)
    if norm == 0:
        return 0.0
    centred = earlier - earlier.mean(axis=0)  # smaller moments, less cancellation later
    fit = _loo_local_linear_fit(centred / _bandwidth(earlier, scale), target)
    return float(np.linalg.norm(target - fit) / norm)


def _bandwidth(points: np.ndarray, scale: float) -> float:
    """Median pairwise distance over ``scale``; a positive fallback when that is zero."""
    dist = pdist(points)
    width = np.median(dist, overwrite_input=True) / scale
    if width > 0:
        return float(width)
    width = dist.max() / scale  # most rows coincide: fall back to the largest distance
    return float(width) if width > 0 else 1.0  # all rows coincide: every weight is 1


def _loo_local_linear_fit(points: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Leave-one-out local linear fit of ``target`` at every row, kernel exp(-|z_i - z_j|^2)."""
    n, dim = points.shape
    features = _moment_features(points, target)
    rows = max(1, _SCRATCH_BYTES // (8 * (n + features.shape[1])))
    fit = np.empty(n)
    for start in range(0, n, rows):
        block = slice(start, min(start + rows, n))
        moments = _loo_weights(points, block) @ features
        fit[block] = _local_intercepts(moments, points[block], dim)
    return fit


def _moment_features(points: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Per-row terms whose kernel-weighted sums give the local normal equations.

    Columns: 1, z, vec(z z^T), y, y z for row values z of ``points`` and y of ``target``.
    """
    n, dim = points.shape
    outer = (points[:, :, None] * points[:, None, :]).reshape(n, dim * dim)
    return np.hstack([np.ones((n, 1)), points, outer, target[:, None], points * target[:, None]])


def _loo_weights(points: np.ndarray, block: slice) -> np.ndarray:
    """Kernel rows exp(-|z_i - z_j|^2) for the rows i in ``block``, with w_ii = 0."""
    weights = cdist(points[block], points, "sqeuclidean")
    np.negative(weights, out=weights)
    np.exp(weights, out=weights)
    local = np.arange(block.stop - block.start)
    weights[local, block.start + local] = 0.0
    return weights


def _local_intercepts(moments: np.ndarray, centres: np.ndarray, dim: int) -> np.ndarray:
    """Fitted values at ``centres`` from weighted sums laid out as in :func:`_moment_features`."""
    s0 = moments[:, 0]
    s1 = moments[:, 1 : 1 + dim]
    s2 = moments[:, 1 + dim : 1 + dim + dim * dim].reshape(-1, dim, dim)
    t0 = moments[:, 1 + dim + dim * dim]
    t1 = moments[:, 2 + dim + dim * dim :]
    # Sums over j of w_ij (z_j - z_i) and (z_j - z_i)(z_j - z_i)^T from the uncentred ones.
    s1c = s1 - s0[:, None] * centres
    s2c = s2 - s1c[:, :, None] * centres[:, None, :] - centres[:, :, None] * s1[:, None, :]
    gram = np.empty((len(s0), dim + 1, dim + 1))
    gram[:, 0, 0] = s0
    gram[:, 0, 1:] = s1c
    gram[:, 1:, 0] = s1c
    trace = np.einsum("bii->b", s2)  # scale of the uncentred terms that cancel in s2c
    ridge = _RIDGE * s0 + _RIDGE_ROUNDING * trace
    gram[:, 1:, 1:] = s2c + ridge[:, None, None] * np.eye(dim)
    rhs = np.concatenate([t0[:, None], t1 - t0[:, None] * centres], axis=1)
    # Per unit of the row's total weight, so that rows whose neighbours all lie many bandwidths
    # away (weights near the underflow limit) neither overflow nor lose precision; a row with
    # no weight worth the name is isolated and gets the fit 0.
    isolated = s0 <= _MIN_WEIGHT
    total = np.where(isolated, 1.0, s0)
    gram /= total[:, None, None]
    rhs /= total[:, None]
    gram[isolated] = np.eye(dim + 1)
    rhs[isolated] = 0.0
    return _solve_intercepts(gram, rhs)


def _solve_intercepts(gram: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """First component of the minimum-norm least-squares solution of each ``gram x = rhs``."""
    pinv = np.linalg.pinv(gram, rcond=_RCOND, hermitian=True)
    return np.einsum("bj,bj->b", pinv[:, 0, :], rhs)

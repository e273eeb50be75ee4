"""Embedding quality: trustworthiness, continuity, kNN preservation, eigengap.

Definitions follow Venna & Kaski (ICANN 2001; Neural Networks 19, 2006) for trustworthiness and
continuity and Lee & Verleysen (Neurocomputing 72, 2009) for kNN preservation Q_NX(k); see
methods.md §7. Distances are Euclidean in both spaces.

Rank convention: the rank of row j among the neighbours of row i is ``1 + #{l != i : d(i, l) <
d(i, j)}`` (ties share the smallest rank). Without ties this is the usual rank, so the exact values
equal scikit-learn's ``trustworthiness``; with ties (integer data) a tied neighbour is never
penalised, so every isometry scores exactly 1.

Every measure is an average over query rows of a per-row term. ``sample=None`` averages over all
rows (exact, O(n^2) time); ``sample=s`` averages over ``s`` rows drawn without replacement, an
unbiased estimate of the exact value whose standard error is about sd(term)/sqrt(s). Memory is
O(block * n) either way, so the sampled form works for millions of rows.
"""

from __future__ import annotations

import numpy as np

from eigenstream.core.neighbors import exact_knn

# Bytes of float64 scratch per block of query rows (block x n distances, block x k x D diffs),
# here and in the exact neighbour search of the query rows. 64 MiB made the quality stage the
# run's peak (200k rows: +130 MiB over its start; 16 MiB: +40, the same 0.6 s).
_BLOCK_BYTES = 16 * 2**20


def trustworthiness(
    X: np.ndarray,
    Y: np.ndarray,
    *,
    n_neighbors: int = 5,
    sample: int | None = None,
    rng: int | np.random.Generator | None = None,
) -> float:
    """Trustworthiness T(k) of embedding ``Y`` of data ``X`` (Venna & Kaski 2001).

    Penalises rows that are among the k nearest in ``Y`` but not in ``X``, by how far beyond k
    their rank in ``X`` is.

    Parameters
    ----------
    X : ndarray, shape (n, D)
        Input rows.
    Y : ndarray, shape (n, m) or (n,)
        Embedded rows, in the same order.
    n_neighbors : int
        Neighbourhood size k, ``1 <= k < n / 2``.
    sample : int, optional
        Number of random query rows; ``None`` (or ``>= n``) uses all rows (exact).
    rng : int or numpy Generator, optional
        Source of the random query rows.

    Returns
    -------
    float
        At most 1; 1 for an isometry; about 1/2 for a random embedding.
    """
    X, Y = _check_pair(X, Y)
    n = X.shape[0]
    k = _check_k(n_neighbors, n, half=True)
    ranks = neighbor_ranks(X, Y, n_neighbors=k, rows=_query_rows(n, sample, rng))
    return _from_ranks(ranks, n, k)


def continuity(
    X: np.ndarray,
    Y: np.ndarray,
    *,
    n_neighbors: int = 5,
    sample: int | None = None,
    rng: int | np.random.Generator | None = None,
) -> float:
    """Continuity C(k): trustworthiness with the roles of ``X`` and ``Y`` swapped.

    Penalises rows that are among the k nearest in ``X`` but pushed beyond rank k in ``Y``.
    Parameters and return value as in :func:`trustworthiness`.
    """
    return trustworthiness(Y, X, n_neighbors=n_neighbors, sample=sample, rng=rng)


def knn_preservation(
    X: np.ndarray,
    Y: np.ndarray,
    *,
    n_neighbors: int = 10,
    sample: int | None = None,
    rng: int | np.random.Generator | None = None,
) -> float:
    """Mean fraction of each row's k nearest neighbours kept by the embedding, Q_NX(k).

    Lee & Verleysen (2009). A neighbour j of i in ``Y`` counts as kept when its rank among the
    neighbours of i in ``X`` is at most k (see the module's rank convention for ties).

    Parameters
    ----------
    X, Y, sample, rng
        As in :func:`trustworthiness`.
    n_neighbors : int
        Neighbourhood size k, ``1 <= k <= n - 1``.

    Returns
    -------
    float in [0, 1]
        1 for an isometry; about k / (n - 1) for a random embedding.
    """
    X, Y = _check_pair(X, Y)
    n = X.shape[0]
    k = _check_k(n_neighbors, n, half=False)
    ranks = neighbor_ranks(X, Y, n_neighbors=k, rows=_query_rows(n, sample, rng))
    return float(np.mean(ranks <= k))


def neighbor_ranks(
    rank_space: np.ndarray,
    neighbor_space: np.ndarray,
    *,
    n_neighbors: int,
    rows: np.ndarray | None = None,
) -> np.ndarray:
    """Ranks in one space of each query row's nearest neighbours found in another space.

    The per-row terms behind all three measures: trustworthiness uses
    ``neighbor_ranks(X, Y)``, continuity ``neighbor_ranks(Y, X)``.

    Parameters
    ----------
    rank_space : ndarray, shape (n, D)
        Space in which ranks are counted.
    neighbor_space : ndarray, shape (n, m)
        Space in which the k nearest neighbours of each query row are found (self excluded).
    n_neighbors : int
        k, ``1 <= k <= n - 1``.
    rows : ndarray of int, optional
        Query rows (distinct); all rows when omitted.

    Returns
    -------
    ndarray of int64, shape (len(rows), k)
        ``1 + #{l != i : d(i, l) < d(i, j)}`` in ``rank_space`` for the j-th nearest neighbour
        (in ``neighbor_space``) of query row i.
    """
    A, B = _check_pair(rank_space, neighbor_space)
    n = A.shape[0]
    k = _check_k(n_neighbors, n, half=False)
    if rows is None:
        rows = np.arange(n)
        nbrs, _ = exact_knn(B, k, scratch_bytes=_BLOCK_BYTES)
    else:
        rows = np.asarray(rows, dtype=np.int64).ravel()
        if rows.size and (rows.min() < 0 or rows.max() >= n):
            raise ValueError(f"query rows must lie in [0, {n - 1}].")
        # Ask for one extra neighbour and remove the query itself by index (duplicates safe).
        nbrs, _ = exact_knn(B, k + 1, query=B[rows], scratch_bytes=_BLOCK_BYTES)
        nbrs = _drop_own(nbrs, rows)
    return _ranks_in(A, rows, nbrs)


def eigengap(values: np.ndarray) -> tuple[int, float]:
    """Largest gap between consecutive eigenvalues sorted in descending order.

    Parameters
    ----------
    values : array_like, shape (m,), m >= 2
        Eigenvalues in any order.

    Returns
    -------
    index : int
        0-based position i in the descending order such that the gap lies between the i-th and
        the (i+1)-th value, i.e. ``index + 1`` eigenvalues lie above the gap.
    gap : float
        ``v[index] - v[index + 1]`` (>= 0).
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    if v.size < 2:
        raise ValueError(f"eigengap needs at least 2 eigenvalues; got {v.size}.")
    if not np.all(np.isfinite(v)):
        raise ValueError("eigenvalues must be finite.")
    v = np.sort(v)[::-1]
    gaps = v[:-1] - v[1:]
    i = int(np.argmax(gaps))
    return i, float(gaps[i])


# --------------------------------------------------------------------------------------------
# helpers


def _check_pair(X, Y) -> tuple[np.ndarray, np.ndarray]:
    """Both inputs as 2-D float64 arrays with the same, finite rows."""
    out = []
    for name, a in (("X", X), ("Y", Y)):
        a = np.asarray(a, dtype=np.float64)
        if a.ndim == 1:
            a = a[:, None]
        if a.ndim != 2:
            raise ValueError(f"{name} must be a 2-D array (rows x columns); got {a.ndim} dims.")
        if not np.all(np.isfinite(a)):
            raise ValueError(f"{name} holds NaN or infinite values; remove or impute them first.")
        out.append(a)
    if out[0].shape[0] != out[1].shape[0]:
        raise ValueError(
            f"X has {out[0].shape[0]} rows but Y has {out[1].shape[0]}; they must match row by row."
        )
    return out[0], out[1]


def _check_k(k: int, n: int, *, half: bool) -> int:
    """Validate the neighbourhood size (k < n/2 where the Venna-Kaski normalisation needs it)."""
    if isinstance(k, bool) or int(k) != k:
        raise ValueError(f"n_neighbors must be an integer; got {k!r}.")
    k = int(k)
    if half and not 1 <= k < n / 2:
        raise ValueError(f"n_neighbors must be in [1, n/2) = [1, {n / 2:g}); got {k}.")
    if not half and not 1 <= k <= n - 1:
        raise ValueError(f"n_neighbors must be in [1, {n - 1}]; got {k}.")
    return k


def _query_rows(n: int, sample: int | None, rng) -> np.ndarray | None:
    """All rows (None) or a sorted random subset of ``sample`` distinct rows."""
    if sample is None:
        return None
    if isinstance(sample, bool) or int(sample) != sample or sample < 1:
        raise ValueError(f"sample must be a positive integer or None; got {sample!r}.")
    if sample >= n:
        return None
    gen = np.random.default_rng(rng)
    return np.sort(gen.choice(n, size=int(sample), replace=False))


def _from_ranks(ranks: np.ndarray, n: int, k: int) -> float:
    """Venna-Kaski normalisation of the mean per-row penalty sum_j max(r - k, 0)."""
    penalty = np.maximum(ranks - k, 0).sum(axis=1)
    return float(1.0 - 2.0 / (k * (2.0 * n - 3.0 * k - 1.0)) * penalty.mean())


def _drop_own(nbrs: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Remove each query's own index from its (k+1)-list; lists without it lose the last entry."""
    m, kp1 = nbrs.shape
    own = nbrs == rows[:, None]
    drop = np.where(own.any(axis=1), own.argmax(axis=1), kp1 - 1)
    keep = np.ones_like(own)
    keep[np.arange(m), drop] = False
    return nbrs[keep].reshape(m, kp1 - 1)


def _ranks_in(A: np.ndarray, rows: np.ndarray, nbrs: np.ndarray) -> np.ndarray:
    """Count, in space ``A``, the rows strictly closer to each query than each of its neighbours.

    All distances to all rows are screened with the fast inner-product form; the few entries
    within its rounding bound of a threshold are re-measured by direct differences, the same
    arithmetic that gives the thresholds, so ties are decided exactly.
    """
    n, dim = A.shape
    s, k = nbrs.shape
    centered = A - A.mean(axis=0)  # shrinks the cancellation error of the inner-product form
    sq = np.einsum("ij,ij->i", centered, centered)
    # Bound on |inner-product form - difference form| in squared-distance units.
    tol_scale = 32 * np.finfo(np.float64).eps * (dim + 1)
    block = int(max(1, min(4096, _BLOCK_BYTES // (8 * max(n, k * dim, 1)))))
    ranks = np.empty((s, k), dtype=np.int64)
    for b0 in range(0, s, block):
        q = rows[b0 : b0 + block]
        diff = A[q][:, None, :] - A[nbrs[b0 : b0 + block]]
        thr = np.einsum("ijk,ijk->ij", diff, diff)
        order = np.argsort(thr, axis=1, kind="stable")
        thr = np.take_along_axis(thr, order, axis=1)
        d2 = centered[q] @ centered.T
        d2 *= -2.0
        d2 += sq[q][:, None]
        d2 += sq[None, :]
        d2[np.arange(q.size), q] = np.inf  # a row is not its own neighbour
        tol = tol_scale * (sq[q] + sq.max())
        for r in range(q.size):
            counts = _closer_counts(A, q[r], d2[r], thr[r], tol[r])
            ranks[b0 + r, order[r]] = 1 + counts
    return ranks


def _closer_counts(A, i, d2_row, thr, tol) -> np.ndarray:
    """For sorted thresholds ``thr`` (k,), the number of rows l with exact d2(i, l) < thr[m]."""
    k = thr.size
    cand = np.flatnonzero(d2_row < thr[-1] + tol)  # rows beyond this cannot beat any threshold
    vals = d2_row[cand]
    # Row l is surely closer than every threshold m >= hi (thr[m] > vals + tol); it is surely
    # not closer than the lower ones unless the largest of them, thr[hi - 1], lies within tol.
    hi = np.searchsorted(thr, vals + tol, side="right")
    unsure = (hi > 0) & (thr[np.maximum(hi - 1, 0)] > vals - tol)
    if np.any(unsure):
        cols = cand[unsure]
        diff = A[cols] - A[i]
        exact = np.einsum("ij,ij->i", diff, diff)
        hi[unsure] = np.searchsorted(thr, exact, side="right")
    return np.cumsum(np.bincount(hi, minlength=k + 1))[:k]

"""Gaussian kernel weights on kNN edges with per-row (self-tuning) or global bandwidths."""

from __future__ import annotations

import numpy as np

from eigenstream.errors import InputError


def adaptive_bandwidths(distances: np.ndarray, *, neighbor: int) -> np.ndarray:
    """Per-row bandwidth sigma_i = distance to the ``neighbor``-th neighbour.

    Self-tuning bandwidth of Zelnik-Manor & Perona (NIPS 2004). When that distance is 0
    (the row has at least ``neighbor`` exact duplicates) the first positive distance of the
    row is used instead; rows with no positive distance at all get 0 (see
    :func:`fill_zero_bandwidths`).

    Parameters
    ----------
    distances : ndarray, shape (n, k)
        Sorted kNN distances, self excluded.
    neighbor : int
        1-based rank of the neighbour whose distance sets the bandwidth, ``1 <= neighbor <= k``.

    Returns
    -------
    sigma : ndarray of float64, shape (n,)
    """
    distances = np.asarray(distances, dtype=np.float64)
    k = distances.shape[1]
    if not 1 <= neighbor <= k:
        raise ValueError(
            f"bandwidth neighbour rank must be in [1, {k}] (the number of neighbours); got {neighbor}."
        )
    sigma = distances[:, neighbor - 1].copy()
    zero = sigma <= 0
    if np.any(zero):
        positive = distances[zero] > 0
        first = np.take_along_axis(distances[zero], positive.argmax(axis=1)[:, None], axis=1)[:, 0]
        sigma[zero] = np.where(positive.any(axis=1), first, 0.0)
    return sigma


def fill_zero_bandwidths(sigma: np.ndarray) -> np.ndarray:
    """Replace zero bandwidths by the smallest positive one.

    Parameters
    ----------
    sigma : ndarray, shape (n,)

    Returns
    -------
    ndarray of float64, shape (n,)
        A copy with every entry positive.

    Raises
    ------
    InputError
        (a ValueError) when no bandwidth is positive, i.e. every row equals its neighbours.
    """
    sigma = np.array(sigma, dtype=np.float64)
    positive = sigma > 0
    if not positive.any():
        raise InputError(
            "All rows coincide with their neighbours (every kNN distance is 0); "
            "there is no geometry to embed — check the input columns."
        )
    sigma[~positive] = sigma[positive].min()
    return sigma


def gaussian_weights(
    distances: np.ndarray, sigma_rows: np.ndarray, sigma_neighbors: np.ndarray
) -> np.ndarray:
    """Gaussian kernel exp(-d_ij^2 / (sigma_i sigma_j)) on kNN edges.

    A global bandwidth sigma is the same call with constant arrays, giving exp(-d^2/sigma^2)
    (i.e. the Coifman–Lafon eps = sigma^2).

    Parameters
    ----------
    distances : ndarray, shape (m, k)
    sigma_rows : ndarray, shape (m,)
        Bandwidth of each row.
    sigma_neighbors : ndarray, shape (m, k)
        Bandwidth of each listed neighbour.

    Returns
    -------
    weights : ndarray of float64, shape (m, k)
    """
    d = np.asarray(distances, dtype=np.float64)
    s = np.asarray(sigma_rows, dtype=np.float64)[:, None] * np.asarray(
        sigma_neighbors, dtype=np.float64
    )
    # exp(-(d * d) / s) with one result array instead of four temporaries; the same
    # operations in the same order, so the same bits.
    w = d * d
    w /= s
    del s
    np.negative(w, out=w)
    return np.exp(w, out=w)


def global_bandwidth(distances: np.ndarray, *, neighbor: int) -> float:
    """Global sigma = median over rows of the ``neighbor``-th neighbour distance.

    eps = sigma^2 = median r_k^2 is the common-practice starting point of methods.md §2.1.

    Parameters
    ----------
    distances : ndarray, shape (n, k)
    neighbor : int
        1-based neighbour rank.

    Returns
    -------
    float
    """
    sigma = float(np.median(adaptive_bandwidths(distances, neighbor=neighbor)))
    if sigma <= 0:
        raise InputError(
            "More than half of the rows coincide with their neighbours; "
            "give an explicit `[kernel] bandwidth`."
        )
    return sigma

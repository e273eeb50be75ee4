"""Placing rows on a finished map: kernel rows to the training set built like training rows.

Used for landmark mode (every row against the landmarks), for ``eigenstream place`` and for
``SpectralMap.transform``. With the union rule a training row's kernel row holds its k nearest
rows, every row that lists it among theirs, and itself (the self loop); a new row gets exactly
the same (methods.md §5.1, pitfalls i-ii), so a training row placed again lands on its own
coordinates.
"""

from __future__ import annotations

import numpy as np

from eigenstream.core.neighbors import exact_knn
from eigenstream.core.nystrom import nystrom_extend


def kernel_rows(rows, train, radius, k, *, metric="euclidean"):
    """Training rows sharing a kernel edge with each row, as (distances, indices).

    A row y is linked to its k nearest training rows at positive distance, to every training
    row x_j with d(y, x_j) <= r_k(x_j) (the reverse edges of the union rule) and to exact
    copies (distance 0, the self loop). Unlinked candidates get distance +inf (weight 0).

    Parameters
    ----------
    rows : ndarray, shape (m, D)
    train : ndarray, shape (n, D)
    radius : ndarray, shape (n,)
        Distance from each training row to its k-th neighbour.
    k : int
    metric : {"euclidean", "cosine"}
    """
    idx, dist = _candidates(rows, train, radius, k, metric)
    positive_rank = np.cumsum(dist > 0, axis=1)
    forward = (dist > 0) & (positive_rank <= k)
    reverse = dist <= radius[idx]
    linked = forward | reverse | (dist == 0)
    return np.where(linked, dist, np.inf), idx


def _candidates(rows, train, radius, k, metric):
    """Nearest training rows of each row, enough of them to hold every reverse edge.

    A training row x_j can link to y only if d(y, x_j) <= r_k(x_j) <= max r_k, so candidates
    are widened until the farthest one lies beyond max r_k (or all rows are candidates).
    """
    n = train.shape[0]
    reach = float(np.max(radius))
    count = min(n, 3 * k + 1)
    idx, dist = exact_knn(train, count, metric=metric, query=rows)
    short = np.flatnonzero(dist[:, -1] <= reach)
    while short.size and count < n:
        count = min(n, 4 * count)
        more_idx, more_dist = exact_knn(train, count, metric=metric, query=rows[short])
        width = more_idx.shape[1]
        idx = _widen(idx, width, fill=0)
        dist = _widen(dist, width, fill=np.inf)
        idx[short], dist[short] = more_idx, more_dist
        short = short[more_dist[:, -1] <= reach]
    return idx, dist


def _widen(a: np.ndarray, width: int, *, fill) -> np.ndarray:
    if a.shape[1] >= width:
        return a
    pad = np.full((a.shape[0], width - a.shape[1]), fill, dtype=a.dtype)
    return np.concatenate([a, pad], axis=1)


def new_bandwidths(distances, *, bandwidth, bandwidth_neighbor, sigma_train):
    """sigma of placed rows: the bandwidth_neighbor-th positive distance, or the global one."""
    if bandwidth != "adaptive":
        return np.full(distances.shape[0], float(bandwidth))
    ordered = np.sort(np.where(distances > 0, distances, np.inf), axis=1)
    sigma = ordered[:, bandwidth_neighbor - 1]
    return np.where(np.isfinite(sigma), sigma, np.min(sigma_train))


def extend_rows(rows, train, *, radius, sigma, q, degrees, psi, eigenvalues, k, bandwidth,
                bandwidth_neighbor, alpha, diffusion_time, metric="euclidean"):
    """Map coordinates of ``rows`` by the Nystrom formula against the training rows.

    Returns
    -------
    ndarray, shape (m, components)
    """
    dist, idx = kernel_rows(rows, train, radius, k, metric=metric)
    sigma_new = new_bandwidths(dist, bandwidth=bandwidth, bandwidth_neighbor=bandwidth_neighbor,
                               sigma_train=sigma)
    return nystrom_extend(dist, idx, sigma_new, sigma, q, degrees, psi, eigenvalues,
                          alpha=alpha, diffusion_time=diffusion_time)

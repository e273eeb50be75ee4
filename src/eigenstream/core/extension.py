"""Placing rows on a finished map: kernel rows to the training set built like training rows.

Used for landmark mode (every row against the landmarks), for ``eigenstream place`` and for
``SpectralMap.transform``. With the union rule a training row's kernel row holds its k nearest
rows, every row that lists it among theirs, and itself (the self loop); a new row gets exactly
the same (methods.md §5.1, pitfalls i-ii), so a training row placed again lands on its own
coordinates.
"""

from __future__ import annotations

import numpy as np

from eigenstream.core.neighbors import kernel_support_blocks
from eigenstream.core.nystrom import nystrom_extend


def _linked(idx, dist, radius, k):
    """Distances of a support (rows sorted) with the edges the union rule drops set to +inf.

    A row y keeps its k nearest training rows at positive distance, every training row x_j
    with d(y, x_j) <= r_k(x_j) (the reverse edges) and exact copies (distance 0, the self
    loop); ``radius`` holds r_k of the training rows.
    """
    positive_rank = np.cumsum(dist > 0, axis=1)
    forward = (dist > 0) & (positive_rank <= k)
    reverse = dist <= radius[idx]
    linked = forward | reverse | (dist == 0)
    return np.where(linked, dist, np.inf)


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
    out = np.empty((np.shape(rows)[0], np.shape(psi)[1]))
    for start, stop, idx, support in kernel_support_blocks(train, rows, k, radius,
                                                           metric=metric):
        dist = _linked(idx, support, radius, k)
        sigma_new = new_bandwidths(dist, bandwidth=bandwidth,
                                   bandwidth_neighbor=bandwidth_neighbor, sigma_train=sigma)
        out[start:stop] = nystrom_extend(dist, idx, sigma_new, sigma, q, degrees, psi,
                                         eigenvalues, alpha=alpha,
                                         diffusion_time=diffusion_time, first_row=start)
    return out

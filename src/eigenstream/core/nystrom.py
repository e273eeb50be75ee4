"""Nystrom out-of-sample extension of diffusion coordinates (methods.md §5.1).

Bengio et al. (NIPS 16, 2004); Coifman & Lafon, "Geometric harmonics" (ACHA 21(1), 2006):
a new row y with kernel row k_j = k(y, x_j) built exactly like a training row is mapped to
psi_k(y) = (1/lambda_k) sum_j p_j psi_k(x_j), p = the alpha-normalized, row-stochastic kernel
row. Applied to a training row with its own kernel row this returns psi(x_i) exactly.
"""

from __future__ import annotations

import numpy as np

from eigenstream.core.spectral import time_power
from eigenstream.errors import InputError


def transition_rows(
    distances: np.ndarray,
    indices: np.ndarray,
    sigma_new: np.ndarray,
    sigma_train: np.ndarray,
    q_train: np.ndarray,
    *,
    alpha: float,
    first_row: int = 0,
) -> np.ndarray:
    """Markov transition probabilities p_j from new rows to their listed training rows.

    k_j = exp(-d_j^2 / (sigma_y sigma_j)); q(y) = sum_j k_j;
    k^(a)_j = k_j / (q(y)^a q_j^a); p_j = k^(a)_j / sum_j k^(a)_j (computed with the common
    factor q(y)^a cancelled and the exponents shifted, so it never underflows to 0/0).

    Parameters
    ----------
    distances, indices : ndarrays, shape (m, k)
        Kernel support of each new row in the training set (same rule as training rows; a
        zero-distance match to itself plays the role of the self loop).
    sigma_new : ndarray, shape (m,)
    sigma_train, q_train : ndarrays, shape (n,)
    alpha : float in [0, 1]
    first_row : int, default=0
        Number of the first row minus one, for error messages.

    Returns
    -------
    ndarray, shape (m, k), rows summing to 1
    """
    indices = np.asarray(indices, dtype=np.int64)
    d = np.asarray(distances, dtype=np.float64)
    sig = np.asarray(sigma_new, dtype=np.float64)[:, None] * np.asarray(sigma_train)[indices]
    exponent = (d * d) / sig
    nearest = exponent.min(axis=1)
    empty = np.flatnonzero(~np.isfinite(nearest))
    if empty.size:
        raise InputError(
            f"New row {first_row + empty[0] + 1} (and {empty.size - 1} more) has no listed training row "
            "to attach to; check that its values are finite."
        )
    # q(y)^a cancels in p_j = k_j / (q(y)^a q_j^a) / sum(...), so the kernel row may be
    # rescaled freely: shifting the exponent keeps rows far from every training row (whose
    # kernel values underflow to 0) attached to their nearest training rows.
    k = np.exp(-(exponent - nearest[:, None]))
    ka = k / np.asarray(q_train, dtype=np.float64)[indices] ** float(alpha)
    return ka / ka.sum(axis=1)[:, None]


def nystrom_extend(
    distances: np.ndarray,
    indices: np.ndarray,
    sigma_new: np.ndarray,
    sigma_train: np.ndarray,
    q_train: np.ndarray,
    degrees_train: np.ndarray,
    psi_train: np.ndarray,
    eigenvalues: np.ndarray,
    *,
    alpha: float,
    diffusion_time: float,
    first_row: int = 0,
) -> np.ndarray:
    """Diffusion coordinates of new rows by the Nystrom formula.

    Parameters
    ----------
    distances, indices : ndarrays, shape (m, k)
        Distances and indices of each new row's kernel support among the training rows.
    sigma_new : ndarray, shape (m,)
        Bandwidth of each new row (constant array for a global bandwidth).
    sigma_train : ndarray, shape (n,)
        Training bandwidths.
    q_train : ndarray, shape (n,)
        Training kernel row sums (``NormalizedGraph.q``).
    degrees_train : ndarray, shape (n,)
        Training degrees; the random-walk form does not need them (they cancel), they are
        checked for shape so that all arrays come from the same training graph.
    psi_train : ndarray, shape (n, c)
        Right eigenvectors of P on the training rows.
    eigenvalues : ndarray, shape (c,)
    alpha : float in [0, 1]
    diffusion_time : float >= 0
    first_row : int, default=0
        Number of the first row minus one, for error messages.

    Returns
    -------
    coords : ndarray, shape (m, c)
        lambda^t psi(y) (see ``spectral.time_power``).
    """
    psi_train = np.asarray(psi_train, dtype=np.float64)
    n = psi_train.shape[0]
    for name, arr in (
        ("sigma_train", sigma_train),
        ("q_train", q_train),
        ("degrees_train", degrees_train),
    ):
        if np.shape(arr) != (n,):
            raise ValueError(
                f"{name} must have shape ({n},) like psi_train's rows; got {np.shape(arr)}."
            )
    values = np.asarray(eigenvalues, dtype=np.float64)
    p = transition_rows(distances, indices, sigma_new, sigma_train, q_train, alpha=alpha,
                        first_row=first_row)
    psi_new = np.einsum("mk,mkc->mc", p, psi_train[np.asarray(indices, dtype=np.int64)]) / values
    return psi_new * time_power(values, diffusion_time)[None, :]

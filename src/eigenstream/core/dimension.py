"""Intrinsic dimension from sorted kNN distances (Levina & Bickel, NIPS 17, 2004/2005).

For each row x and neighbourhood size k, S_k(x) = sum_{j<k} log(T_k(x) / T_j(x)) with T_j the
distance to the j-th neighbour. Under the local Poisson model S_k(x) ~ Gamma(k-1, rate d), so
mean_x S_k / (k-1) estimates 1/d. Following MacKay & Ghahramani (2005 comment) the per-k estimate
is the inverse of that average rather than the average of per-row inverses (which is biased up
by (k-1)/(k-2)); Levina & Bickel then average over k = 10..20 (methods.md §6).
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from eigenstream.errors import InputError


def levina_bickel(distances: np.ndarray, *, k_min: int = 10, k_max: int = 20) -> float:
    """Maximum-likelihood intrinsic dimension, averaged over k = k_min..k_max.

    Parameters
    ----------
    distances : ndarray, shape (n, K), K >= k_max
        kNN distances sorted ascending along each row, the row itself excluded.
    k_min, k_max : int
        Range of neighbourhood sizes, ``2 <= k_min <= k_max <= K``.

    Returns
    -------
    float
        Mean over k of the per-k estimates of :func:`levina_bickel_per_k`.

    Raises
    ------
    InputError
        When no row has positive distances to its first ``k_max`` neighbours.
    """
    if not 2 <= k_min <= k_max:
        raise ValueError(f"need 2 <= k_min <= k_max; got k_min={k_min}, k_max={k_max}.")
    per_k = levina_bickel_per_k(distances, range(k_min, k_max + 1))
    return float(np.mean(list(per_k.values())))


def levina_bickel_per_k(distances: np.ndarray, ks: Iterable[int]) -> dict[int, float]:
    """Inverse-average Levina-Bickel estimate for each neighbourhood size in ``ks``.

    Rows with a zero among the distances used (duplicate rows) carry no scale information and
    are left out.

    Parameters
    ----------
    distances : ndarray, shape (n, K)
        kNN distances sorted ascending along each row, the row itself excluded.
    ks : iterable of int
        Neighbourhood sizes, each in ``[2, K]``.

    Returns
    -------
    dict
        ``{k: d_hat_k}`` with ``d_hat_k = [mean_x S_k(x) / (k-1)]^-1``, in the order of ``ks``.
    """
    ks = [int(k) for k in ks]
    if not ks:
        raise ValueError("ks must name at least one neighbourhood size.")
    d = np.asarray(distances, dtype=np.float64)
    if d.ndim != 2:
        raise ValueError(f"distances must be a 2-D (rows x neighbours) array; got {d.ndim} dims.")
    top = max(ks)
    if min(ks) < 2 or top > d.shape[1]:
        raise ValueError(
            f"every k must be in [2, {d.shape[1]}] (the number of neighbour columns); got {ks}."
        )
    d = d[:, :top]
    if not np.all(np.isfinite(d)):
        raise ValueError("distances hold NaN or infinite values.")
    if np.any(np.diff(d, axis=1) < 0):
        raise ValueError("distances must be sorted ascending along each row.")
    d = d[d[:, 0] > 0]  # sorted rows: a zero anywhere means a zero first entry
    if d.shape[0] == 0:
        raise InputError(
            "every row has a duplicate among its neighbours (distance 0); "
            "remove duplicate rows before estimating the dimension."
        )
    logs = np.log(d)
    cums = np.cumsum(logs, axis=1)
    out = {}
    for k in ks:
        # S_k = (k-1) log T_k - sum_{j<k} log T_j for every row at once.
        s_k = (k - 1) * logs[:, k - 1] - cums[:, k - 2]
        mean_inv = float(np.mean(s_k)) / (k - 1)
        if mean_inv <= 0:
            raise InputError(
                f"all rows have equal distances to their first {k} neighbours; "
                "the dimension is undefined at this neighbourhood size."
            )
        out[k] = 1.0 / mean_inv
    return out

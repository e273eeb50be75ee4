"""Bandwidth and neighbourhood-size suggestions from the log-sum-of-kernel curve.

S(eps) = sum_ij exp(-d_ij^2 / eps). On data of intrinsic dimension d, for eps between the squared
point spacing and the squared curvature radius, S ~ eps^(d/2), so the slope d log S / d log eps
is about d/2 there and falls to 0 on both sides (Coifman, Shkolnisky, Sigworth & Singer, IEEE TIP
2008; Hein & Audibert, ICML 2005; methods.md §2.4, §9.8). The region where the slope is high is
where a Gaussian kernel "sees" the geometry; its argmax is the usual single choice of eps.

Bandwidth units: eps is the Coifman-Lafon scale of exp(-d^2/eps). The configuration's global
``[kernel] bandwidth`` sigma means exp(-d^2/sigma^2), so sigma = sqrt(eps); :func:`recommend`
reports bandwidths in sigma units.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial.distance import pdist, squareform
from scipy.stats import gamma

from eigenstream.core.dimension import levina_bickel, levina_bickel_per_k
from eigenstream.core.neighbors import exact_knn
from eigenstream.errors import InputError

# exp(-60) ~ 1e-26: terms smaller than that relative to the largest one cannot move log S.
_NEGLIGIBLE = 60.0
# Rows of the dense sample used by recommend (dense distances are O(rows^2) memory and time).
DENSE_MAX_ROWS = 5000
# Points per decade of eps in recommend's grid.
_GRID_PER_DECADE = 16
_GRID_MAX = 160


def kernel_sum_curve(
    distances: np.ndarray, eps_grid: np.ndarray, *, include_self: bool = True
) -> np.ndarray:
    """log S(eps) for each eps in the grid, S(eps) = sum of exp(-d^2 / eps) over pairs.

    Three layouts are accepted:

    * dense distance matrix of a sample, shape (m, m), zero diagonal: S sums all m^2 entries.
      This is the appropriate input for locating the linear region and its argmax; a sample of
      up to a few thousand rows suffices.
    * condensed distances, shape (m(m-1)/2,), as returned by ``scipy.spatial.distance.pdist``:
      same S as the dense matrix, without building it.
    * kNN distances, shape (n, k) with k < n, the row itself excluded: S sums the n k listed
      pairs. The sum stops growing once eps exceeds about the squared k-th neighbour distance,
      so this curve is meaningful only for eps below roughly median r_k^2, i.e. for judging a
      bandwidth on that kNN graph, not for the full linear region.

    Parameters
    ----------
    distances : ndarray
        One of the layouts above. A square array is always read as a dense matrix.
    eps_grid : array_like of float, shape (g,)
        Positive kernel scales.
    include_self : bool
        Add the diagonal terms exp(0) = 1 (one per row). With the diagonal, S -> rows as
        eps -> 0 and the slope falls to 0; without it the slope grows without bound there.

    Returns
    -------
    log_sums : ndarray of float64, shape (g,)
        Natural logarithm of S(eps).
    """
    eps = np.asarray(eps_grid, dtype=np.float64).ravel()
    if eps.size == 0 or not np.all(np.isfinite(eps)) or np.any(eps <= 0):
        raise ValueError("eps_grid must hold positive finite numbers.")
    sq, weight, rows = _pair_squares(distances)
    sq.sort()  # in place: sq is a fresh array, and this may be m^2/2 values
    if not include_self and sq.size == 0:
        raise ValueError("without the diagonal there are no pairs to sum.")
    # Shift by the smallest exponent so the largest term is exp(0): no underflow to log(0).
    shift = 0.0 if include_self else float(sq[0])
    if shift:
        sq -= shift
    buf = np.empty_like(sq)  # reused scratch: the grid loop touches up to m^2/2 values per eps
    out = np.empty(eps.size)
    for g, e in enumerate(eps):
        stop = int(np.searchsorted(sq, _NEGLIGIBLE * e, side="right"))
        part = np.multiply(sq[:stop], -1.0 / e, out=buf[:stop])
        total = weight * float(np.exp(part, out=part).sum())
        if include_self:
            total += rows
        out[g] = math.log(total) - shift / e
    return out


def kernel_sum_slope(log_eps: np.ndarray, log_sums: np.ndarray) -> np.ndarray:
    """Numerical derivative d log S / d log eps on a (possibly uneven) grid.

    Parameters
    ----------
    log_eps : array_like, shape (g,), strictly increasing, g >= 2
        Logarithms of eps (any base, the same as for ``log_sums``).
    log_sums : array_like, shape (g,)
        Logarithms of S(eps), e.g. from :func:`kernel_sum_curve`.

    Returns
    -------
    slopes : ndarray of float64, shape (g,)
        Second-order central differences inside, one-sided at the ends.
    """
    x = np.asarray(log_eps, dtype=np.float64).ravel()
    y = np.asarray(log_sums, dtype=np.float64).ravel()
    if x.size != y.size or x.size < 2:
        raise ValueError("log_eps and log_sums must have the same length, at least 2.")
    if np.any(np.diff(x) <= 0):
        raise ValueError("log_eps must be strictly increasing.")
    return np.gradient(y, x, edge_order=2 if x.size >= 3 else 1)


def bandwidth_range(
    eps_grid: np.ndarray, slopes: np.ndarray, *, fraction: float = 0.5
) -> tuple[float, float, float]:
    """Linear region of the log-sum curve and its steepest point.

    Parameters
    ----------
    eps_grid : array_like, shape (g,)
        Increasing kernel scales.
    slopes : array_like, shape (g,)
        d log S / d log eps at those scales.
    fraction : float
        The region is the contiguous run of grid points around the argmax where the slope is
        at least ``fraction`` times its maximum, ``0 < fraction <= 1``.

    Returns
    -------
    eps_low, eps_high : float
        Ends of that run (grid values).
    eps_best : float
        Grid value of the largest slope.
    """
    eps = np.asarray(eps_grid, dtype=np.float64).ravel()
    s = np.asarray(slopes, dtype=np.float64).ravel()
    if eps.size != s.size or eps.size == 0:
        raise ValueError("eps_grid and slopes must have the same, non-zero length.")
    if not 0 < fraction <= 1:
        raise ValueError(f"fraction must be in (0, 1]; got {fraction}.")
    best = int(np.argmax(s))
    if not s[best] > 0:
        raise InputError(
            "the kernel sum never increases over this eps grid; widen the grid "
            "(it must span the squared nearest-neighbour to squared diameter distances)."
        )
    low_side = np.flatnonzero(s[:best] < fraction * s[best])
    high_side = np.flatnonzero(s[best:] < fraction * s[best])
    lo = low_side[-1] + 1 if low_side.size else 0
    hi = best + high_side[0] - 1 if high_side.size else s.size - 1
    return float(eps[lo]), float(eps[hi]), float(eps[best])


def dimension_from_slope(max_slope: float) -> float:
    """Rough intrinsic dimension 2 * max slope (S ~ eps^(d/2); methods.md §9.8).

    Biased low by boundaries and finite samples beyond d ~ 2 (cube^5 gives about 3.9);
    use it as a sanity check, not as an estimator.
    """
    return 2.0 * float(max_slope)


def recommend(
    sample: np.ndarray,
    *,
    seed: int = 0,
    neighbors_grid: Sequence[int] = (10, 15, 30),
    n_rows: int | None = None,
    max_rows: int = DENSE_MAX_ROWS,
) -> dict[str, Any]:
    """Suggest graph and kernel settings from a sample of the rows (Euclidean distances).

    Rules (all rules of thumb, stated in the returned ``reasons``):

    * intrinsic dimension d: Levina-Bickel, k = 10..20, inverse average.
    * neighbours: the smallest k in ``neighbors_grid`` with k >= 5 round(d) whose (union) kNN
      graph on the sample is connected; the largest connected k if none reaches that.
      "5 per dimension" is our own rule: a kNN ball must hold points in every direction of the
      manifold, which takes more points as d grows (common practice: 10-15 for d ~ 2).
    * bandwidth: "adaptive" (self-tuning, Zelnik-Manor & Perona 2004, K = 7) when the spread
      of the K-th neighbour volume r_K^d over rows exceeds twice what a uniform sample gives
      (ratio of 90 % to 10 % quantiles vs. the Gamma(K) law of the Poisson model), i.e. the
      density varies; otherwise a global sigma with sigma^2 = median r_k^2 (common practice,
      methods.md §2.1), rescaled to ``n_rows`` and clipped into the linear region of the
      log-sum curve.
    * alpha = 1: the Laplace-Beltrami normalization (Coifman & Lafon 2006), independent of the
      sampling density.

    Parameters
    ----------
    sample : ndarray, shape (m, D)
        Rows (a random sample of the data, or all of it). Duplicate rows are collapsed.
    seed : int
        Seed of the subsample drawn when there are more than ``max_rows`` distinct rows.
    neighbors_grid : sequence of int
        Candidate neighbour counts.
    n_rows : int, optional
        Rows in the full data the sample stands for (default: the sample size). kNN distances
        shrink like n^(-1/d), so the global bandwidth is scaled by (m / n_rows)^(1/d).
    max_rows : int
        Cap on the rows used for dense distances.

    Returns
    -------
    dict
        ``intrinsic_dimension``, ``dimension_per_k`` {k: d_k for k in the grid},
        ``slope_dimension`` (2 * max slope), ``bandwidth_range`` [low, high] and
        ``bandwidth_best`` (sigma units, this sample), ``components`` {k: count},
        ``rows_used``, ``recommended`` {"graph": {"neighbors"}, "kernel": {"bandwidth",
        "bandwidth_neighbor", "alpha"}}, ``reasons`` {key: sentence} and ``curve`` {"eps",
        "log_sum", "slope"} as plain lists.
    """
    x = _distinct_rows(sample, seed=seed, max_rows=max_rows)
    m = x.shape[0]
    grid = sorted({int(k) for k in neighbors_grid if 2 <= int(k) <= m - 1})
    if not grid:
        raise ValueError(
            f"neighbors_grid must hold integers in [2, {m - 1}]; got {neighbors_grid}."
        )
    kmax = max(grid[-1], 20)
    if m <= kmax:
        raise InputError(
            f"the sample has {m} distinct rows; at least {kmax + 1} are needed — use a larger sample."
        )
    idx, dist = exact_knn(x, kmax)
    dim = levina_bickel(dist, k_min=10, k_max=20)
    per_k = levina_bickel_per_k(dist, grid)
    components = {k: _components(idx[:, :k]) for k in grid}
    neighbors, why_k = _choose_neighbors(grid, components, dim)

    condensed = pdist(x)
    eps = _eps_grid(dist[:, 0], condensed)
    log_sum = kernel_sum_curve(condensed, eps)
    slope = kernel_sum_slope(np.log(eps), log_sum)
    eps_low, eps_high, eps_best = bandwidth_range(eps, slope)

    bw_neighbor = min(7, neighbors)
    total = m if n_rows is None else max(int(n_rows), m)
    bandwidth, why_bw = _choose_bandwidth(
        dist, dim, neighbors, bw_neighbor, (eps_low, eps_high), total / m
    )
    return {
        "intrinsic_dimension": dim,
        "dimension_per_k": per_k,
        "slope_dimension": dimension_from_slope(float(slope.max())),
        "bandwidth_range": [math.sqrt(eps_low), math.sqrt(eps_high)],
        "bandwidth_best": math.sqrt(eps_best),
        "components": components,
        "rows_used": m,
        "recommended": {
            "graph": {"neighbors": neighbors},
            "kernel": {"bandwidth": bandwidth, "bandwidth_neighbor": bw_neighbor, "alpha": 1.0},
        },
        "reasons": {
            "neighbors": why_k,
            "bandwidth": why_bw,
            "bandwidth_neighbor": (
                f"self-tuning scale = distance to the {bw_neighbor}-th neighbour "
                "(Zelnik-Manor & Perona 2004 used 7), never above the neighbour count."
            ),
            "alpha": "alpha = 1 removes the sampling density, so the map follows the geometry "
            "(Laplace-Beltrami limit, Coifman & Lafon 2006).",
        },
        "curve": {"eps": eps.tolist(), "log_sum": log_sum.tolist(), "slope": slope.tolist()},
    }


# --------------------------------------------------------------------------------------------
# helpers


def _pair_squares(distances) -> tuple[np.ndarray, float, int]:
    """Squared pair distances, the multiplicity of each listed pair, and the number of rows."""
    d = np.asarray(distances, dtype=np.float64)
    if d.ndim == 1:
        rows = (1 + math.isqrt(1 + 8 * d.size)) // 2
        if rows * (rows - 1) // 2 != d.size:
            raise ValueError(
                f"a 1-D distances array must be condensed (length m(m-1)/2); got length {d.size}."
            )
        vals, weight = d, 2.0  # each unordered pair stands for (i, j) and (j, i)
    elif d.ndim == 2 and d.shape[0] == d.shape[1]:
        if np.any(np.diag(d) != 0):
            raise ValueError("a square distances array must be a distance matrix (zero diagonal).")
        rows = d.shape[0]
        vals, weight = squareform(d, checks=False), 2.0
    elif d.ndim == 2:
        rows = d.shape[0]
        vals, weight = d.ravel(), 1.0
    else:
        raise ValueError(f"distances must be 1-D (condensed) or 2-D; got {d.ndim} dims.")
    if not np.all(np.isfinite(vals)) or np.any(vals < 0):
        raise ValueError("distances must be finite and non-negative.")
    return vals * vals, weight, rows


def _distinct_rows(sample, *, seed: int, max_rows: int) -> np.ndarray:
    """Finite 2-D float rows without duplicates, subsampled to at most ``max_rows``."""
    x = np.asarray(sample, dtype=np.float64)
    if x.ndim != 2:
        raise InputError(f"the sample must be a 2-D table (rows x columns); got {x.ndim} dims.")
    if not np.all(np.isfinite(x)):
        raise InputError("the sample holds NaN or infinite values; remove or impute them first.")
    # Duplicates carry no geometry and would put zeros among the kNN distances.
    x = np.unique(x, axis=0)
    if x.shape[0] > max_rows:
        pick = np.random.default_rng(seed).choice(x.shape[0], size=max_rows, replace=False)
        x = x[np.sort(pick)]
    return x


def _components(idx: np.ndarray) -> int:
    """Connected components of the union-symmetrized kNN graph."""
    n, k = idx.shape
    adj = csr_matrix((np.ones(n * k), (np.repeat(np.arange(n), k), idx.ravel())), shape=(n, n))
    return int(connected_components(adj, directed=False)[0])


def _choose_neighbors(grid: list[int], components: dict[int, int], dim: float) -> tuple[int, str]:
    """Smallest connected k >= 5 round(d) from the grid (see :func:`recommend`)."""
    # Rounding keeps d = 1.98 and d = 2.03 on the same side (both are "2-D").
    target = 5 * max(1, round(dim))
    connected = [k for k in grid if components[k] == 1]
    wide = [k for k in connected if k >= target]
    if wide:
        k = wide[0]
        return k, (
            f"smallest candidate >= 5 x rounded intrinsic dimension ({target}) with a connected "
            "kNN graph on the sample (rule of thumb: more neighbours for higher dimension)."
        )
    if connected:
        k = connected[-1]
        return k, (
            f"largest candidate with a connected kNN graph; 5 x rounded intrinsic dimension "
            f"({target}) exceeds every candidate."
        )
    k = grid[-1]
    return k, (
        f"largest candidate, but the kNN graph on the sample still has {components[k]} "
        "components: the data may hold separate clusters — embed them separately or add neighbours."
    )


def _choose_bandwidth(dist, dim, neighbors, bw_neighbor, region, growth) -> tuple[Any, str]:
    """Pick "adaptive" for uneven density, else a global sigma (see :func:`recommend`)."""
    r_bw = dist[:, bw_neighbor - 1]
    r_bw = r_bw[r_bw > 0]
    # Under the Poisson model the volume ~ r_K^d of the K-th neighbour ball is Gamma(K).
    q10, q90 = np.quantile(r_bw, [0.1, 0.9])
    spread = (q90 / q10) ** dim
    uniform = gamma.ppf(0.9, bw_neighbor) / gamma.ppf(0.1, bw_neighbor)
    if spread > 2.0 * uniform:
        return "adaptive", (
            f"density varies: the {bw_neighbor}-th neighbour volume spreads {spread:.3g}x "
            f"(90%/10% quantiles) vs {uniform:.2g}x for uniform data, so per-row scales fit better."
        )
    # kNN radii shrink like n^(-1/d) when the sample stands for more rows.
    scale2 = growth ** (-2.0 / max(dim, 1e-12))
    eps_knn = float(np.median(dist[:, neighbors - 1] ** 2)) * scale2
    eps = float(np.clip(eps_knn, region[0] * scale2, region[1]))
    return math.sqrt(eps), (
        f"density is even ({spread:.3g}x spread vs {uniform:.2g}x for uniform data): one global "
        f"sigma = median distance to the {neighbors}-th neighbour, kept inside the linear region "
        "of the log-sum curve."
    )


def _eps_grid(nearest: np.ndarray, condensed: np.ndarray) -> np.ndarray:
    """Log-spaced eps from well below the squared spacing to well above the squared diameter."""
    positive = nearest[nearest > 0]
    low = 0.1 * float(np.median(positive)) ** 2
    high = 10.0 * float(condensed.max()) ** 2
    # Capped so that extreme spreads of scale cost at most _GRID_MAX curve evaluations.
    count = min(_GRID_MAX, max(16, int(math.ceil(math.log10(high / low) * _GRID_PER_DECADE)) + 1))
    return np.geomspace(low, high, count)

"""In-memory estimator with scikit-learn's conventions, built from the same cores as a run."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.validation import check_array, check_is_fitted

from eigenstream.core.extension import extend_rows
from eigenstream.core.graph import alpha_normalize, symmetric_affinity
from eigenstream.core.harmonics import keep_coordinates
from eigenstream.core.kernels import adaptive_bandwidths, fill_zero_bandwidths, gaussian_weights
from eigenstream.core.neighbors import approximate_knn, exact_knn
from eigenstream.core.spectral import solve_embedding
from eigenstream.errors import ConfigError, InputError


class SpectralMap(TransformerMixin, BaseEstimator):
    """Diffusion map / Laplacian eigenmap of an in-memory array.

    Same kernel, normalisation, solver and sign rule as ``eigenstream run``; use it for arrays
    that fit in memory. New rows are placed with the Nystrom extension.

    Parameters
    ----------
    n_components : int, default=2
        Coordinates per row (the trivial constant eigenvector is excluded).
    n_neighbors : int, default=15
        Neighbours per row in the kNN graph.
    bandwidth : "adaptive" or float, default="adaptive"
        Adaptive: sigma_i = distance to the ``bandwidth_neighbor``-th neighbour
        (Zelnik-Manor & Perona 2004); a number: one global sigma, kernel exp(-d^2/sigma^2).
    bandwidth_neighbor : int, default=7
    alpha : float, default=1.0
        Density normalisation of diffusion maps (Coifman & Lafon 2006), in [0, 1].
    diffusion_time : float, default=1.0
        Coordinates are lambda^t psi; 0 gives Laplacian-eigenmap coordinates.
    metric : {"euclidean", "cosine"}, default="euclidean"
    exact_max_rows : int, default=20000
        Up to this many rows the neighbours are exact; above, pynndescent is used.
    tol : float, default=1e-8
        Eigensolver tolerance.
    random_state : int, default=0
    choose_from : int, default=0
        0: the coordinates are the leading ``n_components`` eigenvectors. N (at least
        ``n_components + 1``, at most 30): the leading N are computed and the ``n_components``
        that local linear regression on the earlier ones explains least are kept, dropping
        harmonics of directions already mapped (Dsilva et al. 2018), as
        ``[embedding] choose_from`` does in a run.

    Attributes
    ----------
    embedding_ : ndarray of shape (n_samples, n_components)
    eigenvalues_ : ndarray of shape (n_components,)
    residuals_ : ndarray of shape (n_components,)
    eigenvectors_kept_ : list of int
        Which eigenvectors (1 = the first non-trivial one) the coordinates are.
    candidate_harmonic_residuals_ : list of float or None
        With ``choose_from``: the regression residual of each of the leading N.
    """

    def __init__(self, n_components=2, *, n_neighbors=15, bandwidth="adaptive",
                 bandwidth_neighbor=7, alpha=1.0, diffusion_time=1.0, metric="euclidean",
                 exact_max_rows=20_000, tol=1e-8, random_state=0, choose_from=0):
        self.n_components = n_components
        self.n_neighbors = n_neighbors
        self.bandwidth = bandwidth
        self.bandwidth_neighbor = bandwidth_neighbor
        self.alpha = alpha
        self.diffusion_time = diffusion_time
        self.metric = metric
        self.exact_max_rows = exact_max_rows
        self.tol = tol
        self.random_state = random_state
        self.choose_from = choose_from

    def _check_settings(self, n: int) -> None:
        k = self.n_neighbors
        if not isinstance(k, int | np.integer) or k < 1:
            raise ConfigError(f"`n_neighbors` must be an integer >= 1; got {k!r}.")
        if n < k + 1:
            raise InputError(f"`n_neighbors` = {k} needs at least {k + 1} rows; got {n}.")
        if not 0.0 <= float(self.alpha) <= 1.0:
            raise ConfigError(f"`alpha` must be a number in [0, 1]; got {self.alpha!r}.")
        if self.n_components < 1 or self.n_components >= n - 1:
            raise ConfigError(
                f"`n_components` must be in [1, {n - 2}] for {n} rows; got {self.n_components!r}."
            )
        m = self.choose_from
        low, high = self.n_components + 1, min(30, n - 2)
        if not isinstance(m, int | np.integer) or isinstance(m, bool) or not (
            m == 0 or low <= m <= high
        ):
            raise ConfigError(
                f"`choose_from` must be 0 or an integer in [{low}, {high}] for {n} rows and "
                f"{self.n_components} components; got {m!r}."
            )
        if self.bandwidth == "adaptive" and self.bandwidth_neighbor > k:
            raise ConfigError("`bandwidth_neighbor` must not exceed `n_neighbors`.")

    def _sigma(self, distances: np.ndarray) -> np.ndarray:
        if self.bandwidth != "adaptive":
            return np.full(distances.shape[0], float(self.bandwidth))
        return adaptive_bandwidths(distances, neighbor=self.bandwidth_neighbor)

    def fit(self, X, y=None):
        """Build the graph of ``X`` and compute its embedding."""
        X = check_array(X, dtype=np.float64)
        n = X.shape[0]
        self._check_settings(n)
        k = self.n_neighbors
        if n <= self.exact_max_rows:
            idx, dist = exact_knn(X, k, metric=self.metric, query_start=0)
        else:
            from eigenstream.warmup import use_numba_cache_dir

            use_numba_cache_dir()  # the compiled search is kept with the pipeline's
            idx, dist = approximate_knn(X, k, metric=self.metric, seed=self.random_state)
        try:
            sigma = fill_zero_bandwidths(self._sigma(dist))
        except ValueError:
            raise InputError("All rows are identical; there is no structure to embed.") from None
        K = symmetric_affinity(idx, gaussian_weights(dist, sigma, sigma[idx]), n, self_loops=True)
        norm = alpha_normalize(K, float(self.alpha))
        emb = solve_embedding(
            K.__matmul__, norm.scale, norm.degrees,
            components=self.choose_from or self.n_components,
            diffusion_time=float(self.diffusion_time), tol=self.tol, max_matvecs=200_000,
            seed=self.random_state,
        )
        self.train_ = X
        self.sigma_ = sigma
        self.radius_ = dist[:, k - 1]
        self.q_ = norm.q
        self.degrees_ = norm.degrees
        kept, self.candidate_harmonic_residuals_ = keep_coordinates(
            emb.psi, self.n_components, self.choose_from, seed=self.random_state)
        self.eigenvectors_kept_ = [int(i) + 1 for i in kept]
        self.psi_ = emb.psi[:, kept]
        self.eigenvalues_ = emb.eigenvalues[kept]
        self.residuals_ = emb.residuals[kept]
        self.embedding_ = emb.coordinates[:, kept]
        self.n_features_in_ = X.shape[1]
        return self

    def fit_transform(self, X, y=None):
        """Fit and return the embedding of the training rows."""
        return self.fit(X).embedding_

    def transform(self, X):
        """Place new rows on the fitted map with the Nystrom extension."""
        check_is_fitted(self, "psi_")
        X = check_array(X, dtype=np.float64)
        if X.shape[1] != self.n_features_in_:
            raise InputError(
                f"X has {X.shape[1]} columns but the map was fitted on {self.n_features_in_}."
            )
        return extend_rows(
            X, self.train_, radius=self.radius_, sigma=self.sigma_, q=self.q_,
            degrees=self.degrees_, psi=self.psi_, eigenvalues=self.eigenvalues_,
            k=self.n_neighbors, bandwidth=self.bandwidth,
            bandwidth_neighbor=self.bandwidth_neighbor, alpha=float(self.alpha),
            diffusion_time=float(self.diffusion_time), metric=self.metric,
        )

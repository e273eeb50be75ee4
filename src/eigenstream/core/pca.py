"""Principal component analysis of a table that is only available as a stream of row blocks.

The table X (n rows, D columns) is never held in memory: ``blocks()`` is called once per pass
and yields row blocks in the same order every time. Memory is O(D^2 + block) on the exact route
and O(D (c + oversampling) + block) on the randomized route, never O(n D).

Routes (``method="auto"`` picks the exact one when D <= :data:`EXACT_MAX_COLUMNS`):

* exact: one pass accumulates the column means and the centred scatter matrix
  sum_i (x_i - mean)(x_i - mean)^T in float64, merging blocks with the pairwise update of
  Chan, Golub & LeVeque (1979); the top eigenpairs of scatter / (n - 1) are the answer.
* randomized: randomized subspace iteration on the covariance, Halko, Martinsson & Tropp,
  SIAM Review 53(2), 2011, Algorithms 4.3/4.4 (range finder with q power iterations) followed by
  the Rayleigh-Ritz step of Algorithm 5.1. Every pass applies the centred matrix A = X - 1 mean^T
  twice, Y = A^T (A Q), so no n-long vector is ever stored. The first pass also finds the
  column means (centring about the first block's mean and correcting afterwards), so the route
  costs ``power_iterations + 2`` passes in all.

Variances use ddof = 1 and components are sign-fixed so that the largest-magnitude entry of
each is positive, the same conventions as scikit-learn's PCA.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from eigenstream.errors import CheckpointError, ConfigError, InputError

# Largest column count for which method="auto" takes the exact route. At D = 2000 the scatter
# matrix is 32 MB and its eigendecomposition takes about a second, cheaper than the
# power_iterations + 2 passes of the randomized route over a large table.
EXACT_MAX_COLUMNS = 2000
METHODS = ("auto", "exact", "randomized")

_ARRAY_KEYS = (
    "mean",
    "components",
    "explained_variance",
    "explained_variance_ratio",
    "total_variance",
)


@dataclass(frozen=True, eq=False)
class PCAModel:
    """A fitted principal component model.

    Attributes
    ----------
    mean : ndarray, shape (D,)
        Column means of the fitted table.
    components : ndarray, shape (c, D)
        Orthonormal principal directions, by decreasing variance; the largest-magnitude entry
        of each row is positive.
    explained_variance : ndarray, shape (c,)
        Sample variance (ddof = 1) of the table along each component.
    explained_variance_ratio : ndarray, shape (c,)
        ``explained_variance / total_variance`` (zeros for a constant table).
    total_variance : float
        Sum of the sample variances (ddof = 1) of all D columns.
    """

    mean: np.ndarray
    components: np.ndarray
    explained_variance: np.ndarray
    explained_variance_ratio: np.ndarray
    total_variance: float

    def __post_init__(self) -> None:
        for name in ("mean", "components", "explained_variance", "explained_variance_ratio"):
            value = np.array(getattr(self, name), dtype=np.float64, order="C")
            value.flags.writeable = False  # the model is frozen; so are its arrays
            object.__setattr__(self, name, value)
        object.__setattr__(self, "total_variance", float(self.total_variance))
        variance = self.explained_variance
        if (
            self.mean.ndim != 1
            or variance.ndim != 1
            or self.components.shape != (variance.shape[0], self.mean.shape[0])
            or self.explained_variance_ratio.shape != variance.shape
        ):
            raise ValueError(
                f"PCA model parts do not fit together: mean {self.mean.shape}, components "
                f"{self.components.shape}, explained_variance {variance.shape}, "
                f"explained_variance_ratio {self.explained_variance_ratio.shape}."
            )

    @property
    def n_components(self) -> int:
        """Number of components c."""
        return self.components.shape[0]

    @property
    def n_columns(self) -> int:
        """Number of input columns D."""
        return self.mean.shape[0]

    def transform(self, block: np.ndarray) -> np.ndarray:
        """Coordinates of rows along the principal components.

        Parameters
        ----------
        block : ndarray, shape (m, D)

        Returns
        -------
        ndarray, shape (m, c)
            ``(block - mean) @ components.T``; float32 for float32 input, float64 otherwise.
        """
        block = np.asarray(block)
        if block.ndim != 2 or block.shape[1] != self.n_columns:
            raise InputError(
                f"PCA transform expects rows of {self.n_columns} columns; got an array of shape "
                f"{block.shape}; pass a 2-D block with the columns the model was fitted on."
            )
        # float32 stays float32 so a block costs no float64 copy; its own rounding dominates.
        dtype = np.float32 if block.dtype == np.float32 else np.float64
        block = block.astype(dtype, copy=False)
        return (block - self.mean.astype(dtype)) @ self.components.T.astype(dtype)

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain float64 arrays (total_variance as a 0-d array), for array stores without pickle."""
        return {
            "mean": self.mean.copy(),
            "components": self.components.copy(),
            "explained_variance": self.explained_variance.copy(),
            "explained_variance_ratio": self.explained_variance_ratio.copy(),
            "total_variance": np.asarray(self.total_variance, dtype=np.float64),
        }

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, np.ndarray]) -> PCAModel:
        """Rebuild a model from the output of :meth:`to_arrays`.

        Raises
        ------
        CheckpointError
            If a part is missing or the parts do not fit together.
        """
        missing = [k for k in _ARRAY_KEYS if k not in arrays]
        if missing:
            raise CheckpointError(
                f"stored PCA model lacks {', '.join(missing)}; delete it so that PCA is refitted."
            )
        total = np.asarray(arrays["total_variance"], dtype=np.float64)
        if total.size != 1:
            raise CheckpointError(
                f"stored PCA total_variance has shape {total.shape}, expected a scalar; delete "
                "the stored model so that PCA is refitted."
            )
        try:
            return cls(
                mean=np.asarray(arrays["mean"]),
                components=np.asarray(arrays["components"]),
                explained_variance=np.asarray(arrays["explained_variance"]),
                explained_variance_ratio=np.asarray(arrays["explained_variance_ratio"]),
                total_variance=float(total.reshape(())),
            )
        except ValueError as err:
            raise CheckpointError(
                f"stored PCA model is damaged ({err}); delete it so that PCA is refitted."
            ) from err


def choose_method(n_columns: int, method: str = "auto") -> str:
    """Route taken by :func:`fit_pca` for a table of ``n_columns`` columns.

    Returns
    -------
    {"exact", "randomized"}
        ``method`` itself unless it is "auto"; then "exact" when
        ``n_columns <= EXACT_MAX_COLUMNS`` and "randomized" otherwise.
    """
    if method not in METHODS:
        raise ConfigError(f"PCA method must be one of {', '.join(METHODS)}; got {method!r}.")
    if method != "auto":
        return method
    return "exact" if n_columns <= EXACT_MAX_COLUMNS else "randomized"


def fit_pca(
    blocks: Callable[[], Iterable[np.ndarray]],
    n_components: int,
    *,
    method: str = "auto",
    oversampling: int = 10,
    power_iterations: int = 4,
    rng: np.random.Generator | int | None = None,
) -> PCAModel:
    """Principal components of a table streamed as row blocks.

    Parameters
    ----------
    blocks : callable
        ``blocks()`` returns an iterable of arrays of shape (m, D) (m may vary, 0 allowed);
        every call must yield the same rows in the same order. Called once on the exact route
        and ``power_iterations + 2`` times on the randomized route.
    n_components : int
        Number of components c, 1 <= c <= min(n, D).
    method : {"auto", "exact", "randomized"}
        "auto" means "exact" when D <= :data:`EXACT_MAX_COLUMNS`, else "randomized".
    oversampling : int
        Extra directions p carried by the randomized route (sketch width min(c + p, D)).
    power_iterations : int
        Power iterations q of the randomized route; each one damps the directions outside the
        sketch by a further (sigma_{c+p+1} / sigma_c)^2 relative to the wanted ones, so data
        without a gap after component c need more (Halko et al. 2011, §4.5; from memory).
    rng : Generator, int or None
        Source of the random test matrix of the randomized route; None means seed 0, so
        repeated fits give the same model.

    Returns
    -------
    PCAModel

    Raises
    ------
    ConfigError
        Bad option values, or n_components above the number of columns or rows.
    InputError
        No rows, fewer than two rows, blocks that are not 2-D, a changing column count,
        non-finite values, or a factory that yields a different row count on a later pass.
    """
    _check_options(n_components, oversampling, power_iterations)
    choose_method(0, method)  # rejects an unknown name before any data is read
    generator = (
        rng
        if isinstance(rng, np.random.Generator)
        else np.random.default_rng(0 if rng is None else rng)
    )
    first: _ScatterSum | _FirstSketch | None = None
    for block in _checked_blocks(blocks, None, pass_number=1):
        if first is None:
            d = block.shape[1]
            if n_components > d:
                raise ConfigError(
                    f"n_components={n_components} exceeds the {d} columns of the table; ask "
                    f"for at most {d} components."
                )
            if choose_method(d, method) == "exact":
                first = _ScatterSum(d)
            else:
                width = min(n_components + oversampling, d)
                first = _FirstSketch(generator.standard_normal((d, width)))
        first.update(block)
    if first is None:
        raise InputError("the table yielded no rows; PCA needs at least two rows.")
    _check_row_count(first.count, n_components)
    if isinstance(first, _ScatterSum):
        return _exact_model(first, n_components)
    return _randomized_model(blocks, first, n_components, power_iterations)


def _check_options(n_components: int, oversampling: int, power_iterations: int) -> None:
    for name, value, low in (
        ("n_components", n_components, 1),
        ("oversampling", oversampling, 0),
        ("power_iterations", power_iterations, 0),
    ):
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
            raise ConfigError(f"PCA {name} must be an integer >= {low}; got {value!r}.")


def _check_row_count(n: int, n_components: int) -> None:
    if n < 2:
        raise InputError(f"the table has {n} row; PCA sample variances need at least two rows.")
    if n_components > n:
        raise ConfigError(
            f"n_components={n_components} exceeds the {n} rows of the table; ask for at most "
            f"{n} components."
        )


def _checked_blocks(
    blocks: Callable[[], Iterable[np.ndarray]], n_columns: int | None, *, pass_number: int
) -> Iterator[np.ndarray]:
    """Non-empty float64 blocks of one pass, checked for shape and finite values."""
    start = 0
    for index, raw in enumerate(blocks()):
        block = np.asarray(raw, dtype=np.float64)
        if block.ndim != 2:
            raise InputError(
                f"block {index} (pass {pass_number}) has shape {block.shape}; every block "
                "must be a 2-D array (rows, columns)."
            )
        if n_columns is None:
            n_columns = block.shape[1]
        if block.shape[1] != n_columns:
            raise InputError(
                f"block {index} (pass {pass_number}, from row {start}) has {block.shape[1]} "
                f"columns, earlier blocks {n_columns}; every block must have the same columns."
            )
        if block.shape[0] == 0:
            continue
        bad = ~np.isfinite(block)
        if bad.any():
            r, c = np.argwhere(bad)[0]
            raise InputError(
                f"row {start + r}, column {c} holds {block[r, c]}; PCA needs finite values, "
                "so drop or impute such rows first."
            )
        start += block.shape[0]
        yield block


def _centred_blocks(
    blocks: Callable[[], Iterable[np.ndarray]],
    mean: np.ndarray,
    n_rows: int,
    *,
    pass_number: int,
) -> Iterator[np.ndarray]:
    """Blocks of one later pass minus the column means; checks the pass saw all n rows."""
    seen = 0
    for block in _checked_blocks(blocks, mean.shape[0], pass_number=pass_number):
        seen += block.shape[0]
        yield block - mean
    if seen != n_rows:
        raise InputError(
            f"the block factory yielded {seen} rows on pass {pass_number} but {n_rows} on "
            "pass 1; it must yield the same rows on every call."
        )


class _ScatterSum:
    """Count, column means and centred scatter matrix, merged block by block (Chan et al. 1979)."""

    def __init__(self, n_columns: int) -> None:
        self.count = 0
        self.mean = np.zeros(n_columns)
        self.scatter = np.zeros((n_columns, n_columns))

    def update(self, block: np.ndarray) -> None:
        m = block.shape[0]
        b_mean = block.mean(axis=0)
        centred = block - b_mean
        total = self.count + m
        delta = b_mean - self.mean
        # Scatter of the union = both scatters + the between-means term; no large sums cancel.
        self.scatter += centred.T @ centred
        self.scatter += np.outer(delta, delta * (self.count * m / total))
        self.mean = self.mean + delta * (m / total)
        self.count = total


class _FirstSketch:
    """First randomized pass: Y = A^T A Omega together with the column means.

    The means are not known yet, so rows are shifted by the first block's mean s (close to the
    true mean, which keeps the correction below small) and
    A^T A Omega = (X - s)^T (X - s) Omega - n d d^T Omega, with d = mean - s.
    """

    def __init__(self, omega: np.ndarray) -> None:
        self.omega = omega
        self.count = 0
        self.shift: np.ndarray | None = None
        self.shifted_sum = np.zeros(omega.shape[0])
        self.product = np.zeros_like(omega)

    def update(self, block: np.ndarray) -> None:
        if self.shift is None:
            self.shift = block.mean(axis=0)
        shifted = block - self.shift
        self.shifted_sum += shifted.sum(axis=0)
        self.product += shifted.T @ (shifted @ self.omega)
        self.count += block.shape[0]

    def finish(self) -> tuple[np.ndarray, np.ndarray]:
        """Column means and A^T A Omega."""
        d = self.shifted_sum / self.count
        product = self.product - np.outer(d, (self.count * d) @ self.omega)
        return self.shift + d, product


def _exact_model(acc: _ScatterSum, n_components: int) -> PCAModel:
    d = acc.mean.shape[0]
    cov = acc.scatter / (acc.count - 1)
    cov = 0.5 * (cov + cov.T)
    values, vectors = scipy.linalg.eigh(cov, subset_by_index=[d - n_components, d - 1])
    return _model(acc.mean, vectors[:, ::-1], values[::-1], float(np.trace(cov)))


def _randomized_model(
    blocks: Callable[[], Iterable[np.ndarray]],
    first: _FirstSketch,
    n_components: int,
    power_iterations: int,
) -> PCAModel:
    n = first.count
    mean, sketch = first.finish()
    basis = _orthonormal(sketch)
    # Halko et al. 2011, Alg. 4.4: re-orthonormalize after each application of A^T A so that
    # the small directions are not lost to rounding.
    for it in range(power_iterations):
        product = np.zeros_like(basis)
        for centred in _centred_blocks(blocks, mean, n, pass_number=it + 2):
            product += centred.T @ (centred @ basis)
        basis = _orthonormal(product)
    # Halko et al. 2011, Alg. 5.1 (Rayleigh-Ritz): eigenpairs of Q^T A^T A Q = (AQ)^T (AQ).
    gram = np.zeros((basis.shape[1], basis.shape[1]))
    squares = 0.0
    for centred in _centred_blocks(blocks, mean, n, pass_number=power_iterations + 2):
        projected = centred @ basis
        gram += projected.T @ projected
        squares += float(np.einsum("ij,ij->", centred, centred))
    values, small = scipy.linalg.eigh(0.5 * (gram + gram.T))
    top = np.argsort(values)[::-1][:n_components]
    return _model(mean, basis @ small[:, top], values[top] / (n - 1), squares / (n - 1))


def _orthonormal(y: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the columns of y (Householder QR keeps Q orthonormal even if y is
    rank-deficient)."""
    q, _ = np.linalg.qr(y, mode="reduced")
    return q


def _model(mean: np.ndarray, vectors: np.ndarray, variances: np.ndarray, total: float) -> PCAModel:
    """Assemble a model from column eigenvectors (D, c), fixing signs and clipping rounding."""
    components = np.ascontiguousarray(vectors.T)
    lead = np.argmax(np.abs(components), axis=1)
    signs = np.sign(components[np.arange(components.shape[0]), lead])
    components *= np.where(signs == 0, 1.0, signs)[:, None]
    variances = np.maximum(variances, 0.0)  # eigenvalues of a PSD matrix, negative only by rounding
    total = max(total, 0.0)
    ratio = variances / total if total > 0 else np.zeros_like(variances)
    return PCAModel(
        mean=mean,
        components=components,
        explained_variance=variances,
        explained_variance_ratio=ratio,
        total_variance=total,
    )

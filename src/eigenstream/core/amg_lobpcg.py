"""Leading eigenpairs of A = D^-1/2 K D^-1/2 by LOBPCG with an algebraic-multigrid preconditioner.

The smallest eigenpairs of the normalized Laplacian L = I - A are the largest of A. LOBPCG
(Knyazev 2001, scipy's implementation) iterates a block of vectors; a smoothed-aggregation
hierarchy (Vanek, Mandel & Brezina 1996, pyamg) built on L + 1e-5 I preconditions it, which keeps
the iteration count nearly flat as rows grow on manifold-like graphs, where restarted Lanczos
needs ever more products (methods.md §4.2, §9.10). The known top eigenvector sqrt(d) is passed as
a constraint instead of being computed, and also serves as the hierarchy's near-null-space vector.

The iteration runs in rounds of a fixed number of steps; the block at the end of each round is
handed to a callback (checkpoints) and a resumed solve starting from a saved block follows the
same rounds, so it ends exactly where the uninterrupted solve would.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator, lobpcg

from eigenstream.allocator import reusing
from eigenstream.errors import NotConverged

# Shift making the hierarchy of the singular L non-singular (the value scikit-learn uses too).
_SHIFT = 1e-5
# Steps per round; a restart from the block alone costs a few steps (32 vs 28 steps at 100k
# rows with rounds of 10, measured), and a round is the unit of checkpointing.
ROUND_STEPS = 10
# Coarsest level solved densely.
_MAX_COARSE = 500
# Temporaries up to this many float64 vectors reuse heap memory during the multigrid setup.
_SETUP_REUSE_VECTORS = 4


@dataclass(frozen=True)
class BlockState:
    """Where a block solve stands after a round.

    Attributes
    ----------
    block : ndarray, shape (n, b)
        Current approximations of the wanted eigenvectors of A (trivial one excluded).
    rounds : int
        Rounds finished.
    steps : int
        LOBPCG steps taken so far.
    matvecs : int
        Products with A (one per vector) so far.
    passes : int
        Block applications of A (one pass over the graph each) so far.
    """

    block: np.ndarray
    rounds: int = 0
    steps: int = 0
    matvecs: int = 0
    passes: int = 0

    def scalars(self) -> dict[str, int]:
        return {"rounds": self.rounds, "steps": self.steps, "matvecs": self.matvecs,
                "passes": self.passes}


@dataclass(frozen=True)
class BlockResult:
    """Pairs found by :func:`amg_lobpcg`, trivial pair first, eigenvalues descending."""

    values: np.ndarray
    vectors: np.ndarray
    matvecs: int
    passes: int
    steps: int
    residuals: np.ndarray


@dataclass(frozen=True)
class OrderedLaplacian:
    """The normalized Laplacian, shifted and in a bandwidth-reducing order.

    ``matrix`` is S = P (L + shift I) P^T: row i of S is row ``perm[i]`` of L. The one matrix
    serves both the multigrid hierarchy (built on L + shift I) and the products with L
    (S x - shift x), so a solve holds a single copy of the graph.

    Attributes
    ----------
    matrix : csr_matrix, shape (n, n), float64
    perm, inv : ndarrays of int64, shape (n,)
        The order and its inverse.
    shift : float
    """

    matrix: sp.csr_matrix
    perm: np.ndarray
    inv: np.ndarray
    shift: float

    @property
    def n(self) -> int:
        return self.matrix.shape[0]

    def laplacian_times(self, X: np.ndarray) -> np.ndarray:
        """P L P^T X, for X in the ordered basis."""
        return self.matrix @ X - self.shift * X

    def affinity_times(self, X: np.ndarray) -> np.ndarray:
        """A X = X - L X, for X (n,) or (n, b) in the original order."""
        X = np.asarray(X, dtype=np.float64)
        return X - self.laplacian_times(X[self.perm])[self.inv]


def ordered_laplacian(K: sp.spmatrix, scale: np.ndarray, *,
                      shift: float = _SHIFT) -> OrderedLaplacian:
    """S = P ((1 + shift) I - diag(scale) K diag(scale)) P^T straight from the kernel.

    One copy of K is made (reordered, then scaled and shifted in place, row block by row
    block), so once the caller lets K go only S remains.
    """
    S, perm, inv = _in_locality_order(K)
    s = np.asarray(scale, dtype=np.float64)[perm]
    for r0, r1, p0, p1 in _row_blocks(S):
        rows = np.repeat(s[r0:r1], np.diff(S.indptr[r0 : r1 + 1]))
        block = S.data[p0:p1]
        block *= rows
        block *= s[S.indices[p0:p1]]
        np.negative(block, out=block)
    return OrderedLaplacian(_add_to_diagonal(S, 1.0 + shift), perm, inv, shift)


def order_laplacian(L: sp.spmatrix, *, shift: float = _SHIFT) -> OrderedLaplacian:
    """:class:`OrderedLaplacian` of a given normalized Laplacian ``L``."""
    S, perm, inv = _in_locality_order(L)
    return OrderedLaplacian(_add_to_diagonal(S, shift), perm, inv, shift)


def _in_locality_order(M: sp.spmatrix) -> tuple[sp.csr_matrix, np.ndarray, np.ndarray]:
    """P M P^T (float64, one copy) for the :func:`locality_order` P, the order and its inverse."""
    M = sp.csr_matrix(M)
    perm = locality_order(M)
    inv = np.argsort(perm)
    return permuted(M, perm, inv), perm, inv


# Rows per block of the in-place passes over a matrix (bounds their index scratch).
_PASS_ROWS = 1 << 16


def _row_blocks(M: sp.csr_matrix):
    """(first row, end row, first stored entry, end entry) of consecutive row blocks."""
    n = M.shape[0]
    for r0 in range(0, n, _PASS_ROWS):
        r1 = min(n, r0 + _PASS_ROWS)
        yield r0, r1, int(M.indptr[r0]), int(M.indptr[r1])


def _add_to_diagonal(M: sp.csr_matrix, value: float) -> sp.csr_matrix:
    """M + value I: in place when every diagonal entry is stored once, else a new matrix."""
    n = M.shape[0]
    where = np.full(n, -1, dtype=np.int64)
    for r0, r1, p0, p1 in _row_blocks(M):
        rows = np.repeat(np.arange(r0, r1), np.diff(M.indptr[r0 : r1 + 1]))
        hits = np.flatnonzero(M.indices[p0:p1] == rows)
        where[rows[hits]] = hits + p0
    if np.all(where >= 0) and M.has_canonical_format:
        M.data[where] += value
        return M
    return (M + value * sp.identity(n, format="csr")).tocsr()


def locality_order(L: sp.csr_matrix) -> np.ndarray:
    """A row order that keeps each row's non-zeros near the diagonal.

    Reverse Cuthill-McKee (Cuthill & McKee 1969; George 1971), scipy's implementation.
    """
    from scipy.sparse.csgraph import reverse_cuthill_mckee

    return np.asarray(reverse_cuthill_mckee(sp.csr_matrix(L), symmetric_mode=True),
                      dtype=np.int64)


def permuted(L: sp.csr_matrix, perm: np.ndarray, inv: np.ndarray) -> sp.csr_matrix:
    """P L P^T (float64) for the order ``perm`` (``inv`` its inverse).

    Rows are gathered (the one copy), then columns renamed and sorted in place.
    """
    out = sp.csr_matrix(L)[perm]
    if out.dtype != np.float64:
        out = out.astype(np.float64)
    indices = out.indices
    inv = inv.astype(indices.dtype, copy=False)
    for _, _, p0, p1 in _row_blocks(out):
        indices[p0:p1] = inv[indices[p0:p1]]
    out.has_sorted_indices = False
    out.sort_indices()
    return out


def amg_preconditioner(shifted: sp.csr_matrix, trivial: np.ndarray) -> LinearOperator:
    """One smoothed-aggregation V-cycle for ``shifted`` = L + shift I, as a LinearOperator.

    Parameters
    ----------
    shifted : csr_matrix, shape (n, n)
        The normalized Laplacian plus a small multiple of I (L itself is singular).
    trivial : ndarray, shape (n,)
        Its null vector sqrt(d) (the near-null-space candidate of the aggregation).
    """
    import pyamg  # heavy import, only for this solver

    # strength=None: the matrix is its own strength-of-connection graph. pyamg's default test
    # ("symmetric", theta = 0) keeps every stored entry of a graph Laplacian anyway, and makes
    # a filtered copy to say so (1M-row bench graph: setup peak 741 -> 527 MiB of numpy
    # memory, the same 4 levels and the same 108 products to converge; 200k: 145 -> 104 MiB).
    hierarchy = pyamg.smoothed_aggregation_solver(
        shifted, B=np.asarray(trivial, dtype=np.float64).reshape(-1, 1), strength=None,
        max_coarse=_MAX_COARSE,
    )
    return hierarchy.aspreconditioner()


def amg_lobpcg(
    L: sp.csr_matrix | OrderedLaplacian,
    trivial: np.ndarray,
    count: int,
    *,
    tol: float = 1e-8,
    max_matvecs: int = 200_000,
    rng: np.random.Generator | int | None = None,
    state: BlockState | None = None,
    on_round: Callable[[BlockState], None] | None = None,
    apply: Callable[[np.ndarray], np.ndarray] | None = None,
) -> BlockResult:
    """The ``count`` largest eigenpairs of A = I - L, the first being the trivial one.

    Parameters
    ----------
    L : csr_matrix or OrderedLaplacian, shape (n, n)
        Normalized Laplacian I - diag(s) K diag(s) of a connected graph, or the same prepared
        from K by :func:`ordered_laplacian` (no further copy is made).
    trivial : ndarray, shape (n,)
        sqrt(d): the eigenvector of A for eigenvalue 1, returned first.
    count : int
        Pairs wanted including the trivial one, ``2 <= count``, ``count + 1 < n / 5``.
    tol : float
        A pair is converged when ||A v - theta v|| <= tol (||A|| = 1 here, so this is relative).
    max_matvecs : int
        Budget of products with A (one per vector of the block).
    rng : Generator or int, optional
        Source of the random start block (seed 0 when None). Ignored when resuming.
    state : BlockState, optional
        Resume from a state handed to ``on_round`` earlier; the result equals that of the
        uninterrupted solve.
    on_round : callable, optional
        Receives the :class:`BlockState` after every round (e.g. to store it).
    apply : callable, optional
        Applies A to an (n, b) block; default ``block - L @ block``. Lets the caller count or
        place the products.

    Returns
    -------
    BlockResult

    Raises
    ------
    NotConverged
        When the budget runs out, with the best pairs found.
    """
    ordered = L if isinstance(L, OrderedLaplacian) else order_laplacian(L)
    del L  # an ordered copy replaces a given Laplacian
    n = ordered.n
    b = count - 1
    if b < 1 or 5 * (b + 1) >= n:
        raise ValueError(f"count must be in [2, {n // 5 - 1}] for {n} rows; got {count}.")
    u0 = np.asarray(trivial, dtype=np.float64)
    u0 = u0 / np.linalg.norm(u0)
    if state is None:
        gen = np.random.default_rng(0 if rng is None else rng)
        state = BlockState(block=gen.standard_normal((n, b)))
    # Work in the bandwidth-reducing order: rows of sampled data come in random order, and the
    # products' scattered reads of x then miss the cache (4M rows: 5x slower V-cycles).
    # States and results stay in the caller's order.
    perm, inv = ordered.perm, ordered.inv
    if apply is not None:
        caller_apply = apply
        times_L = lambda X: X - caller_apply(X[inv])[perm]  # noqa: E731
    else:
        times_L = ordered.laplacian_times
    counter = {"matvecs": state.matvecs, "passes": state.passes}

    def laplacian(X):
        X = np.asarray(X, dtype=np.float64)
        X2 = X.reshape(n, -1)
        counter["passes"] += 1
        counter["matvecs"] += X2.shape[1]
        return times_L(X2).reshape(X.shape)

    op = LinearOperator((n, n), matvec=laplacian, matmat=laplacian, dtype=np.float64)
    # The setup iterates on vectors (from the heap) next to matrices the size of the graph
    # (mapped, so their memory goes back when the setup frees them).
    with reusing(up_to=_SETUP_REUSE_VECTORS * 8 * n):
        M = amg_preconditioner(ordered.matrix, u0[perm])
    Y = u0[perm].reshape(-1, 1)
    with reusing():  # every step allocates and frees the same blocks
        state, values, residuals = _iterate(op, state, M, Y, tol, perm, inv, counter,
                                            max_matvecs, u0, on_round)
    block = state.block
    order = np.argsort(values)
    vals = np.concatenate([[1.0], 1.0 - values[order]])
    vecs = np.column_stack([u0, block[:, order]])
    return BlockResult(values=vals, vectors=vecs, matvecs=counter["matvecs"],
                       passes=counter["passes"], steps=state.steps,
                       residuals=np.concatenate([[0.0], residuals[order]]))


def _iterate(op, state, M, Y, tol, perm, inv, counter, max_matvecs, u0, on_round):
    """Rounds from ``state`` until every pair converges; the last state, values, residuals."""
    block = state.block[perm]
    while True:
        values, block, residuals, steps = _round(op, block, M, Y, tol)
        state = BlockState(block=block[inv], rounds=state.rounds + 1,
                           steps=state.steps + steps, **counter)
        if np.all(residuals <= tol):
            return state, values, residuals
        if counter["matvecs"] >= max_matvecs:
            raise _not_converged(values, block[inv], u0, residuals, counter["matvecs"], tol)
        if on_round is not None:
            on_round(state)


def _round(op, block, M, Y, tol):
    """Up to ROUND_STEPS steps of LOBPCG from ``block``.

    Returns Ritz values of L, the block, residual norms and the steps taken.
    """
    with warnings.catch_warnings():
        # scipy warns when a round ends before the tolerance; rounds are meant to.
        warnings.simplefilter("ignore", UserWarning)
        values, block, history = lobpcg(op, block, M=M, Y=Y, tol=tol, maxiter=ROUND_STEPS,
                                        largest=False, retResidualNormsHistory=True)
    block = np.asarray(block, dtype=np.float64)
    residuals = np.linalg.norm(op.matmat(block) - block * values[None, :], axis=0)
    return np.asarray(values, dtype=np.float64), block, residuals, len(history)


def _not_converged(values, block, u0, residuals, matvecs, tol) -> NotConverged:
    good = int(np.sum(residuals <= tol))
    order = np.argsort(values)
    return NotConverged(
        f"LOBPCG: {good} of {values.size} eigenpairs reached relative residual {tol:g} within "
        f"{matvecs} matvecs (worst {np.max(residuals):.2e}); raise `[solver] max_matvecs` or "
        "loosen `[solver] tol`.",
        eigenvalues=np.concatenate([[1.0], 1.0 - values[order]]),
        eigenvectors=np.column_stack([u0, block[:, order]]),
    )

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

from eigenstream.errors import NotConverged

# Shift making the hierarchy of the singular L non-singular (the value scikit-learn uses too).
_SHIFT = 1e-5
# Steps per round; a restart from the block alone costs a few steps (32 vs 28 steps at 100k
# rows with rounds of 10, measured), and a round is the unit of checkpointing.
ROUND_STEPS = 10
# Coarsest level solved densely.
_MAX_COARSE = 500


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


def normalized_laplacian(K: sp.spmatrix, scale: np.ndarray) -> sp.csr_matrix:
    """L = I - diag(scale) K diag(scale) as CSR float64."""
    K = sp.csr_matrix(K)
    scale = np.asarray(scale, dtype=np.float64)
    rows = np.repeat(np.arange(K.shape[0]), np.diff(K.indptr))
    # Scaled in place of two sparse products, which would each copy the matrix.
    minus_A = sp.csr_matrix((-(scale[rows] * K.data * scale[K.indices]), K.indices, K.indptr),
                            shape=K.shape)
    del rows
    return (minus_A + sp.identity(K.shape[0], format="csr")).tocsr()


def locality_order(L: sp.csr_matrix) -> np.ndarray:
    """A row order that keeps each row's non-zeros near the diagonal.

    Reverse Cuthill-McKee (Cuthill & McKee 1969; George 1971), scipy's implementation.
    """
    from scipy.sparse.csgraph import reverse_cuthill_mckee

    return np.asarray(reverse_cuthill_mckee(sp.csr_matrix(L), symmetric_mode=True),
                      dtype=np.int64)


def permuted(L: sp.csr_matrix, perm: np.ndarray, inv: np.ndarray) -> sp.csr_matrix:
    """P L P^T for the order ``perm`` (``inv`` its inverse): rows gathered, columns renamed."""
    out = sp.csr_matrix(L)[perm]
    out.indices = inv[out.indices].astype(out.indices.dtype, copy=False)
    out.has_sorted_indices = False
    out.sort_indices()
    return out


def amg_preconditioner(L: sp.csr_matrix, trivial: np.ndarray) -> LinearOperator:
    """One smoothed-aggregation V-cycle for L + 1e-5 I, as a LinearOperator.

    Parameters
    ----------
    L : csr_matrix, shape (n, n)
        The normalized Laplacian.
    trivial : ndarray, shape (n,)
        Its null vector sqrt(d) (the near-null-space candidate of the aggregation).
    """
    import pyamg  # heavy import, only for this solver

    shifted = (L + _SHIFT * sp.identity(L.shape[0], format="csr")).tocsr()
    hierarchy = pyamg.smoothed_aggregation_solver(
        shifted, B=np.asarray(trivial, dtype=np.float64).reshape(-1, 1), max_coarse=_MAX_COARSE
    )
    return hierarchy.aspreconditioner()


def amg_lobpcg(
    L: sp.csr_matrix,
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
    L : csr_matrix, shape (n, n)
        Normalized Laplacian I - A of a connected graph (see :func:`normalized_laplacian`).
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
    n = L.shape[0]
    b = count - 1
    if b < 1 or 5 * (b + 1) >= n:
        raise ValueError(f"count must be in [2, {n // 5 - 1}] for {n} rows; got {count}.")
    u0 = np.asarray(trivial, dtype=np.float64)
    u0 = u0 / np.linalg.norm(u0)
    if state is None:
        gen = np.random.default_rng(0 if rng is None else rng)
        state = BlockState(block=gen.standard_normal((n, b)))
    # Work in a bandwidth-reducing order: rows of sampled data come in random order, and the
    # products' scattered reads of x then miss the cache (4M rows: 5x slower V-cycles).
    # States and results stay in the caller's order.
    perm = locality_order(L)
    inv = np.argsort(perm)
    L = permuted(L, perm, inv)
    if apply is not None:
        caller_apply = apply
        apply_A = lambda X: caller_apply(X[inv])[perm]  # noqa: E731
    else:
        apply_A = lambda X: X - L @ X  # noqa: E731
    counter = {"matvecs": state.matvecs, "passes": state.passes}

    def laplacian(X):
        X = np.asarray(X, dtype=np.float64)
        X2 = X.reshape(n, -1)
        counter["passes"] += 1
        counter["matvecs"] += X2.shape[1]
        return (X2 - apply_A(X2)).reshape(X.shape)

    op = LinearOperator((n, n), matvec=laplacian, matmat=laplacian, dtype=np.float64)
    M = amg_preconditioner(L, u0[perm])
    Y = u0[perm].reshape(-1, 1)
    block = state.block[perm]
    while True:
        values, block, residuals, steps = _round(op, block, M, Y, tol)
        state = BlockState(block=block[inv], rounds=state.rounds + 1,
                           steps=state.steps + steps, **counter)
        if np.all(residuals <= tol):
            break
        if counter["matvecs"] >= max_matvecs:
            raise _not_converged(values, block[inv], u0, residuals, counter["matvecs"], tol)
        if on_round is not None:
            on_round(state)
    block = state.block
    order = np.argsort(values)
    vals = np.concatenate([[1.0], 1.0 - values[order]])
    vecs = np.column_stack([u0, block[:, order]])
    return BlockResult(values=vals, vectors=vecs, matvecs=counter["matvecs"],
                       passes=counter["passes"], steps=state.steps,
                       residuals=np.concatenate([[0.0], residuals[order]]))


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

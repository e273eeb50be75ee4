"""Leading eigenpairs of the symmetric diffusion operator and the maps built from them.

The operator solved is A = D^-1/2 K^(a) D^-1/2 = diag(scale) K diag(scale) (methods.md §3.1);
its largest algebraic eigenvalues are wanted (kNN kernels are not PSD, so never "largest
magnitude"). Eigenvectors u of A map to right eigenvectors psi of P = D^-1 K^(a).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.sparse
from scipy.sparse.linalg import ArpackNoConvergence, LinearOperator, aslinearoperator, eigsh

from eigenstream.allocator import reusing
from eigenstream.errors import EigenstreamWarning, NotConverged

# Pairs requested beyond components + 1: a cut through a near-degenerate cluster converges slowly.
_EXTRA_PAIRS = 2
# The same for LOBPCG, whose block holds every requested pair: one guard vector converged in
# fewer products than two on the bench sheet (100k / 200k / 1M rows: 62 / 59 / 69 against
# 80 / 75 / 110) and holds one n-vector less per block (200k solve +190 -> +167 MiB).
_LOBPCG_EXTRA_PAIRS = 1
# Size of the start-vector perturbation relative to the trivial eigenvector's entries.
_V0_NOISE = 1e-2


def _as_apply(k_matvec) -> tuple[Callable, Callable]:
    """(matvec, matmat) callables for a matrix-like object or a plain vector function."""
    if callable(k_matvec) and not hasattr(k_matvec, "shape"):

        def matmat(X):
            return np.column_stack([k_matvec(X[:, j]) for j in range(X.shape[1])])

        return k_matvec, matmat
    return (lambda x: k_matvec @ x), (lambda X: k_matvec @ X)


def symmetric_operator(
    k_matvec: Callable[[np.ndarray], np.ndarray] | object, scale: np.ndarray
) -> LinearOperator:
    """The symmetric operator A x = scale * K (scale * x).

    Parameters
    ----------
    k_matvec : callable or matrix
        Applies the symmetric kernel K to a float64 vector; a sparse matrix or ndarray also
        works (then blocks of vectors are applied in one product).
    scale : ndarray, shape (n,)
        ``NormalizedGraph.scale`` = q^-a / sqrt(d).

    Returns
    -------
    scipy.sparse.linalg.LinearOperator, shape (n, n), float64, symmetric
    """
    scale = np.asarray(scale, dtype=np.float64)
    n = scale.shape[0]
    vec, mat = _as_apply(k_matvec)

    def matvec(x):
        x = np.asarray(x, dtype=np.float64).reshape(-1)
        return scale * np.asarray(vec(scale * x), dtype=np.float64).reshape(-1)

    def matmat(X):
        X = np.asarray(X, dtype=np.float64)
        return scale[:, None] * np.asarray(mat(scale[:, None] * X), dtype=np.float64)

    return LinearOperator(
        (n, n), matvec=matvec, rmatvec=matvec, matmat=matmat, rmatmat=matmat, dtype=np.float64
    )


class _CountingOperator(LinearOperator):
    """Wraps an operator and counts applications (one per vector)."""

    def __init__(self, A: LinearOperator):
        super().__init__(dtype=np.float64, shape=A.shape)
        self.inner = A
        self.count = 0

    def _matvec(self, x):
        self.count += 1
        return self.inner.matvec(x)

    def _matmat(self, X):
        self.count += X.shape[1]
        return self.inner.matmat(X)

    def _adjoint(self):
        return self


@dataclass(frozen=True)
class SpectralResult:
    """Leading eigenpairs of a symmetric operator.

    Attributes
    ----------
    values : ndarray, shape (count,)
        Eigenvalues, descending.
    vectors : ndarray, shape (n, count)
        Orthonormal eigenvectors, column j for ``values[j]``.
    matvecs : int
        Operator applications spent.
    """

    values: np.ndarray
    vectors: np.ndarray
    matvecs: int


def leading_eigenpairs(
    A,
    count: int,
    *,
    v0: np.ndarray | None = None,
    tol: float = 1e-8,
    max_matvecs: int = 200_000,
    ncv: int | None = None,
    rng: np.random.Generator | int | None = None,
    check_multiplicity: bool = True,
) -> SpectralResult:
    """The ``count`` largest algebraic eigenpairs of a symmetric operator (restarted Lanczos).

    Parameters
    ----------
    A : LinearOperator or matrix, shape (n, n)
        Symmetric.
    count : int
        Number of pairs, ``1 <= count <= n``.
    v0 : ndarray, shape (n,), optional
        Start vector; default a uniform random vector from ``rng``.
    tol : float
        Relative accuracy of the Ritz values (ARPACK: ||A v - theta v|| <= tol |theta|).
    max_matvecs : int
        Budget of operator applications (approximate: enforced per restart).
    ncv : int, optional
        Lanczos basis size; default max(2 count + 1, 20), at most n.
    rng : Generator or int, optional
        Source of random start vectors (seed 0 when None, for reproducibility).
    check_multiplicity : bool
        A Krylov space holds one direction per eigenspace, so exactly repeated eigenvalues
        (symmetric graphs such as cycles or grids) can be returned once only. When True, the
        operator deflated by the pairs found is searched again and missed copies are merged
        (Rayleigh-Ritz); this roughly doubles the matvecs.

    Returns
    -------
    SpectralResult

    Raises
    ------
    NotConverged
        With the pairs that did converge, when the budget runs out.
    """
    A = aslinearoperator(A)
    n = A.shape[0]
    if not 1 <= count <= n:
        raise ValueError(f"count must be in [1, {n}]; got {count}.")
    counted = _CountingOperator(A)
    if count >= n - 1:  # ARPACK needs count < n - 1; such tiny problems are dense anyway
        return _dense_pairs(counted, count)
    gen = np.random.default_rng(0 if rng is None else rng)
    if v0 is None:
        v0 = gen.uniform(-1.0, 1.0, n)
    values, vectors = _arpack_top(counted, count, v0, tol, max_matvecs, ncv)
    for _ in range(count if check_multiplicity else 0):
        extra = _missed_pairs(counted, vectors, values, count, gen, tol, max_matvecs, ncv)
        if extra is None:
            break
        merged = _rayleigh_ritz(counted, np.column_stack([vectors, extra]), count)
        improved = merged[0][-1] > values[-1]
        values, vectors = merged
        if not improved:  # only a tie at the cut was found; keep going would repeat it
            break
    return SpectralResult(values=values, vectors=vectors, matvecs=counted.count)


def _arpack_top(counted, count, v0, tol, max_matvecs, ncv):
    """eigsh 'LA' within the remaining budget; pairs sorted descending."""
    n = counted.shape[0]
    ncv = min(n, max(2 * count + 1, 20) if ncv is None else max(ncv, count + 2))
    budget = max_matvecs - counted.count
    maxiter = max(1, (budget - ncv) // max(1, ncv - count))
    try:
        values, vectors = eigsh(
            counted, k=count, which="LA", v0=v0, tol=tol, ncv=ncv, maxiter=maxiter
        )
    except ArpackNoConvergence as exc:
        raise _not_converged(exc, count, counted.count, tol) from exc
    order = np.argsort(values)[::-1]
    return values[order], vectors[:, order]


def _missed_pairs(counted, vectors, values, count, gen, tol, max_matvecs, ncv):
    """Eigenvectors of A orthogonal to ``vectors`` whose eigenvalues reach the kept ones, or None."""
    n = counted.shape[0]
    basis = vectors

    def project(x):
        return x - basis @ (basis.T @ x)

    deflated = LinearOperator(
        counted.shape,
        matvec=lambda x: project(counted.matvec(project(np.ravel(x)))),
        dtype=np.float64,
    )
    k = min(count, n - basis.shape[1] - 2)
    if k < 1:
        return None
    start = project(gen.uniform(-1.0, 1.0, n))
    try:
        top, vecs = _arpack_top(
            _CountingOperator(deflated), k, start, tol, max_matvecs - counted.count, ncv
        )
    except NotConverged as exc:  # the main pairs stand; use whatever the check did converge
        if exc.eigenvalues is None or exc.eigenvalues.size == 0:
            return None
        top, vecs = exc.eigenvalues, exc.eigenvectors
    # Ritz values of the deflated operator are lower bounds; a missed copy of a kept value shows
    # up within the solver tolerance of it.
    reach = values[-1] - 10 * tol * max(1.0, abs(values[-1]))
    found = top >= reach
    return vecs[:, found] if found.any() else None


def _rayleigh_ritz(counted, basis, count):
    """Best ``count`` pairs of A in span(basis)."""
    Q, _ = np.linalg.qr(basis)
    H = Q.T @ counted.matmat(Q)
    values, W = scipy.linalg.eigh(0.5 * (H + H.T))
    order = np.argsort(values)[::-1][:count]
    return values[order], Q @ W[:, order]


def _dense_pairs(counted: _CountingOperator, count: int) -> SpectralResult:
    dense = counted.matmat(np.eye(counted.shape[0]))
    values, vectors = scipy.linalg.eigh(0.5 * (dense + dense.T))
    order = np.argsort(values)[::-1][:count]
    return SpectralResult(values=values[order], vectors=vectors[:, order], matvecs=counted.count)


def _not_converged(exc: ArpackNoConvergence, count: int, matvecs: int, tol: float) -> NotConverged:
    values = np.asarray(exc.eigenvalues)
    order = np.argsort(values)[::-1]
    vectors = np.asarray(exc.eigenvectors)[:, order] if values.size else None
    return NotConverged(
        f"Eigensolver stopped after {matvecs} matvecs with {values.size} of {count} eigenpairs "
        f"at tol={tol:g}: raise `[solver] max_matvecs`, loosen `[solver] tol`, or use more "
        "`[graph] neighbors` (wider eigengaps).",
        eigenvalues=values[order],
        eigenvectors=vectors,
    )


def drop_trivial(
    values: np.ndarray, vectors: np.ndarray, sqrt_degrees: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Remove the trivial pair (eigenvalue 1, vector parallel to sqrt(d)).

    Parameters
    ----------
    values : ndarray, shape (c,)
    vectors : ndarray, shape (n, c)
        Unit eigenvectors of A.
    sqrt_degrees : ndarray, shape (n,)

    Returns
    -------
    values, vectors : ndarrays, shapes (c-1,), (n, c-1)

    Warns
    -----
    EigenstreamWarning
        When no pair is trivial (typically a disconnected graph, where the eigenvalue 1 is
        repeated and its vectors mix component indicators); the largest eigenvalue is dropped.
    """
    w = np.asarray(sqrt_degrees, dtype=np.float64)
    w = w / np.linalg.norm(w)
    cos = np.abs(w @ vectors)
    # If |cos| > 1 - 1e-6, the Rayleigh quotient is within ~4e-6 of 1 (sin^2 * spread <= 2 sin^2).
    trivial = (cos > 1 - 1e-6) & (np.abs(1 - values) < 1e-5)
    if trivial.any():
        drop = int(np.argmax(np.where(trivial, cos, -1.0)))
    else:
        drop = int(np.argmax(values))
        warnings.warn(
            f"No eigenvector is parallel to sqrt(degrees) (best |cos| = {cos.max():.6f}); the "
            f"graph is probably disconnected. Dropped the largest eigenvalue {values[drop]:.8f}; "
            "use more neighbours or embed components separately.",
            EigenstreamWarning,
            stacklevel=2,
        )
    keep = np.arange(values.size) != drop
    return values[keep], vectors[:, keep]


def time_power(values: np.ndarray, diffusion_time: float) -> np.ndarray:
    """Per-eigenvalue factor of the diffusion coordinates at time t.

    Integer t: the exact power lambda^t (the eigenvalue of P^t; negative lambda keep their
    sign for odd t). Non-integer t: |lambda|^t, since lambda^t is undefined for lambda < 0
    (methods.md §3.3). t = 0 gives 1 (coordinates = psi).

    Parameters
    ----------
    values : ndarray, shape (c,)
    diffusion_time : float >= 0

    Returns
    -------
    ndarray, shape (c,)
    """
    values = np.asarray(values, dtype=np.float64)
    t = float(diffusion_time)
    if t < 0:
        raise ValueError(f"diffusion_time must be >= 0; got {t}.")
    if t.is_integer():
        return values ** int(t)
    return np.abs(values) ** t


def markov_coordinates(
    u: np.ndarray, values: np.ndarray, degrees: np.ndarray, *, diffusion_time: float
) -> tuple[np.ndarray, np.ndarray]:
    """Right eigenvectors of P and diffusion coordinates from eigenvectors of A.

    psi = sqrt(vol) D^-1/2 u, so that P psi = lambda psi and Psi^T diag(pi) Psi = I with
    pi = d / vol (Coifman & Lafon 2006). Coordinates = psi * f(lambda), f = :func:`time_power`.

    Parameters
    ----------
    u : ndarray, shape (n, c)
        Unit eigenvectors of A.
    values : ndarray, shape (c,)
    degrees : ndarray, shape (n,)
    diffusion_time : float >= 0

    Returns
    -------
    psi, coords : ndarrays, shape (n, c)
    """
    degrees = np.asarray(degrees, dtype=np.float64)
    psi = np.sqrt(degrees.sum()) * np.asarray(u, dtype=np.float64) / np.sqrt(degrees)[:, None]
    return psi, psi * time_power(values, diffusion_time)[None, :]


def fix_signs(vectors: np.ndarray) -> np.ndarray:
    """Deterministic signs: in each column the largest-|value| entry is made positive.

    When several entries tie within 1e-12 (relative) for the largest |value|, the one with
    the smallest row index decides. Apply it to u before :func:`markov_coordinates`: psi is
    a positive row scaling of u, so every psi entry then carries the sign of its u entry.

    Parameters
    ----------
    vectors : ndarray, shape (n, c) or (n,)

    Returns
    -------
    ndarray, same shape, columns multiplied by +-1
    """
    v = np.array(vectors, dtype=np.float64)
    flat = v.ndim == 1
    v2 = v[:, None] if flat else v
    mag = np.abs(v2)
    lead = mag >= mag.max(axis=0) * (1 - 1e-12)
    decider = v2[lead.argmax(axis=0), np.arange(v2.shape[1])]
    signs = np.where(decider < 0, -1.0, 1.0)
    out = v2 * signs[None, :]
    return out[:, 0] if flat else out


def relative_residuals(A, values: np.ndarray, vectors: np.ndarray) -> np.ndarray:
    """||A v - lambda v|| / |lambda| for each pair.

    Parameters
    ----------
    A : LinearOperator or matrix, shape (n, n)
    values : ndarray, shape (c,)
    vectors : ndarray, shape (n, c)

    Returns
    -------
    ndarray, shape (c,)   (inf where lambda = 0)
    """
    A = aslinearoperator(A)
    vectors = np.asarray(vectors, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    r = np.linalg.norm(A.matmat(vectors) - vectors * values[None, :], axis=0)
    with np.errstate(divide="ignore"):
        return r / np.abs(values)


@dataclass(frozen=True)
class Embedding:
    """A solved diffusion map.

    Attributes
    ----------
    eigenvalues : ndarray, shape (components,)
        Nontrivial eigenvalues of P, descending.
    residuals : ndarray, shape (components,)
        Relative residuals ||A u - lambda u|| / |lambda|.
    u : ndarray, shape (n, components)
        Unit eigenvectors of A (signs fixed by :func:`fix_signs`).
    psi : ndarray, shape (n, components)
        Right eigenvectors of P, pi-orthonormal.
    coordinates : ndarray, shape (n, components)
        Diffusion coordinates lambda^t psi (see :func:`time_power`).
    matvecs : int
        Applications of A, including the residual check.
    """

    eigenvalues: np.ndarray
    residuals: np.ndarray
    u: np.ndarray
    psi: np.ndarray
    coordinates: np.ndarray
    matvecs: int
    passes: int = 0
    steps: int = 0


# From this many rows up, "auto" picks LOBPCG + AMG when the kernel is in memory: below it
# restarted Lanczos needs few enough products (a few hundred to ~2,500 at 32k rows, methods.md
# §9.10) and keeps its exact-multiplicity check.
LOBPCG_FROM_ROWS = 50_000


def choose_solver(method: str, n: int, *, matrix_in_memory: bool) -> str:
    """The solver "auto" stands for ("lobpcg" or "lanczos"); other names pass through."""
    if method != "auto":
        return method
    return "lobpcg" if matrix_in_memory and n >= LOBPCG_FROM_ROWS else "lanczos"


def solve_embedding(
    K_or_matvec,
    scale: np.ndarray,
    degrees: np.ndarray,
    *,
    components: int,
    diffusion_time: float,
    tol: float = 1e-8,
    max_matvecs: int = 200_000,
    seed: int = 0,
    check_multiplicity: bool = True,
    solver: str = "lanczos",
    state=None,
    on_restart=None,
) -> Embedding:
    """Diffusion map from a kernel and its alpha-normalization (methods.md §3.1–3.3).

    Parameters
    ----------
    K_or_matvec : sparse matrix, ndarray or callable
        The symmetric kernel K (not normalized), or a function applying it. The LOBPCG
        path keeps no reference to K after it has built the Laplacian, so a matrix passed
        inline (not kept by the caller) is freed before the iteration.
    scale, degrees : ndarrays, shape (n,)
        ``NormalizedGraph.scale`` and ``NormalizedGraph.degrees``.
    components : int
        Nontrivial coordinates wanted.
    diffusion_time : float >= 0
    tol, max_matvecs : see :func:`leading_eigenpairs`.
    seed : int
        Seeds the start-vector perturbation.
    check_multiplicity : bool
        Search again for exactly repeated eigenvalues (see :func:`leading_eigenpairs`); about
        doubles the matvecs. Exact repeats need an exact symmetry (grids, cycles); sampled
        data only has near-repeats, which the first search resolves.
    solver : {"lanczos", "arpack", "lobpcg", "auto"}, default="lanczos"
        Our thick-restart Lanczos (:mod:`eigenstream.core.lanczos`, restartable from a saved
        state), scipy's ARPACK ``eigsh``, or LOBPCG with an algebraic-multigrid preconditioner
        (:mod:`eigenstream.core.amg_lobpcg`; needs K as a sparse matrix). "auto": see
        :func:`choose_solver`.
    state, on_restart : optional
        Lanczos: resume from a :class:`~eigenstream.core.lanczos.LanczosState`, and a callback
        receiving the state after every restart (for checkpoints). LOBPCG: the same with a
        :class:`~eigenstream.core.amg_lobpcg.BlockState` after every round.

    Returns
    -------
    Embedding
    """
    degrees = np.asarray(degrees, dtype=np.float64)
    n = degrees.shape[0]
    if not 1 <= components <= n - 1:
        raise ValueError(f"components must be in [1, {n - 1}] for {n} rows; got {components}.")
    op = symmetric_operator(K_or_matvec, scale)
    sqrt_d = np.sqrt(degrees)
    # Start near the known top vector sqrt(d) (methods.md §4.1), perturbed so that every
    # other eigenvector has a component; seeded for reproducibility.
    noise = np.random.default_rng(seed).standard_normal(n)
    v0 = sqrt_d / np.linalg.norm(sqrt_d) + _V0_NOISE * noise / np.sqrt(n)
    count = min(n, components + 1 + _EXTRA_PAIRS)
    solver = choose_solver(solver, n, matrix_in_memory=scipy.sparse.issparse(K_or_matvec))
    passes = steps = 0
    if solver == "lobpcg":
        from eigenstream.core.amg_lobpcg import amg_lobpcg, ordered_laplacian

        if not scipy.sparse.issparse(K_or_matvec):
            raise ValueError("solver 'lobpcg' needs the kernel as a sparse matrix.")
        count = min(n, components + 1 + _LOBPCG_EXTRA_PAIRS)
        laplacian = ordered_laplacian(K_or_matvec, scale)
        # From here on only the Laplacian is used: a K handed over inline is freed now.
        del K_or_matvec
        op = LinearOperator((n, n), matvec=laplacian.affinity_times,
                            matmat=laplacian.affinity_times, dtype=np.float64)
        block = amg_lobpcg(
            laplacian, sqrt_d, count, tol=tol,
            max_matvecs=max_matvecs, rng=seed, state=state, on_round=on_restart,
        )
        result = SpectralResult(values=block.values, vectors=block.vectors,
                                matvecs=block.matvecs)
        passes, steps = block.passes, block.steps
    elif solver == "lanczos":
        from eigenstream.core.lanczos import thick_restart_lanczos

        with reusing():
            result = thick_restart_lanczos(
                op.matvec, n, count, v0=v0, tol=tol, max_matvecs=max_matvecs, state=state,
                on_restart=on_restart, rng=seed, check_multiplicity=check_multiplicity,
            )
    elif solver == "arpack":
        result = leading_eigenpairs(
            op, count, v0=v0, tol=tol, max_matvecs=max_matvecs, rng=seed,
            check_multiplicity=check_multiplicity,
        )
    else:
        raise ValueError(f"solver must be 'lanczos', 'arpack' or 'lobpcg'; got {solver!r}.")
    values, u = drop_trivial(result.values, result.vectors, sqrt_d)
    values, u = values[:components], fix_signs(u[:, :components])
    residuals = relative_residuals(op, values, u)
    psi, coords = markov_coordinates(u, values, degrees, diffusion_time=diffusion_time)
    return Embedding(
        eigenvalues=values,
        residuals=residuals,
        u=u,
        psi=psi,
        coordinates=coords,
        matvecs=result.matvecs + components,
        passes=passes,
        steps=steps,
    )

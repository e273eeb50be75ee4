"""Thick-restart Lanczos for the largest algebraic eigenpairs of a symmetric operator.

Method: thick-restart Lanczos (Wu & Simon, SIAM J. Matrix Anal. Appl. 22(2), 2000), with
full reorthogonalisation (two passes of classical Gram-Schmidt) and exact Rayleigh-Ritz at
each restart. Between cycles the whole solver is the Krylov-Schur relation

    A Y = Y diag(theta) + q s^T,    Y^T Y = I,  Y^T q = 0,  ||q|| = 1,

so the state after a restart is the kept Ritz vectors Y, their values theta, the couplings s,
the next Lanczos vector q and a few counters (:class:`LanczosState`). Resuming from a stored
state repeats exactly the arithmetic of an uninterrupted run, so results are bit-identical.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from eigenstream.core.spectral import SpectralResult
from eigenstream.errors import CheckpointError, NotConverged

# Problems this close to the basis size are solved densely: n matvecs on the identity cost
# about one Lanczos cycle, and eigh is exact.
_DENSE_MARGIN = 16
# A new Lanczos vector whose norm after reorthogonalisation is below this fraction of ||A v||
# is rounding noise: the Krylov space is invariant and a fresh random direction is used.
_BREAKDOWN = 1e-12
# Seeds drawn for random directions stay below 2**53 so that any JSON reader keeps them exact.
_SEED_LIMIT = 2**53

_ARRAY_KEYS = ("ritz_vectors", "ritz_values", "coupling", "residual")
_SCALAR_KEYS = (
    "beta",
    "restarts",
    "matvecs",
    "converged",
    "norm_estimate",
    "seed",
    "check_round",
    "cut",
    "dropped",
)
# Tags that keep the two kinds of seeded random direction apart.
_TAG_BREAKDOWN, _TAG_CHECK = 0, 1


@dataclass
class LanczosState:
    """Complete state of :func:`thick_restart_lanczos` after a restart.

    Attributes
    ----------
    ritz_vectors : ndarray, shape (n, p)
        Kept Ritz vectors Y (orthonormal); p = 0 before the first restart.
    ritz_values : ndarray, shape (p,)
        Their Ritz values theta, descending.
    coupling : ndarray, shape (p,)
        s = beta * (last row of the projected eigenvectors); |s_i| estimates the residual
        norm ||A y_i - theta_i y_i|| of pair i.
    residual : ndarray, shape (n,)
        The next Lanczos vector q (unit norm, orthogonal to Y).
    beta : float
        Norm of the residual that produced q at the last restart (0 before the first and
        after a fresh direction was drawn).
    restarts : int
        Restarts done so far.
    matvecs : int
        Operator applications spent so far.
    converged : int
        Leading pairs whose residual met the tolerance at the last restart.
    norm_estimate : float
        Largest |Ritz value| seen so far: a lower bound of ||A||_2 that scales ``tol``.
    seed : int
        Seeds the random directions (invariant subspace found; multiplicity check).
    check_round : int
        0 during the main search; r >= 1 during the r-th search for missed copies of
        repeated eigenvalues (see :func:`thick_restart_lanczos`).
    cut : float
        The count-th eigenvalue when the current check round began (0 in the main search).
    dropped : float
        Sum of the norms of the couplings set to zero when pairs were locked: a bound on the
        perturbation this introduced, added to the reported residuals.
    """

    ritz_vectors: np.ndarray
    ritz_values: np.ndarray
    coupling: np.ndarray
    residual: np.ndarray
    beta: float
    restarts: int
    matvecs: int
    converged: int
    norm_estimate: float = 0.0
    seed: int = 0
    check_round: int = 0
    cut: float = 0.0
    dropped: float = 0.0

    def arrays(self) -> dict[str, np.ndarray]:
        """Every array of the state (float64), keyed by field name, for storage."""
        return {key: getattr(self, key) for key in _ARRAY_KEYS}

    def scalars(self) -> dict[str, int | float]:
        """Every scalar of the state as a JSON-safe Python ``int`` or ``float``."""
        out: dict[str, int | float] = {}
        for key in _SCALAR_KEYS:
            value = getattr(self, key)
            out[key] = float(value) if key in _FLOAT_KEYS else int(value)
        return out

    @classmethod
    def from_parts(
        cls, arrays: Mapping[str, np.ndarray], scalars: Mapping[str, int | float]
    ) -> LanczosState:
        """Rebuild a state from the outputs of :meth:`arrays` and :meth:`scalars`.

        Parameters
        ----------
        arrays : mapping of str to array-like
        scalars : mapping of str to int or float

        Returns
        -------
        LanczosState

        Raises
        ------
        CheckpointError
            When a key is missing or the arrays do not fit together.
        """
        missing = [k for k in _ARRAY_KEYS if k not in arrays]
        missing += [k for k in _SCALAR_KEYS if k not in scalars]
        if missing:
            raise CheckpointError(
                f"Lanczos state lacks {', '.join(missing)}; delete the solver checkpoint to "
                "restart the eigensolver from scratch."
            )
        parts = {k: np.array(arrays[k], dtype=np.float64, order="C") for k in _ARRAY_KEYS}
        numbers = {
            k: float(scalars[k]) if k in _FLOAT_KEYS else int(scalars[k]) for k in _SCALAR_KEYS
        }
        state = cls(**parts, **numbers)
        _check_state(state, None)
        return state


_FLOAT_KEYS = frozenset({"beta", "norm_estimate", "cut", "dropped"})


@dataclass(frozen=True)
class LanczosResult(SpectralResult):
    """Leading eigenpairs from :func:`thick_restart_lanczos`.

    Attributes
    ----------
    values : ndarray, shape (count,)
        Eigenvalues, descending.
    vectors : ndarray, shape (n, count)
        Orthonormal eigenvectors, column j for ``values[j]``.
    matvecs : int
        Operator applications, including those recorded in a resumed state.
    restarts : int
        Restarts, including those recorded in a resumed state (0 for the dense path).
    residuals : ndarray, shape (count,)
        Bounds on ||A v - theta v|| from the Lanczos relation (no extra matvecs).
    """

    restarts: int
    residuals: np.ndarray


def default_basis_size(n: int, count: int) -> int:
    """Lanczos basis size used when none is given: max(2 count + 10, 30), at most n."""
    return min(n, max(2 * count + 10, 30))


def thick_restart_lanczos(
    matvec: Callable[[np.ndarray], np.ndarray],
    n: int,
    count: int,
    *,
    v0: np.ndarray | None = None,
    basis_size: int | None = None,
    tol: float = 1e-8,
    max_matvecs: int = 100_000,
    state: LanczosState | None = None,
    on_restart: Callable[[LanczosState], None] | None = None,
    rng: np.random.Generator | int | None = None,
    check_multiplicity: bool = True,
) -> LanczosResult:
    """The ``count`` largest algebraic eigenpairs of a symmetric operator (thick-restart Lanczos).

    Parameters
    ----------
    matvec : callable
        Applies the symmetric operator A to a float64 vector of length n.
    n : int
        Dimension of A.
    count : int
        Number of pairs wanted, ``1 <= count <= n``.
    v0 : ndarray, shape (n,), optional
        Start vector; default a uniform random vector from ``rng``. Ignored when resuming.
    basis_size : int, optional
        Lanczos basis size m; default :func:`default_basis_size`. Needs ``count + 2 <= m``.
        Each cycle costs m minus the kept vectors matvecs.
    tol : float
        A pair is converged when ||A v - theta v|| <= tol * ||A||, with ||A|| estimated by the
        largest |Ritz value| seen (exact when the largest eigenvalue is also the largest in
        magnitude, as for D^-1/2 K D^-1/2, where ||A|| = 1).
    max_matvecs : int
        Budget of operator applications for the whole solve, including those already recorded
        in ``state``; never exceeded.
    state : LanczosState, optional
        Resume from a state passed to ``on_restart`` earlier. With the same matvec, count,
        basis_size, tol and check_multiplicity the result is bit-identical to that of the
        uninterrupted run.
    on_restart : callable, optional
        Called with the new :class:`LanczosState` after every restart, e.g. to store it. The
        solver keeps using the state's arrays, so the callback must not modify them.
    rng : Generator or int, optional
        Source of the default start vector and of the seed for random directions (seed 0
        when None, for reproducibility). Ignored when resuming.
    check_multiplicity : bool
        A single-vector Krylov space holds one direction per eigenspace, so copies of an
        exactly repeated eigenvalue (cycles, grids: exact symmetries) are missed. When True,
        the converged pairs are locked and the search restarts from a random vector
        orthogonal to them until it finds no eigenvalue above the count-th; this adds about
        one single-eigenvalue solve per round (one round when nothing was missed).

    Returns
    -------
    LanczosResult

    Raises
    ------
    NotConverged
        When the budget runs out; carries the best ``count`` Ritz pairs found and, as
        attribute ``state``, the last full restart state (resume from it with a larger
        budget to continue exactly as an uninterrupted run would).

    Notes
    -----
    For n <= basis_size + 16 the operator is applied to the identity and solved densely
    (n matvecs, no restarts, no state).
    """
    n = int(n)
    count = int(count)
    if not 1 <= count <= n:
        raise ValueError(f"count must be in [1, {n}]; got {count}.")
    if max_matvecs < 1:
        raise ValueError(f"max_matvecs must be >= 1; got {max_matvecs}.")
    if not tol > 0:
        raise ValueError(f"tol must be > 0; got {tol}.")
    m = default_basis_size(n, count) if basis_size is None else int(basis_size)
    if state is None and n <= m + _DENSE_MARGIN:
        return _dense_pairs(matvec, n, count)
    m = min(m, n)
    if m < count + 2:
        raise ValueError(f"basis_size must be >= count + 2 = {count + 2}; got {m}.")
    if state is None:
        state = _initial_state(n, v0, rng)
    else:
        _check_state(state, n)
        if state.ritz_values.size >= m:
            raise ValueError(
                f"the state keeps {state.ritz_values.size} Ritz vectors; basis_size must be "
                f"larger; got {m}."
            )
    apply = _checked_matvec(matvec, n)
    keep = _kept_vectors(count, m)
    while True:
        # A check round must also converge the best new pair, which decides whether
        # anything was missed.
        target = count + (state.check_round > 0)
        if _leading_converged(state, target, tol) >= target:
            if not check_multiplicity or not _worth_another_round(state, count, tol):
                return _result_from_state(state, count)
            state = _lock_and_probe(state, count)
            continue
        budget = max_matvecs - state.matvecs
        if budget <= 0:
            raise _not_converged(state, count, tol, state)
        basis, T, beta, used = _lanczos_cycle(apply, state, m, budget)
        new = _restart(basis, T, beta, keep, state, used, target, tol)
        if used < m - state.ritz_values.size:  # the budget ran out inside the cycle
            finished = new.converged >= target and not (
                check_multiplicity and _worth_another_round(new, count, tol)
            )
            if finished:
                return _result_from_state(new, count)
            raise _not_converged(new, count, tol, state)
        state = new
        if on_restart is not None:
            on_restart(state)


def _worth_another_round(state: LanczosState, count: int, tol: float) -> bool:
    """True after the main search, and after a check round that raised the count-th value."""
    if state.check_round == 0:
        return True
    # Each fruitful round adds at least one missed copy, so count rounds always suffice.
    if state.check_round >= count:
        return False
    slack = 10 * tol * state.norm_estimate + state.dropped
    return bool(state.ritz_values[count - 1] > state.cut + slack)


def _lock_and_probe(state: LanczosState, count: int) -> LanczosState:
    """Keep the leading count pairs as exact (coupling 0) and continue from a random vector.

    Zeroing the couplings perturbs A by at most their norm (tracked in ``dropped``). The
    random vector has a component along every direction orthogonal to the locked vectors,
    missed copies of repeated eigenvalues included, so its Krylov space can find them.
    """
    # A fixed memory layout keeps the BLAS rounding of a resumed run identical.
    rows = np.ascontiguousarray(state.ritz_vectors[:, :count].T)
    probe = _fresh_direction(rows, state.seed, (_TAG_CHECK, state.restarts, state.check_round))
    return LanczosState(
        ritz_vectors=np.ascontiguousarray(rows.T),
        ritz_values=state.ritz_values[:count].copy(),
        coupling=np.zeros(count),
        residual=probe,
        beta=0.0,
        restarts=state.restarts,
        matvecs=state.matvecs,
        converged=count,
        norm_estimate=state.norm_estimate,
        seed=state.seed,
        check_round=state.check_round + 1,
        cut=float(state.ritz_values[count - 1]),
        dropped=state.dropped + float(np.linalg.norm(state.coupling[:count])),
    )


def _initial_state(n: int, v0: np.ndarray | None, rng) -> LanczosState:
    gen = np.random.default_rng(0 if rng is None else rng)
    start = gen.uniform(-1.0, 1.0, n) if v0 is None else np.array(v0, dtype=np.float64)
    start = start.reshape(-1)
    if start.shape[0] != n:
        raise ValueError(f"v0 must have length {n}; got {start.shape[0]}.")
    norm = np.linalg.norm(start)
    if not np.isfinite(norm) or norm == 0.0:
        raise ValueError("v0 must be finite and nonzero.")
    return LanczosState(
        ritz_vectors=np.empty((n, 0)),
        ritz_values=np.empty(0),
        coupling=np.empty(0),
        residual=start / norm,
        beta=0.0,
        restarts=0,
        matvecs=0,
        converged=0,
        seed=int(gen.integers(0, _SEED_LIMIT)),
    )


def _check_state(state: LanczosState, n: int | None) -> None:
    """Raise CheckpointError unless the state's arrays fit together (and length n if given)."""
    r, v, s, y = state.residual, state.ritz_values, state.coupling, state.ritz_vectors
    ok = (
        r.ndim == 1
        and (n is None or r.shape[0] == n)
        and v.ndim == 1
        and y.shape == (r.shape[0], v.shape[0])
        and s.shape == v.shape
        and all(np.isfinite(a).all() for a in (r, v, s, y))
        and state.check_round >= 0
    )
    if not ok:
        raise CheckpointError(
            f"Lanczos state does not fit together{'' if n is None else f' with n={n}'}: "
            f"ritz_vectors {y.shape}, ritz_values {v.shape}, coupling {s.shape}, residual "
            f"{r.shape}; delete the solver checkpoint to restart the eigensolver from scratch."
        )


def _checked_matvec(matvec: Callable, n: int) -> Callable[[np.ndarray], np.ndarray]:
    def apply(x: np.ndarray) -> np.ndarray:
        y = np.asarray(matvec(x), dtype=np.float64).reshape(-1)
        if y.shape[0] != n:
            raise ValueError(f"matvec returned length {y.shape[0]}; expected {n}.")
        return y

    return apply


def _kept_vectors(count: int, m: int) -> int:
    """Ritz vectors kept at a restart: the wanted ones plus half the spare room."""
    return min(m - 1, count + max(1, (m - count) // 2))


def _lanczos_cycle(
    apply: Callable, state: LanczosState, m: int, budget: int
) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Extend the state's Krylov-Schur relation to m vectors, or until the budget is spent.

    Returns the basis (j + 1 rows: j vectors and the next one), the j x j projected matrix,
    the last coupling beta and the matvecs used.
    """
    n = state.residual.shape[0]
    p = state.ritz_values.shape[0]
    # Rows are basis vectors, so every vector handed to matvec is contiguous.
    V = np.empty((m + 1, n))
    V[:p] = state.ritz_vectors.T
    V[p] = state.residual
    T = np.zeros((m, m))
    T[np.arange(p), np.arange(p)] = state.ritz_values
    T[p, :p] = state.coupling
    T[:p, p] = state.coupling
    beta = 0.0
    j = p
    while j < m and j - p < budget:
        w = apply(V[j])
        scale = np.linalg.norm(w)
        basis = V[: j + 1]
        # Two passes of classical Gram-Schmidt against the whole basis ("twice is enough").
        h = basis @ w
        w = w - basis.T @ h
        h2 = basis @ w
        w -= basis.T @ h2
        T[j, j] = h[j] + h2[j]
        beta = float(np.linalg.norm(w))
        if beta <= _BREAKDOWN * scale:
            # Invariant subspace: continue with a seeded random direction, coupling 0.
            beta = 0.0
            V[j + 1] = _fresh_direction(
                basis, state.seed, (_TAG_BREAKDOWN, state.restarts, state.check_round, j)
            )
        else:
            V[j + 1] = w / beta
        if j + 1 < m:
            T[j, j + 1] = T[j + 1, j] = beta
        j += 1
    return V[: j + 1], T[:j, :j], beta, j - p


def _fresh_direction(basis: np.ndarray, seed: int, key: tuple[int, ...]) -> np.ndarray:
    """A unit vector orthogonal to the rows of ``basis``, reproducible from (seed, key)."""
    w = np.random.default_rng([seed, *key]).uniform(-1.0, 1.0, basis.shape[1])
    for _ in range(2):
        w -= basis.T @ (basis @ w)
    return w / np.linalg.norm(w)


def _restart(
    basis: np.ndarray,
    T: np.ndarray,
    beta: float,
    keep: int,
    old: LanczosState,
    used: int,
    target: int,
    tol: float,
) -> LanczosState:
    """Rayleigh-Ritz on the cycle's basis; the leading ``keep`` Ritz pairs form the new state."""
    j = T.shape[0]
    theta, W = scipy.linalg.eigh(T)
    order = np.argsort(-theta, kind="stable")
    theta, W = theta[order], W[:, order]
    k = min(keep, j)
    new = LanczosState(
        ritz_vectors=basis[:j].T @ W[:, :k],
        ritz_values=theta[:k].copy(),
        coupling=beta * W[-1, :k],
        residual=basis[j].copy(),
        beta=beta,
        restarts=old.restarts + 1,
        matvecs=old.matvecs + used,
        converged=0,
        norm_estimate=max(old.norm_estimate, float(np.abs(theta).max())),
        seed=old.seed,
        check_round=old.check_round,
        cut=old.cut,
        dropped=old.dropped,
    )
    new.converged = _leading_converged(new, target, tol)
    return new


def _leading_converged(state: LanczosState, limit: int, tol: float) -> int:
    """Number of leading pairs (at most ``limit``) with |s_i| <= tol * ||A|| estimate."""
    s = np.abs(state.coupling[:limit])
    ok = s <= tol * state.norm_estimate
    return int(s.size if ok.all() else np.argmin(ok))


def _result_from_state(state: LanczosState, count: int) -> LanczosResult:
    return LanczosResult(
        values=state.ritz_values[:count].copy(),
        vectors=np.array(state.ritz_vectors[:, :count], order="C"),
        matvecs=state.matvecs,
        restarts=state.restarts,
        residuals=np.abs(state.coupling[:count]) + state.dropped,
    )


def _not_converged(
    best: LanczosState, count: int, tol: float, resume: LanczosState
) -> NotConverged:
    err = NotConverged(
        f"Lanczos stopped at the budget of {best.matvecs} matvecs ({best.restarts} restarts) "
        f"with {min(best.converged, count)} of {count} eigenpairs at tol={tol:g}: raise "
        "`[solver] max_matvecs` (a saved solver state can be resumed), loosen "
        "`[solver] tol`, or use a larger Lanczos basis.",
        eigenvalues=best.ritz_values[:count].copy(),
        eigenvectors=np.array(best.ritz_vectors[:, :count], order="C"),
    )
    err.state = resume
    return err


def _dense_pairs(matvec: Callable, n: int, count: int) -> LanczosResult:
    """All eigenpairs of the operator applied to the identity (small n)."""
    apply = _checked_matvec(matvec, n)
    eye = np.eye(n)
    dense = np.column_stack([apply(eye[:, i]) for i in range(n)])
    values, vectors = scipy.linalg.eigh(0.5 * (dense + dense.T))
    order = np.argsort(-values, kind="stable")[:count]
    values, vectors = values[order], vectors[:, order]
    residuals = np.linalg.norm(dense @ vectors - vectors * values, axis=0)
    return LanczosResult(values=values, vectors=vectors, matvecs=n, restarts=0, residuals=residuals)

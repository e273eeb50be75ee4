"""Samples of manifolds and graphs whose Laplacian spectra are known in closed form.

Used as oracles (methods.md §9.1–9.4): cycle graph C_n (Chung 1997), the unit circle
(Laplace–Beltrami eigenvalues k^2, functions cos/sin k theta) and the flat Clifford torus
(a^2 + b^2). Also assertions that compare eigenvectors up to sign or eigenspaces up to rotation.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
import scipy.sparse as sp

# Amplitude of the non-uniform circle density 1 + a cos(theta) used in methods.md §9.3.
COSINE_DENSITY_AMPLITUDE = 0.8


def circle_grid(n: int) -> tuple[np.ndarray, np.ndarray]:
    """n equally spaced points on the unit circle.

    Returns
    -------
    points : ndarray, shape (n, 2)
    theta : ndarray, shape (n,)
        Angles 2 pi j / n.
    """
    theta = 2 * np.pi * np.arange(n) / n
    return np.column_stack([np.cos(theta), np.sin(theta)]), theta


def circle_sample(
    n: int, *, seed: int = 0, density: str = "uniform"
) -> tuple[np.ndarray, np.ndarray]:
    """Random points on the unit circle.

    Parameters
    ----------
    n : int
    seed : int
    density : {"uniform", "cosine"}
        "cosine": density proportional to 1 + 0.8 cos(theta) (rejection sampling).

    Returns
    -------
    points : ndarray, shape (n, 2)
    theta : ndarray, shape (n,), in [0, 2 pi)
    """
    rng = np.random.default_rng(seed)
    if density == "uniform":
        theta = rng.uniform(0.0, 2 * np.pi, n)
    elif density == "cosine":
        theta = _rejection_cosine(rng, n, COSINE_DENSITY_AMPLITUDE)
    else:
        raise ValueError(f"density must be 'uniform' or 'cosine'; got {density!r}.")
    return np.column_stack([np.cos(theta), np.sin(theta)]), theta


def _rejection_cosine(rng: np.random.Generator, n: int, amplitude: float) -> np.ndarray:
    out = np.empty(0)
    while out.size < n:
        t = rng.uniform(0.0, 2 * np.pi, 2 * n)
        accept = rng.uniform(0.0, 1 + amplitude, 2 * n) < 1 + amplitude * np.cos(t)
        out = np.concatenate([out, t[accept]])
    return out[:n]


def clifford_torus(n: int, *, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Uniform sample of the flat torus (cos u, sin u, cos v, sin v) in R^4.

    Laplace–Beltrami eigenvalues a^2 + b^2 with multiplicities 1, 4, 4, 4, 8, ... (methods.md §9.2).

    Returns
    -------
    points : ndarray, shape (n, 4)
    angles : ndarray, shape (n, 2)
        (u, v).
    """
    rng = np.random.default_rng(seed)
    uv = rng.uniform(0.0, 2 * np.pi, (n, 2))
    u, v = uv[:, 0], uv[:, 1]
    return np.column_stack([np.cos(u), np.sin(u), np.cos(v), np.sin(v)]), uv


def cycle_affinity(n: int) -> sp.csr_matrix:
    """0/1 adjacency of the cycle graph C_n (no self loops)."""
    i = np.arange(n)
    rows = np.concatenate([i, i])
    cols = np.concatenate([(i + 1) % n, (i - 1) % n])
    return sp.csr_matrix((np.ones(2 * n), (rows, cols)), shape=(n, n))


def cycle_spectrum(n: int) -> np.ndarray:
    """Eigenvalues cos(2 pi k / n), k = 0..n-1, of D^-1/2 W D^-1/2 for C_n, descending (Chung 1997)."""
    return np.sort(np.cos(2 * np.pi * np.arange(n) / n))[::-1]


def assert_same_subspace(a: np.ndarray, b: np.ndarray, min_cos: float) -> float:
    """Assert that span(a) and span(b) agree: every principal-angle cosine >= ``min_cos``.

    Parameters
    ----------
    a, b : ndarrays, shape (n, c)
    min_cos : float

    Returns
    -------
    float
        The smallest principal-angle cosine.
    """
    angles = scipy.linalg.subspace_angles(np.asarray(a, float), np.asarray(b, float))
    worst = float(np.cos(angles.max()))
    assert worst >= min_cos, f"subspaces differ: smallest principal cosine {worst:.6f} < {min_cos}"
    return worst


def assert_same_up_to_sign(
    a: np.ndarray, b: np.ndarray, *, rtol: float = 1e-7, atol: float = 0.0
) -> None:
    """Assert that each column of a equals +- the same column of b.

    Parameters
    ----------
    a, b : ndarrays, shape (n, c) or (n,)
    rtol, atol : float
        Tolerance on min(||a - b||, ||a + b||) relative to ||b||, plus an absolute part.
    """
    a2 = np.atleast_2d(np.asarray(a, float).T).T
    b2 = np.atleast_2d(np.asarray(b, float).T).T
    assert a2.shape == b2.shape, f"shapes differ: {a2.shape} vs {b2.shape}"
    for j in range(a2.shape[1]):
        err = min(np.linalg.norm(a2[:, j] - b2[:, j]), np.linalg.norm(a2[:, j] + b2[:, j]))
        limit = rtol * np.linalg.norm(b2[:, j]) + atol
        assert err <= limit, f"column {j}: distance up to sign {err:.3e} > {limit:.3e}"


def angle_error(coords: np.ndarray, theta: np.ndarray) -> float:
    """Max |angle(c_1 + i c_2) - (+-theta + c)| over points, minimized over the sign and offset c.

    Parameters
    ----------
    coords : ndarray, shape (n, 2)
    theta : ndarray, shape (n,)
    """
    phase = np.angle(coords[:, 0] + 1j * coords[:, 1])
    best = np.inf
    for s in (1.0, -1.0):
        diff = np.exp(1j * (phase - s * theta))
        offset = np.angle(diff.mean())
        err = np.abs(np.angle(diff * np.exp(-1j * offset)))
        best = min(best, float(err.max()))
    return best


def radius_cv(coords: np.ndarray) -> float:
    """Coefficient of variation of sqrt(c_1^2 + c_2^2) (0 for a perfect circle)."""
    r = np.hypot(coords[:, 0], coords[:, 1])
    return float(r.std() / r.mean())

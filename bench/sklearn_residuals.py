"""How converged scikit-learn's SpectralEmbedding maps are: eigen-residuals under its own graph.

Usage: .venv/bin/python bench/sklearn_residuals.py [--rows 200000] [--columns 50]

For each eigen_solver ("arpack", "amg"): the 2-column map of the bench sheet (bench/manifold_data.py,
seed 0, k = 15), trustworthiness (k = 10) on the same 2,000-row sample as bench/vs_reference.py,
and for each column v = map column x sqrt(degree) (normalized), its Rayleigh quotient
v' L v and relative residual ||L v - (v' L v) v|| under the normalized Laplacian L of the
estimator's own affinity_matrix_. A converged solver has residuals near machine precision.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import zarr
from manifold_data import write_table
from scipy.sparse.csgraph import laplacian
from sklearn.manifold import SpectralEmbedding, trustworthiness


def residuals(estimator, Y):
    L, dd = laplacian(estimator.affinity_matrix_, normed=True, return_diag=True)
    out = []
    for j in range(Y.shape[1]):
        v = Y[:, j] * dd
        v /= np.linalg.norm(v)
        quotient = float(v @ (L @ v))
        out.append((quotient, float(np.linalg.norm(L @ v - quotient * v))))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=200_000)
    parser.add_argument("--columns", type=int, default=50)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        data = write_table(Path(tmp) / "sheet.zarr", args.rows, columns=args.columns)
        X = np.asarray(zarr.open_array(str(data), mode="r")[...])
    rows = np.random.default_rng(0).choice(args.rows, size=min(args.rows, 2000), replace=False)
    print(f"{'solver':<8} {'seconds':>8} {'T(10)':>7} {'quotient 1':>11} {'quotient 2':>11}"
          f" {'residual 1':>11} {'residual 2':>11}")
    for solver in ("arpack", "amg"):
        t0 = time.perf_counter()
        est = SpectralEmbedding(n_components=2, n_neighbors=15, eigen_solver=solver,
                                random_state=0)
        Y = est.fit_transform(X)
        seconds = time.perf_counter() - t0
        (q1, r1), (q2, r2) = residuals(est, Y)
        T = trustworthiness(X[rows], Y[rows], n_neighbors=10)
        print(f"{solver:<8} {seconds:>8.1f} {T:>7.4f} {q1:>11.3e} {q2:>11.3e} {r1:>11.1e}"
              f" {r2:>11.1e}", flush=True)


if __name__ == "__main__":
    main()

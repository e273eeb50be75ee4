"""The on-disk affinity matrix: streamed and in-memory products equal scipy's."""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from eigenstream.io import store
from eigenstream.io.graphstore import StoredCSR, write_csr


def test_streamed_and_in_memory_products_equal_scipy(tmp_path, rng):
    # Reference: scipy.sparse CSR product on the same matrix.
    A = sp.random(503, 503, density=0.02, random_state=1, format="csr")
    K = (A + A.T).tocsr()
    write_csr(store.open_group(tmp_path / "g.zarr", mode="w"), K)
    x = rng.standard_normal(503)
    X = rng.standard_normal((503, 3))
    in_memory = StoredCSR(tmp_path / "g.zarr")
    streamed = StoredCSR(tmp_path / "g.zarr", memory_budget=0, block_rows=37)
    assert in_memory.mode == "memory" and streamed.mode == "streamed"
    for op in (in_memory, streamed):
        assert np.allclose(op.matvec(x), K @ x, rtol=0, atol=1e-12)
        assert np.allclose(op.matvec(X), K @ X, rtol=0, atol=1e-12)
    assert streamed.passes == 2
    assert (streamed.to_scipy() != K).nnz == 0
    assert (streamed.row_block(100, 140) != K[100:140]).nnz == 0


def test_take_hands_the_matrix_over_and_products_then_stream(tmp_path, rng):
    # Reference: scipy.sparse CSR product on the same matrix.
    A = sp.random(311, 311, density=0.03, random_state=2, format="csr")
    K = (A + A.T).tocsr()
    write_csr(store.open_group(tmp_path / "g.zarr", mode="w"), K)
    stored = StoredCSR(tmp_path / "g.zarr", block_rows=50)
    taken = stored.take()
    assert (taken != K).nnz == 0
    assert stored.to_scipy() is not taken  # no reference kept: a fresh read from disk
    x = rng.standard_normal(311)
    assert np.allclose(stored.matvec(x), K @ x, rtol=0, atol=1e-12)

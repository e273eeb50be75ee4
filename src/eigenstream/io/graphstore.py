"""The symmetric affinity matrix K on disk, as CSR in three zarr arrays, and its matvec.

``indptr`` (n+1, int64), ``indices`` (nnz, int64) and ``data`` (nnz, float64) are written by
one writer, chunked along the non-zeros. :class:`StoredCSR` applies K to a vector either from
memory (when the matrix fits the given byte budget) or by streaming row blocks from zarr.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import scipy.sparse as sp

from eigenstream.io import store

_NNZ_CHUNK = 1 << 20


def write_csr(group, K: sp.csr_matrix, *, prefix: str = "K") -> None:
    """Store ``K`` under ``prefix/indptr``, ``prefix/indices`` and ``prefix/data``."""
    K = K.tocsr()
    nnz = K.nnz
    indptr = store.create_array(group, f"{prefix}/indptr", shape=(K.shape[0] + 1,),
                                chunk_rows=_NNZ_CHUNK, dtype=np.int64)
    indptr[...] = K.indptr.astype(np.int64)
    for name, values, dtype in (("indices", K.indices, np.int64), ("data", K.data, np.float64)):
        arr = store.create_array(group, f"{prefix}/{name}", shape=(nnz,), chunk_rows=_NNZ_CHUNK,
                                 dtype=dtype)
        for s, e in store.block_ranges(nnz, _NNZ_CHUNK):
            arr[s:e] = values[s:e].astype(dtype, copy=False)


class StoredCSR:
    """Matrix-vector products with the CSR matrix stored in a zarr group.

    Parameters
    ----------
    path : path-like
        The zarr group written by :func:`write_csr`.
    prefix : str, default="K"
        The name the matrix was stored under.
    memory_budget : int, default=2**31
        Bytes the matrix may occupy in memory; above it every product streams row blocks.
    block_rows : int, default=100_000
        Rows read per block when streaming.
    """

    def __init__(self, path: str | Path, *, prefix: str = "K", memory_budget: int = 1 << 31,
                 block_rows: int = 100_000):
        group = store.open_group(path, mode="r")
        self._indptr_arr = group[f"{prefix}/indptr"]
        self._indices_arr = group[f"{prefix}/indices"]
        self._data_arr = group[f"{prefix}/data"]
        self.n = self._indptr_arr.shape[0] - 1
        self.nnz = self._data_arr.shape[0]
        self.block_rows = block_rows
        self.indptr = np.asarray(self._indptr_arr[...])
        self.in_memory = self.nnz * 16 <= memory_budget
        self._matrix = self._load() if self.in_memory else None
        self.passes = 0

    @property
    def mode(self) -> str:
        """"memory" or "streamed": where products read the matrix from."""
        return "memory" if self.in_memory else "streamed"

    def _load(self) -> sp.csr_matrix:
        return sp.csr_matrix(
            (np.asarray(self._data_arr[...]), np.asarray(self._indices_arr[...]), self.indptr),
            shape=(self.n, self.n),
        )

    def row_block(self, start: int, stop: int) -> sp.csr_matrix:
        """Rows ``start:stop`` of K as an in-memory CSR matrix."""
        p0, p1 = int(self.indptr[start]), int(self.indptr[stop])
        return sp.csr_matrix(
            (np.asarray(self._data_arr[p0:p1]), np.asarray(self._indices_arr[p0:p1]),
             self.indptr[start : stop + 1] - p0),
            shape=(stop - start, self.n),
        )

    def matvec(self, x: np.ndarray) -> np.ndarray:
        """K @ x for a vector (n,) or a block of vectors (n, b)."""
        self.passes += 1
        if self._matrix is not None:
            return self._matrix @ x
        out = np.empty((self.n,) + x.shape[1:], dtype=np.float64)
        for s, e in store.block_ranges(self.n, self.block_rows):
            out[s:e] = self.row_block(s, e) @ x
        return out

    def to_scipy(self) -> sp.csr_matrix:
        """The whole matrix in memory."""
        return self._matrix if self._matrix is not None else self._load()

    def take(self) -> sp.csr_matrix:
        """The whole matrix in memory, handed over: this object keeps no reference to it.

        Lets a consumer that turns K into something else free K early; later products here
        read the matrix from disk.
        """
        matrix, self._matrix = self.to_scipy(), None
        return matrix

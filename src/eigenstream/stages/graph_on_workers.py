"""The affinity matrix K applied to vectors on the dask workers, row block by row block.

:class:`WorkerGraph` has the interface of :class:`eigenstream.io.graphstore.StoredCSR`
(``n``, ``nnz``, ``mode``, ``passes``, ``matvec``) but each product runs as one task per row
block on the workers. When the blocks fit the workers' memory they are loaded once by tasks
and kept there ("persisted"); otherwise every product task reads its rows from zarr again
("streamed"). Every task has a recipe (no scattered data), so dask recomputes whatever a lost
worker held, blocks included, and a product finishes on the workers that remain.
"""

from __future__ import annotations

import logging
import math
import uuid
import warnings
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from dask.base import tokenize
from dask.utils import format_bytes
from distributed import Client, Future, wait

from eigenstream.io import store

log = logging.getLogger(__name__)

PERSISTED = "workers (persisted)"
STREAMED = "workers (streamed)"

# write_csr stores int64 column indices and float64 values; scipy may narrow the indices to
# int32 once loaded, so this over-counts a little, on the safe side.
_BYTES_PER_NONZERO = 16
# Retries cover exceptions raised inside a task (a shared file system failing one read);
# tasks lost with a dead worker are rerun by the scheduler without using them.
_RETRIES = 2


def _read_rows(path: str, prefix: str, n: int, start: int, stop: int) -> sp.csr_matrix:
    """Rows ``start:stop`` of the stored matrix, read by whichever process runs this."""
    group = store.open_group(path, mode="r")
    indptr = np.asarray(group[f"{prefix}/indptr"][start : stop + 1])
    p0, p1 = int(indptr[0]), int(indptr[-1])
    return sp.csr_matrix(
        (np.asarray(group[f"{prefix}/data"][p0:p1]), np.asarray(group[f"{prefix}/indices"][p0:p1]),
         indptr - p0),
        shape=(stop - start, n),
    )


def _multiply(block: sp.csr_matrix, x: np.ndarray) -> np.ndarray:
    return block @ x


def _read_and_multiply(path: str, prefix: str, n: int, start: int, stop: int,
                       x: np.ndarray) -> np.ndarray:
    return _read_rows(path, prefix, n, start, stop) @ x


def _vector(x: np.ndarray) -> np.ndarray:
    """The product's input, returned as a task result so dask can rebuild it if lost."""
    return x


def balanced_row_blocks(indptr: np.ndarray, n_blocks: int,
                        align: int = 1) -> list[tuple[int, int]]:
    """Consecutive ``(start, stop)`` row ranges holding about equal numbers of non-zeros.

    Parameters
    ----------
    indptr : ndarray of shape (n + 1,)
        CSR row pointers.
    n_blocks : int
        Ranges wanted; fewer come back when rows are too few or too heavy to split that far,
        or when ``align`` allows fewer cuts.
    align : int, default=1
        Cuts fall at the first row starting at or after a multiple of this many non-zeros.
    """
    n = indptr.shape[0] - 1
    targets = np.linspace(0, indptr[-1], max(1, n_blocks) + 1)[1:-1]
    targets = np.round(targets / align) * align
    cuts = np.searchsorted(indptr, targets, side="left")
    bounds = np.unique(np.concatenate(([0], np.clip(cuts, 0, n), [n])))
    return [(int(s), int(e)) for s, e in zip(bounds[:-1], bounds[1:], strict=True) if e > s]


def usable_worker_memory(client: Client, worker_memory: int | None,
                         memory_fraction: float) -> tuple[int, int]:
    """``(bytes, workers)``: memory the workers may give to graph blocks, and their count.

    Each worker counts ``memory_fraction`` of ``worker_memory`` when given, else of its own
    ``memory_limit``; a worker without a limit counts nothing.
    """
    workers = client.scheduler_info(n_workers=-1)["workers"].values()
    limits = [worker_memory if worker_memory is not None else (w.get("memory_limit") or 0)
              for w in workers]
    return int(sum(limits) * memory_fraction), len(limits)


class WorkerGraph:
    """Matrix-vector products with the stored CSR matrix K, computed on the dask workers.

    Parameters
    ----------
    client : distributed.Client
        The run's client; its workers must see ``path`` (a shared file system).
    path : path-like
        The zarr group written by :func:`eigenstream.io.graphstore.write_csr`.
    worker_memory : int or None, default=None
        Bytes of memory per worker; None takes each worker's ``memory_limit``.
    prefix : str, default="K"
        The name the matrix was stored under.
    memory_fraction : float, default=0.5
        Share of the workers' memory the kept blocks may fill; above it products stream.
    blocks_per_worker : int, default=4
        Row blocks per worker, so a lost worker's share is spread over the others.
    max_block_bytes : int, default=256 MiB
        Largest row block; a bigger graph is cut into more blocks.
    """

    def __init__(self, client: Client, path: str | Path, *, worker_memory: int | None = None,
                 prefix: str = "K", memory_fraction: float = 0.5, blocks_per_worker: int = 4,
                 max_block_bytes: int = 256 << 20):
        self._client = client
        self._path = str(path)
        self._prefix = prefix
        group = store.open_group(self._path, mode="r")
        indptr = np.asarray(group[f"{prefix}/indptr"][...])
        self.n = indptr.shape[0] - 1
        self.nnz = int(indptr[-1])
        self.passes = 0
        graph_bytes = self.nnz * _BYTES_PER_NONZERO + indptr.nbytes
        usable, workers = usable_worker_memory(client, worker_memory, memory_fraction)
        self.persisted = workers > 0 and graph_bytes <= usable
        n_blocks = max(blocks_per_worker * max(workers, 1),
                       math.ceil(graph_bytes / max_block_bytes))
        # A streamed block reads whole stored chunks of non-zeros, so its cuts follow them; a
        # cut inside a chunk makes both neighbours read it.
        chunk = group[f"{prefix}/data"].chunks[0] if not self.persisted else 1
        self.blocks = balanced_row_blocks(indptr, n_blocks, align=chunk)
        self._held: list[Future] = self._load_blocks() if self.persisted else []
        log.info("graph products on the %s: K (%s, %d row blocks) %s the %s usable on %d "
                 "workers", self.mode, format_bytes(graph_bytes), len(self.blocks),
                 "fits in" if self.persisted else "does not fit in", format_bytes(usable),
                 workers)

    @property
    def mode(self) -> str:
        """"workers (persisted)" or "workers (streamed)": where products read K from."""
        return PERSISTED if self.persisted else STREAMED

    def _block_key(self, start: int, stop: int) -> str:
        # Named after what it holds, so the same block of the same store is one dask key.
        return f"graph-block-{tokenize(self._path, self._prefix, self.n, self.nnz, start, stop)}"

    def _load_blocks(self) -> list[Future]:
        held = [
            self._client.submit(_read_rows, self._path, self._prefix, self.n, s, e,
                                key=self._block_key(s, e), pure=True, retries=_RETRIES)
            for s, e in self.blocks
        ]
        wait(held)
        for future in held:
            if future.status == "error":
                future.result()  # raises the read error here, not in the first product
        return held

    def matvec(self, x: np.ndarray) -> np.ndarray:
        """K @ x for a vector (n,) or a block of vectors (n, b)."""
        if self.persisted and not self._held:
            raise RuntimeError("This WorkerGraph was closed; make a new one for more products.")
        x = np.asarray(x, dtype=np.float64)
        if x.ndim not in (1, 2) or x.shape[0] != self.n:
            raise ValueError(f"matvec needs an array of shape ({self.n},) or ({self.n}, b); "
                             f"got {x.shape}.")
        self.passes += 1
        tag = uuid.uuid4().hex
        with warnings.catch_warnings():
            # x travels inside a task, not through client.scatter: scattered data has no
            # recipe, so losing the worker holding it would fail every product waiting for it.
            # dask's warning about a large task graph names the cost accepted here.
            warnings.filterwarnings("ignore", message="Sending large graph")
            x_future = self._client.submit(_vector, x, key=f"graph-x-{tag}", pure=False)
        parts = [self._submit_block(i, x_future, tag) for i in range(len(self.blocks))]
        try:
            return np.concatenate(self._client.gather(parts), axis=0)
        finally:
            for future in (x_future, *parts):
                future.release()

    def _submit_block(self, i: int, x_future: Future, tag: str) -> Future:
        key = f"graph-product-{tag}-{i}"
        if self.persisted:
            return self._client.submit(_multiply, self._held[i], x_future, key=key,
                                       retries=_RETRIES)
        s, e = self.blocks[i]
        return self._client.submit(_read_and_multiply, self._path, self._prefix, self.n, s, e,
                                   x_future, key=key, retries=_RETRIES)

    def close(self) -> None:
        """Release the blocks kept on the workers."""
        # Released, not cancelled: another holder of the same block keys keeps its copy.
        for future in self._held:
            future.release()
        self._held = []

    def __enter__(self) -> WorkerGraph:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

"""zarr arrays as the stages write them.

Rules (measured, see docs/storage.md): arrays are zarr v3, unsharded, chunked by row blocks so
that a writer always owns whole chunks; float data is stored uncompressed behind a CRC32C
checksum so a damaged chunk is an error on read instead of silent garbage; every chunk is
written even when it equals the fill value, so chunk presence can be audited.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import zarr
from zarr.codecs import Crc32cCodec

_WRITE_ALL_CHUNKS = {"write_empty_chunks": True}


def open_group(path: str | Path, *, mode: str = "a") -> zarr.Group:
    """Open (or create, for mode "a"/"w") the zarr group at ``path``."""
    return zarr.open_group(str(path), mode=mode, use_consolidated=False)


def create_array(
    group: zarr.Group,
    name: str,
    *,
    shape: tuple[int, ...],
    chunk_rows: int,
    dtype: Any,
) -> zarr.Array:
    """Create (replacing any old one) an array chunked by ``chunk_rows`` along axis 0."""
    dtype = np.dtype(dtype) if dtype is not str else str
    chunks = (max(1, min(chunk_rows, max(shape[0], 1))),) + tuple(max(1, s) for s in shape[1:])
    if dtype is str or dtype.kind in "OUS":
        return group.create_array(
            name, shape=shape, chunks=chunks, dtype=str, overwrite=True, config=_WRITE_ALL_CHUNKS
        )
    fill = np.nan if dtype.kind == "f" else 0
    return group.create_array(
        name,
        shape=shape,
        chunks=chunks,
        dtype=dtype,
        fill_value=fill,
        compressors=[Crc32cCodec()],
        overwrite=True,
        config=_WRITE_ALL_CHUNKS,
    )


def write_small(group: zarr.Group, name: str, values: np.ndarray) -> zarr.Array:
    """Store a small array (a vector of length n or less) as one array in ``group``."""
    values = np.asarray(values)
    arr = create_array(
        group, name, shape=values.shape, chunk_rows=max(1, values.shape[0] if values.ndim else 1),
        dtype=values.dtype,
    )
    arr[...] = values
    return arr


# Bytes handed to zarr per call when writing a large array: zarr encodes every chunk of a call
# at once, so one call holding a whole 24 MiB array kept ~100 MiB more resident (200k x 15 lists).
WRITE_BLOCK_BYTES = 8 << 20


def write_rows(array: zarr.Array, values: np.ndarray, *, start: int = 0,
               block_bytes: int = WRITE_BLOCK_BYTES) -> None:
    """Write ``values`` to rows ``start:start + len(values)`` of ``array``, a few chunks per call.

    Each call covers whole chunks of ``array`` (at least one) and at most about
    ``block_bytes`` of ``values``, so the encoder's scratch stays bounded.
    """
    values = np.asarray(values)
    n = values.shape[0]
    row_bytes = max(1, values[:1].nbytes)
    chunk = array.chunks[0]
    rows = max(chunk, block_bytes // row_bytes // chunk * chunk)
    stop = start + n
    s = start
    while s < stop:
        e = min(stop, (s // chunk) * chunk + rows)  # blocks end on chunk boundaries
        array[s:e] = values[s - start:e - start]
        s = e


def read_rows(array: zarr.Array, start: int, stop: int) -> np.ndarray:
    """Rows ``start:stop`` of ``array`` as a numpy array."""
    return np.asarray(array[start:stop])


def read_labels(array: zarr.Array) -> np.ndarray:
    """A stored label or id column as numpy values (text as Python str objects)."""
    values = np.asarray(array[...])
    return values.astype(object) if values.dtype.kind == "T" else values


def block_ranges(n_rows: int, block_rows: int) -> list[tuple[int, int]]:
    """Consecutive ``(start, stop)`` row ranges of at most ``block_rows`` rows."""
    return [(s, min(s + block_rows, n_rows)) for s in range(0, n_rows, block_rows)]

"""Write embedding coordinates to ``.npy``, Parquet or CSV, block by block.

The coordinates may be any row-sliceable array with ``.shape`` (a NumPy or zarr array),
so outputs larger than memory are written without loading them. Output goes to a
temporary file next to the destination that is renamed into place at the end, so a
failure never leaves a half-written file under the final name.

Columns are named ``<column_prefix>_1`` .. ``<column_prefix>_k``. For Parquet and CSV,
row ids (if given) come first, in a column named ``id_name``. A ``.npy`` file holds the
coordinates only (rows in input order); ids are not stored in it.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from eigenstream.errors import ConfigError

__all__ = ["EXPORT_FORMATS", "export_coordinates"]

EXPORT_FORMATS = ("npy", "parquet", "csv")
_SUFFIXES = {".npy": "npy", ".parquet": "parquet", ".pq": "parquet", ".csv": "csv"}
#: Default number of values per written block (32 MiB of float64).
_BLOCK_VALUES = 1 << 22


def export_coordinates(
    coords: Any,
    path: str | os.PathLike,
    *,
    fmt: str | None = None,
    ids: Any = None,
    id_name: str = "id",
    column_prefix: str = "component",
    block_rows: int | None = None,
) -> Path:
    """Write an ``(n, k)`` coordinate array to ``path``.

    Parameters
    ----------
    coords : array-like
        ``(n, k)`` coordinates, sliceable by row ranges (NumPy or zarr array).
    path : path-like
        Destination file; replaced if it exists.
    fmt : {"npy", "parquet", "csv"}, optional
        Output format; taken from the suffix of ``path`` when None.
    ids : array-like, optional
        ``(n,)`` row ids, written as the first column of Parquet and CSV output.
    id_name : str, default="id"
        Name of the id column.
    column_prefix : str, default="component"
        Coordinate columns are named ``<column_prefix>_1`` .. ``<column_prefix>_k``.
    block_rows : int, optional
        Rows written per block (one Parquet row group per block); by default about
        four million values per block.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    ConfigError
        If the format is unknown or cannot be told from the suffix, or the destination
        directory cannot be written.
    ValueError
        If ``coords`` is not 2-D or ``ids`` has the wrong length.
    """
    path = Path(path).expanduser()
    fmt = _resolve_format(path, fmt)
    shape = tuple(int(s) for s in coords.shape)
    if len(shape) != 2:
        raise ValueError(f"coords must be 2-D (rows x components); got shape {shape}.")
    n, k = shape
    if ids is not None:
        ids = np.asarray(ids)
        if ids.shape != (n,):
            raise ValueError(f"ids must have shape ({n},) to match coords; got {ids.shape}.")
    if block_rows is None:
        block_rows = max(1, _BLOCK_VALUES // max(k, 1))
    if block_rows < 1:
        raise ValueError(f"block_rows must be >= 1; got {block_rows}.")
    dtype = np.dtype(coords.dtype)
    if dtype not in (np.float32, np.float64):
        dtype = np.dtype(np.float64)
    names = [f"{column_prefix}_{j + 1}" for j in range(k)]
    if ids is not None and id_name in names:
        raise ValueError(f"id_name {id_name!r} clashes with a coordinate column name.")

    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        handle, tmp_name = tempfile.mkstemp(
            dir=path.parent, prefix=f".{path.name}.", suffix=".part"
        )
    except OSError as exc:
        raise ConfigError(
            f"Cannot write to '{path.parent}' ({exc.strerror}); choose another output path."
        ) from None
    os.close(handle)
    tmp = Path(tmp_name)
    blocks = _blocks(coords, n, block_rows, dtype)
    try:
        if fmt == "npy":
            _write_npy(tmp, blocks, shape, dtype)
        elif fmt == "parquet":
            _write_parquet(tmp, blocks, names, ids, id_name, dtype)
        else:
            _write_csv(tmp, blocks, names, ids, id_name, dtype)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _resolve_format(path: Path, fmt: str | None) -> str:
    if fmt is None:
        suffix = path.suffix.lower()
        if suffix not in _SUFFIXES:
            raise ConfigError(
                f"Cannot tell the export format of '{path}' from its suffix "
                f"{suffix or '(none)'!r}; pass `--format` with one of "
                f"{', '.join(EXPORT_FORMATS)} or use a .npy, .parquet or .csv file name."
            )
        return _SUFFIXES[suffix]
    if fmt not in EXPORT_FORMATS:
        raise ConfigError(
            f"Unknown export format {fmt!r} (`--format`); use one of {', '.join(EXPORT_FORMATS)}."
        )
    return fmt


def _blocks(coords: Any, n: int, block_rows: int, dtype: np.dtype) -> Iterator[tuple[int, np.ndarray]]:
    for a in range(0, n, block_rows):
        b = min(a + block_rows, n)
        yield a, np.ascontiguousarray(np.asarray(coords[a:b]), dtype=dtype)


def _write_npy(tmp: Path, blocks, shape: tuple[int, int], dtype: np.dtype) -> None:
    if 0 in shape:  # a zero-length file cannot be memory-mapped
        with open(tmp, "wb") as fh:
            np.lib.format.write_array(fh, np.empty(shape, dtype=dtype))
        return
    out = np.lib.format.open_memmap(tmp, mode="w+", dtype=dtype, shape=shape)
    try:
        for a, block in blocks:
            out[a : a + len(block)] = block
        out.flush()
    finally:
        del out


def _table(block: np.ndarray, a: int, names, ids, id_name: str):
    import pyarrow as pa

    columns = {}
    if ids is not None:
        columns[id_name] = pa.array(ids[a : a + len(block)])
    for j, name in enumerate(names):
        columns[name] = pa.array(block[:, j])
    return pa.table(columns)


def _schema(names, ids, id_name: str, dtype: np.dtype):
    import pyarrow as pa

    fields = []
    if ids is not None:
        fields.append(pa.field(id_name, pa.array(ids[:1]).type))
    value_type = pa.from_numpy_dtype(dtype)
    fields.extend(pa.field(name, value_type) for name in names)
    return pa.schema(fields)


def _write_parquet(tmp: Path, blocks, names, ids, id_name: str, dtype: np.dtype) -> None:
    import pyarrow.parquet as pq

    schema = _schema(names, ids, id_name, dtype)
    with pq.ParquetWriter(tmp, schema) as writer:
        for a, block in blocks:
            table = _table(block, a, names, ids, id_name).cast(schema)
            writer.write_table(table, row_group_size=max(len(block), 1))


def _write_csv(tmp: Path, blocks, names, ids, id_name: str, dtype: np.dtype) -> None:
    import pyarrow.csv as pacsv

    schema = _schema(names, ids, id_name, dtype)
    # Arrow writes floats with the shortest text that reads back to the same value.
    with pacsv.CSVWriter(tmp, schema) as writer:
        for a, block in blocks:
            writer.write_table(_table(block, a, names, ids, id_name).cast(schema))

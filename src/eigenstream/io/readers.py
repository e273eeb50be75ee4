"""Chunked readers: stream the rows of an input table as blocks of feature values.

:func:`open_source` turns an :class:`~eigenstream.config.InputConfig` into a
:class:`RowSource` whose :meth:`RowSource.blocks` yields :class:`RowBlock` objects of a
fixed number of rows, starting at any row (so an interrupted run can resume). No reader
loads the whole table: ``.npy`` files are memory-mapped, zarr and HDF5 arrays are sliced,
Parquet is read batch by batch and CSV is parsed as a stream.

Formats
-------
Arrays (``.npy``, zarr, HDF5)
    Must be 2-D (rows x columns). Their columns are named ``col1`` .. ``colD`` (1-based,
    as people count). ``[input] columns``, ``exclude_columns`` and ``id_column`` only
    apply to CSV/Parquet and are refused for arrays with a :class:`ConfigError`; to embed
    a subset of an array's columns, store that subset. A pass-through column (e.g. the
    map colour) may name an array column as ``colK``. A zarr group or an HDF5 file with
    several arrays needs ``[input] dataset``; with exactly one array it is used.
Tables (CSV, Parquet)
    The feature columns are ``[input] columns`` when given, otherwise every numeric
    (integer or floating-point) column except ``id_column``, ``exclude_columns`` and the
    requested pass-through columns. Empty cells (and Parquet nulls) read as NaN and are
    then handled like any other bad value (see ``[run] on_bad_rows``).
CSV
    A header row naming the columns is required. The delimiter is taken from the header
    line: comma, else tab, else semicolon. Rows are counted up front by a fast pass over
    the raw bytes (non-empty lines minus the header); when the file contains a double
    quote or a bare carriage return the count is made by the CSV parser instead, so
    quoted fields holding line breaks are counted correctly. Line numbers in messages
    are exact; :func:`describe_bad_value`, which only sees a block, reports line =
    row + 1, which assumes one line per row and no blank lines.

Block dtype rule
----------------
Blocks hold float64 values when the stored values are float64 and float32 otherwise
(integers of any width, float16, float32). CSV text is parsed as float64, so CSV blocks
are float64. For tables whose selected columns have different types, the stored dtype is
their common NumPy type (``np.result_type``; e.g. int32 with float32 gives float64).
Booleans, complex numbers, strings and objects are refused.
"""

from __future__ import annotations

import csv
import functools
import math
import operator
import os
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np

from eigenstream.config import InputConfig
from eigenstream.errors import ConfigError, InputError

__all__ = [
    "RowBlock",
    "RowSource",
    "block_dtype",
    "open_source",
    "bad_value_mask",
    "describe_bad_value",
]

ARRAY_FORMATS = ("npy", "zarr", "hdf5")
TABLE_FORMATS = ("csv", "parquet")

#: Bytes parsed per CSV batch; module-level so tests can make batches small.
CSV_READ_BYTES = 1 << 22
#: Bytes read per step of the CSV row-counting pass.
CSV_COUNT_BYTES = 1 << 24

_DROP_HINT = 'fix the value or set `[run] on_bad_rows = "drop"` to leave such rows out'


@dataclass(frozen=True)
class RowBlock:
    """A run of consecutive input rows.

    Attributes
    ----------
    start : int
        0-based index of the block's first row in the input.
    values : ndarray
        ``(m, n_columns)`` float64 or float32 feature values, C-contiguous.
    ids : ndarray or None
        ``(m,)`` row ids from ``[input] id_column`` as read (integers or strings), else None.
    extra : dict of str to ndarray
        Requested pass-through columns, ``(m,)`` each.
    """

    start: int
    values: np.ndarray
    ids: np.ndarray | None = None
    extra: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def stop(self) -> int:
        """0-based index one past the block's last row."""
        return self.start + len(self.values)

    def __len__(self) -> int:
        return len(self.values)


def block_dtype(stored: np.dtype) -> np.dtype:
    """Return the dtype blocks are delivered in for values stored as ``stored``."""
    return np.dtype(np.float64) if np.dtype(stored) == np.float64 else np.dtype(np.float32)


class RowSource:
    """An opened input: its shape and column names, and a way to stream its rows.

    Use :func:`open_source` to get one. A source is also a context manager; pickling it
    reopens the input from its configuration (for CSV that repeats the row count).

    Attributes
    ----------
    path : Path
        The input file or store.
    format : str
        ``"npy"``, ``"zarr"``, ``"csv"``, ``"parquet"`` or ``"hdf5"``.
    n_rows : int
        Total number of rows.
    columns : tuple of str
        Feature column names (``col1`` .. ``colD`` for arrays).
    dtype : numpy.dtype
        Dtype of the stored feature values (before any cast; float64 for CSV).
    id_name : str or None
        Name of the id column, if any.
    extra_names : tuple of str
        Names of the pass-through columns each block carries in ``extra``.
    """

    path: Path
    format: str
    n_rows: int
    columns: tuple[str, ...]
    dtype: np.dtype
    id_name: str | None = None
    extra_names: tuple[str, ...] = ()

    def __init__(self, path: Path, cfg: InputConfig, extra_columns: tuple[str, ...]):
        self.path = path
        self._cfg = cfg
        self.extra_names = extra_columns

    @property
    def n_columns(self) -> int:
        """Number of feature columns."""
        return len(self.columns)

    @property
    def block_dtype(self) -> np.dtype:
        """Dtype of ``RowBlock.values`` (see the module's block dtype rule)."""
        return block_dtype(self.dtype)

    def blocks(self, block_rows: int, *, start: int = 0) -> Iterator[RowBlock]:
        """Yield consecutive blocks of ``block_rows`` rows from row ``start`` on.

        The last block may be shorter; nothing is yielded when ``start == n_rows``.

        Raises
        ------
        ValueError
            If ``block_rows < 1`` or ``start`` is outside ``[0, n_rows]``.
        InputError
            If the input turns out to be unreadable part-way.
        """
        block_rows = operator.index(block_rows)
        start = operator.index(start)
        if block_rows < 1:
            raise ValueError(f"block_rows must be >= 1; got {block_rows}.")
        if not 0 <= start <= self.n_rows:
            raise ValueError(f"start must be in [0, {self.n_rows}]; got {start}.")
        return self._blocks(block_rows, start)

    def _blocks(self, block_rows: int, start: int) -> Iterator[RowBlock]:
        raise NotImplementedError

    def missing_rows(self) -> list[tuple[int, int]]:
        """Row ranges whose storage is absent (read as a fill value); empty for most formats."""
        return []

    def close(self) -> None:
        """Release the open file, if any. Safe to call twice."""

    def __enter__(self) -> RowSource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __reduce__(self):
        return (functools.partial(open_source, extra_columns=self.extra_names), (self._cfg,))

    def __repr__(self) -> str:
        return (
            f"<{type(self).__name__} {self.format} '{self.path}': {self.n_rows} rows x "
            f"{self.n_columns} columns, {self.dtype}>"
        )


# ----------------------------------------------------------------------------------------
# entry point and shared checks


def open_source(cfg: InputConfig, *, extra_columns: Sequence[str] = ()) -> RowSource:
    """Open the input described by ``cfg`` and check it can be embedded.

    Parameters
    ----------
    cfg : InputConfig
        The ``[input]`` section.
    extra_columns : sequence of str, optional
        Columns to carry along in every block's ``extra`` (e.g. a colour column).

    Returns
    -------
    RowSource

    Raises
    ------
    ConfigError
        If an option does not apply to the format, or a needed option is missing.
    InputError
        If the input is missing, unreadable, empty, not 2-D, holds non-numeric values,
        or lacks a named column or dataset.
    """
    fmt = cfg.resolved_format
    path = Path(cfg.path).expanduser()
    extra = tuple(dict.fromkeys(extra_columns))
    _check_options(cfg, fmt)
    _check_path(path, fmt)
    cls = {
        "npy": _NpySource,
        "zarr": _ZarrSource,
        "hdf5": _Hdf5Source,
        "csv": _CsvSource,
        "parquet": _ParquetSource,
    }[fmt]
    return cls(path, cfg, extra)


def _check_options(cfg: InputConfig, fmt: str) -> None:
    if fmt in ARRAY_FORMATS:
        for key in ("columns", "exclude_columns", "id_column"):
            if getattr(cfg, key) is not None:
                raise ConfigError(
                    f"`[input] {key}` only applies to CSV and Parquet input, but '{cfg.path}' is "
                    f"an array ({fmt}) whose columns are col1..colD; remove `{key}` (to embed some "
                    "columns only, store just those)."
                )
    if fmt not in ("zarr", "hdf5") and cfg.dataset is not None:
        raise ConfigError(
            f"`[input] dataset` only applies to zarr groups and HDF5 files, but '{cfg.path}' is "
            f"{fmt} input; remove `dataset`."
        )


def _check_path(path: Path, fmt: str) -> None:
    if not path.exists():
        raise InputError(f"Input file '{path}' not found; check `[input] path`.")
    if fmt == "zarr":
        if not path.is_dir():
            raise InputError(
                f"Input '{path}' is a file, but a zarr store is a directory; check `[input] path` "
                "and `[input] format`."
            )
        if not os.access(path, os.R_OK | os.X_OK):
            raise InputError(
                f"Input store '{path}' cannot be read (permission denied); make it readable."
            )
        return
    if path.is_dir():
        raise InputError(
            f"Input path '{path}' is a directory, but {fmt} input is a single file; point "
            "`[input] path` at the file itself."
        )
    if not os.access(path, os.R_OK):
        raise InputError(
            f"Input file '{path}' cannot be read (permission denied); make it readable "
            "(e.g. chmod u+r) or copy it somewhere readable."
        )
    if path.stat().st_size == 0:
        # Said plainly, rather than as each format's "damaged" or "not a ... file".
        raise InputError(
            f"Input file '{path}' is empty input (0 bytes); check `[input] path` or write the "
            "file again."
        )


def _check_value_dtype(dtype: Any, where: str) -> np.dtype:
    dtype = np.dtype(dtype)
    if dtype.kind in "iu" or (dtype.kind == "f" and dtype.itemsize in (2, 4, 8)):
        return dtype
    kind = {"b": "boolean", "c": "complex", "O": "Python object", "U": "text", "S": "bytes",
            "V": "structured/record", "M": "date-time", "m": "time-delta"}.get(dtype.kind, "")
    raise InputError(
        f"{where} holds {kind + ' ' if kind else ''}values of dtype {dtype}; eigenstream "
        "embeds integer or float16/float32/float64 numbers only; convert the data first."
    )


# ----------------------------------------------------------------------------------------
# array inputs


class _ArraySource(RowSource):
    """A 2-D array that can be sliced by row ranges (memory map, zarr or HDF5 dataset)."""

    _array: Any

    def _setup(self, array: Any, where: str) -> None:
        shape = tuple(int(s) for s in (array.shape or ()))
        if len(shape) != 2:
            fix = "x.reshape(-1, 1) for a single feature" if len(shape) == 1 else (
                "x.reshape(len(x), -1) to flatten each row"
            )
            raise InputError(
                f"{where} has shape {shape}, but eigenstream needs a 2-D array of rows x "
                f"columns; reshape it (e.g. {fix})."
            )
        if 0 in shape:
            raise InputError(
                f"{where} is empty input: shape {shape}; it needs at least one row and one column."
            )
        self.dtype = _check_value_dtype(array.dtype, where)
        self._array = array
        self._where = where
        self.n_rows = shape[0]
        self.columns = tuple(f"col{j + 1}" for j in range(shape[1]))
        self._extra_index = {}
        for name in self.extra_names:
            if name not in self.columns:
                raise InputError(
                    f"Column '{name}' (asked for as a pass-through column, e.g. "
                    f"`[map] color_column`) is not in {where}; an array input has columns "
                    f"col1..col{shape[1]}."
                )
            self._extra_index[name] = self.columns.index(name)

    def _read(self, a: int, b: int) -> np.ndarray:
        try:
            return np.asarray(self._array[a:b])
        except (OSError, ValueError, KeyError, RuntimeError) as exc:
            raise InputError(
                f"Cannot read rows {a + 1}-{b} of {self._where} ({exc}); the file may be "
                "truncated or damaged."
            ) from None

    def _blocks(self, block_rows: int, start: int) -> Iterator[RowBlock]:
        out_dtype = self.block_dtype
        for a in range(start, self.n_rows, block_rows):
            b = min(a + block_rows, self.n_rows)
            raw = self._read(a, b)
            extra = {name: raw[:, j].copy() for name, j in self._extra_index.items()}
            values = np.ascontiguousarray(raw, dtype=out_dtype)
            yield RowBlock(start=a, values=values, ids=None, extra=extra)


class _NpySource(_ArraySource):
    format = "npy"

    def __init__(self, path: Path, cfg: InputConfig, extra_columns: tuple[str, ...]):
        super().__init__(path, cfg, extra_columns)
        damaged = (
            f"Input file '{path}' is a truncated or damaged .npy file; write it again "
            "with numpy.save."
        )
        try:
            with open(path, "rb") as fh:
                version = np.lib.format.read_magic(fh)
                read_header = {
                    (1, 0): np.lib.format.read_array_header_1_0,
                    (2, 0): np.lib.format.read_array_header_2_0,
                }.get(version)
                header = read_header(fh) if read_header else None
                offset = fh.tell()
        except (ValueError, OSError, EOFError):
            raise InputError(damaged) from None
        where = f"Input file '{path}'"
        if header is not None:
            shape, _, dtype = header
            # Check the declared contents before mapping, so object arrays and
            # truncated files get a precise message rather than a mmap failure.
            _check_value_dtype(dtype, where)
            if len(shape) == 2 and 0 not in shape:
                if path.stat().st_size < offset + math.prod(shape) * np.dtype(dtype).itemsize:
                    raise InputError(damaged)
            if len(shape) != 2 or 0 in shape:
                self._setup(SimpleNamespace(shape=shape, dtype=dtype), where)
        try:
            array = np.load(path, mmap_mode="r", allow_pickle=False)
        except (ValueError, OSError, EOFError):
            raise InputError(damaged) from None
        if not isinstance(array, np.ndarray):
            raise InputError(
                f"Input file '{path}' is a .npz archive, not a .npy array; save one array "
                "with numpy.save, or set `[input] path` to such a file."
            )
        self._setup(array, where)


def _pick_dataset(path: Path, kind: str, names: list[str], wanted: str | None) -> str:
    """Choose the array named ``[input] dataset`` among those in a container."""
    listing = ", ".join(f"'{n}'" for n in names) or "none"
    if wanted is None:
        if len(names) == 1:
            return names[0]
        if not names:
            raise InputError(f"Input '{path}' is an {kind} holding no arrays (empty input).")
        raise ConfigError(
            f"Input '{path}' is an {kind} holding several arrays ({listing}); set "
            "`[input] dataset` to the one to embed."
        )
    name = wanted.strip("/")
    if name not in names:
        raise InputError(
            f"Input '{path}' has no array named '{wanted}' (`[input] dataset`); available "
            f"arrays: {listing}."
        )
    return name


class _ZarrSource(_ArraySource):
    format = "zarr"

    def __init__(self, path: Path, cfg: InputConfig, extra_columns: tuple[str, ...]):
        super().__init__(path, cfg, extra_columns)
        import zarr

        try:
            node = zarr.open_array(str(path), mode="r")
        except (ValueError, OSError, KeyError):
            # Not an array at the root: either a group or not a zarr store at all.
            try:
                node = zarr.open_group(str(path), mode="r")
            except (ValueError, OSError, KeyError):
                raise InputError(
                    f"Input '{path}' is not a zarr store (no zarr array or group found); check "
                    "`[input] path` and `[input] format`."
                ) from None
        if isinstance(node, zarr.Array):
            if cfg.dataset is not None:
                raise ConfigError(
                    f"`[input] dataset = '{cfg.dataset}'` was given, but '{path}' is a single "
                    "zarr array, not a group; remove `dataset`."
                )
            self._setup(node, f"Input '{path}'")
            return
        names = sorted(
            name for name, obj in node.members(max_depth=None) if isinstance(obj, zarr.Array)
        )
        name = _pick_dataset(path, "zarr group", names, cfg.dataset)
        self.dataset = name
        self._setup(node[name], f"Array '{name}' in '{path}'")

    def missing_rows(self) -> list[tuple[int, int]]:
        """Row ranges (0-based, stop exclusive) whose chunks are not stored.

        zarr reads an absent chunk as the fill value without an error, and by default does
        not store chunks equal to the fill value, so an absent chunk may be lost or may be
        legitimately all fill value; the caller reports it rather than refusing.
        """
        arr = self._array
        root = getattr(arr.store, "root", None)
        if root is None or getattr(arr.metadata, "zarr_format", 3) != 3:
            return []
        rows, cols = arr.chunks[0], arr.chunks[1]
        n_col_chunks = -(-arr.shape[1] // cols)
        out = []
        for i in range(-(-arr.shape[0] // rows)):
            for j in range(n_col_chunks):
                key = Path(root) / arr.path / "c" / str(i) / str(j)
                if not key.is_file():
                    out.append((i * rows, min((i + 1) * rows, arr.shape[0])))
                    break
        return out


class _Hdf5Source(_ArraySource):
    format = "hdf5"
    _file = None

    def __init__(self, path: Path, cfg: InputConfig, extra_columns: tuple[str, ...]):
        super().__init__(path, cfg, extra_columns)
        import h5py

        if not h5py.is_hdf5(path):
            raise InputError(
                f"Input file '{path}' is not an HDF5 file (or is damaged); check `[input] path` "
                "and `[input] format`."
            )
        try:
            self._file = h5py.File(path, "r")
        except OSError as exc:
            raise InputError(f"Cannot open HDF5 file '{path}' ({exc}); it may be damaged.") from None
        try:
            names: list[str] = []
            self._file.visititems(
                lambda name, obj: names.append(name) if isinstance(obj, h5py.Dataset) else None
            )
            name = _pick_dataset(path, "HDF5 file", sorted(names), cfg.dataset)
            self.dataset = name
            self._setup(self._file[name], f"Dataset '{name}' in '{path}'")
        except BaseException:
            self.close()
            raise

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


# ----------------------------------------------------------------------------------------
# table inputs


def _choose_columns(
    path: Path,
    names: Sequence[str],
    kinds: dict[str, str],
    cfg: InputConfig,
    extra: Sequence[str],
) -> tuple[str, ...]:
    """Apply the column rules; ``kinds`` maps a name to "numeric", "empty" or a type name."""
    available = ", ".join(f"'{n}'" for n in names)

    def check_present(name: str, what: str) -> None:
        if name not in names:
            raise InputError(
                f"Column '{name}' ({what}) is not in '{path}'; available columns: {available}."
            )

    if len(set(names)) != len(names):
        dups = sorted({n for n in names if list(names).count(n) > 1})
        raise InputError(
            f"'{path}' has more than one column named {', '.join(repr(d) for d in dups)}; "
            "give every column a distinct name."
        )
    if cfg.id_column is not None:
        check_present(cfg.id_column, "`[input] id_column`")
    for name in extra:
        check_present(name, "a pass-through column, e.g. `[map] color_column`")
    for name in cfg.exclude_columns or ():
        check_present(name, "`[input] exclude_columns`")

    if cfg.columns is not None:
        for name in cfg.columns:
            check_present(name, "`[input] columns`")
        if len(set(cfg.columns)) != len(cfg.columns):
            raise ConfigError("`[input] columns` names a column twice; list each column once.")
        clash = set(cfg.columns) & ({cfg.id_column} | set(cfg.exclude_columns or ()))
        if clash:
            raise ConfigError(
                f"Column '{sorted(clash)[0]}' is listed in `[input] columns` and also as "
                "`id_column` or in `exclude_columns`; keep it in one place only."
            )
        chosen = tuple(cfg.columns)
        for name in chosen:
            if kinds[name] == "empty":
                raise InputError(
                    f"Column '{name}' in '{path}' is empty (no value in any row); remove it "
                    "from `[input] columns`."
                )
            if kinds[name] != "numeric":
                raise InputError(
                    f"Column '{name}' in '{path}' holds {kinds[name]} values, not numbers; "
                    "remove it from `[input] columns`."
                )
        return chosen

    skip = {cfg.id_column, *(cfg.exclude_columns or ()), *extra}
    for name in names:
        if name not in skip and kinds[name] == "empty":
            raise InputError(
                f"Column '{name}' in '{path}' is empty (no value in any row); add it to "
                "`[input] exclude_columns` or fill it in."
            )
    chosen = tuple(n for n in names if n not in skip and kinds[n] == "numeric")
    if not chosen:
        raise InputError(
            f"'{path}' has no numeric columns left to embed (columns: {available}); check "
            "`[input] columns` and `[input] exclude_columns`."
        )
    return chosen


def _rebatch(
    pieces: Iterator[tuple[np.ndarray, np.ndarray | None, dict[str, np.ndarray]]],
    block_rows: int,
    start: int,
) -> Iterator[RowBlock]:
    """Cut a stream of arbitrarily sized row pieces into blocks of ``block_rows`` rows."""
    pending: list[tuple[np.ndarray, np.ndarray | None, dict[str, np.ndarray]]] = []
    have = 0
    pos = start

    def joined():
        vals = np.concatenate([p[0] for p in pending]) if len(pending) > 1 else pending[0][0]
        ids = None
        if pending[0][1] is not None:
            ids = np.concatenate([p[1] for p in pending]) if len(pending) > 1 else pending[0][1]
        extra = {
            k: np.concatenate([p[2][k] for p in pending]) if len(pending) > 1 else v
            for k, v in pending[0][2].items()
        }
        return vals, ids, extra

    for piece in pieces:
        if len(piece[0]) == 0:
            continue
        pending.append(piece)
        have += len(piece[0])
        if have < block_rows:
            continue
        vals, ids, extra = joined()
        cut = 0
        while have - cut >= block_rows:
            sl = slice(cut, cut + block_rows)
            yield RowBlock(
                start=pos,
                values=np.ascontiguousarray(vals[sl]),
                ids=None if ids is None else ids[sl],
                extra={k: v[sl] for k, v in extra.items()},
            )
            pos += block_rows
            cut += block_rows
        rest = slice(cut, None)
        pending = [(vals[rest], None if ids is None else ids[rest],
                    {k: v[rest] for k, v in extra.items()})] if cut < have else []
        have -= cut
    if have:
        vals, ids, extra = joined()
        yield RowBlock(start=pos, values=np.ascontiguousarray(vals), ids=ids, extra=extra)


def _arrow_kind(arrow_type: Any) -> str:
    import pyarrow as pa

    if pa.types.is_null(arrow_type):
        return "empty"
    if pa.types.is_integer(arrow_type) or pa.types.is_floating(arrow_type):
        return "numeric"
    if pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type):
        return "text"
    return f"{arrow_type}"


def _columns_to_matrix(batch: Any, names: Sequence[str], dtype: np.dtype) -> np.ndarray:
    out = np.empty((batch.num_rows, len(names)), dtype=dtype)
    for j, name in enumerate(names):
        # Nulls come out as NaN (integer columns with nulls come out as float64).
        out[:, j] = batch.column(name).to_numpy(zero_copy_only=False)
    return out


def _column_values(batch: Any, name: str) -> np.ndarray:
    return batch.column(name).to_numpy(zero_copy_only=False)


class _ParquetSource(RowSource):
    format = "parquet"
    _file = None

    def __init__(self, path: Path, cfg: InputConfig, extra_columns: tuple[str, ...]):
        super().__init__(path, cfg, extra_columns)
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            self._file = pq.ParquetFile(path)
        except (pa.ArrowException, OSError) as exc:
            raise InputError(
                f"Input file '{path}' is not a Parquet file or is damaged ({exc}); check "
                "`[input] path` and `[input] format`."
            ) from None
        try:
            self._setup(cfg)
        except BaseException:
            self.close()
            raise

    def _setup(self, cfg: InputConfig) -> None:
        meta = self._file.metadata
        schema = self._file.schema_arrow
        names = list(schema.names)
        self.n_rows = int(meta.num_rows)
        kinds = {name: _arrow_kind(schema.field(name).type) for name in names}
        for name in names:
            if kinds[name] == "numeric" and self.n_rows and self._null_count(name) == self.n_rows:
                kinds[name] = "empty"
        self.columns = _choose_columns(self.path, names, kinds, cfg, self.extra_names)
        if self.n_rows == 0:
            raise InputError(f"Input file '{self.path}' is empty input: it holds no rows.")
        where = f"Columns of '{self.path}'"
        dtypes = [_check_value_dtype(schema.field(n).type.to_pandas_dtype(), where)
                  for n in self.columns]
        self.dtype = np.result_type(*dtypes)
        self.id_name = cfg.id_column
        ends = np.cumsum([meta.row_group(g).num_rows for g in range(meta.num_row_groups)])
        self._group_ends = ends

    def _null_count(self, name: str) -> int | None:
        """Nulls in a column according to the row-group statistics (None if unknown)."""
        meta = self._file.metadata
        index = self._file.schema_arrow.get_field_index(name)
        total = 0
        for g in range(meta.num_row_groups):
            group = meta.row_group(g)
            if index >= group.num_columns:
                return None
            stats = group.column(index).statistics
            if stats is None or not stats.has_null_count:
                return None
            total += stats.null_count
        return total

    def _blocks(self, block_rows: int, start: int) -> Iterator[RowBlock]:
        if start >= self.n_rows:
            return iter(())
        first = int(np.searchsorted(self._group_ends, start, side="right"))
        skip = start - (int(self._group_ends[first - 1]) if first else 0)
        return _rebatch(self._pieces(block_rows, first, skip), block_rows, start)

    def _pieces(self, block_rows: int, first: int, skip: int):
        import pyarrow as pa

        wanted = list(dict.fromkeys([*self.columns, *(
            [self.id_name] if self.id_name else []), *self.extra_names]))
        groups = list(range(first, len(self._group_ends)))
        out_dtype = self.block_dtype
        try:
            for batch in self._file.iter_batches(
                batch_size=block_rows, row_groups=groups, columns=wanted
            ):
                cut = min(skip, batch.num_rows)
                skip -= cut
                if batch.num_rows > cut:
                    yield _batch_parts(batch.slice(cut), self, out_dtype)
        except (pa.ArrowException, OSError) as exc:
            raise InputError(
                f"Cannot read '{self.path}' ({exc}); the Parquet file may be truncated or damaged."
            ) from None

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


# --- CSV -------------------------------------------------------------------------------


def _looks_numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return "_" not in text


@dataclass
class _CsvLayout:
    """What the fast byte pass learnt about a CSV file."""

    lines: int  # non-empty lines, header included
    simple: bool  # no quotes in data, blank lines or bare CR: row r sits on line r + 2


def _scan_csv_bytes(path: Path) -> _CsvLayout:
    """Count non-empty lines with a vectorised pass over the raw bytes."""
    lines = blanks = trailing = crlf = cr_total = 0
    quoted = False
    header_end = None  # position of the header's newline
    last_nl = -1  # position of the previous newline
    prev_byte = -1  # last byte of the previous chunk
    offset = 0
    with open(path, "rb") as fh:
        while chunk := fh.read(CSV_COUNT_BYTES):
            buf = np.frombuffer(chunk, dtype=np.uint8)
            cr_total += int(np.count_nonzero(buf == 13))
            nl = np.flatnonzero(buf == 10)
            if header_end is None and nl.size:
                header_end = int(nl[0]) + offset
            # Quotes in the header only are harmless; quotes in data may hide newlines.
            body = buf[max(0, header_end + 1 - offset):] if header_end is not None else buf[:0]
            quoted = quoted or bool(np.any(body == ord('"')))
            if nl.size:
                before = np.where(nl > 0, buf[np.maximum(nl - 1, 0)], prev_byte)
                starts = np.concatenate(([last_nl], nl[:-1] + offset))
                length = nl + offset - starts - 1
                has_cr = before == 13
                blank = (length == 0) | ((length == 1) & has_cr)
                crlf += int(np.count_nonzero(has_cr))
                blanks += int(np.count_nonzero(blank))
                filled = np.flatnonzero(~blank)
                trailing = (
                    trailing + int(blank.size) if filled.size == 0
                    else int(blank.size) - 1 - int(filled[-1])
                )
                lines += int(nl.size)
                last_nl = int(nl[-1]) + offset
            prev_byte = int(buf[-1])
            offset += len(chunk)
    if offset - 1 > last_nl:  # a last line without a final newline
        lines += 1
        trailing = 0
    # Blank lines at the very end do not move any row, blank lines between rows do.
    simple = not quoted and blanks == trailing and cr_total == crlf
    return _CsvLayout(lines=lines - blanks, simple=simple)


_CONVERSION = re.compile(r"In CSV column #(\d+): CSV conversion error to (\w+): invalid value '(.*)'",
                         re.S)
_RAGGED = re.compile(r"Expected (\d+) columns, got (\d+)")


class _CsvSource(RowSource):
    format = "csv"

    def __init__(self, path: Path, cfg: InputConfig, extra_columns: tuple[str, ...]):
        super().__init__(path, cfg, extra_columns)
        import pyarrow as pa
        import pyarrow.csv as pacsv

        self._pa, self._pacsv = pa, pacsv
        if path.stat().st_size == 0:
            raise InputError(f"Input file '{path}' is empty input: no header and no rows.")
        with open(path, "rb") as fh:
            head = fh.readline(1 << 20)
        self._delimiter = next((d for d in (",", "\t", ";") if d.encode() in head), ",")
        layout = _scan_csv_bytes(path)
        self._simple = layout.simple

        first, schema = self._first_batch()
        names = list(schema.names)
        self._names = names
        if names and all(_looks_numeric(n) for n in names):
            shown = head[:60].decode(errors="replace").strip()
            raise InputError(
                f"The first line of '{path}' looks like data ({shown!r}), but CSV input needs "
                "a header row naming the columns; add one."
            )
        self.n_rows = layout.lines - 1 if layout.simple else self._count_rows(names[0])
        if self.n_rows <= 0:
            raise InputError(f"Input file '{path}' is empty input: a header but no rows.")
        kinds = {name: _arrow_kind(schema.field(name).type) for name in names}
        self.columns = self._choose(cfg, names, kinds, first)
        self.dtype = np.dtype(np.float64)
        self.id_name = cfg.id_column
        # Later rows are converted to the types inferred from the first batch, except
        # features, which are always parsed as float64 (integers included).
        types = {name: pa.float64() for name in self.columns}
        for name in [*([self.id_name] if self.id_name else []), *self.extra_names]:
            if name in types:
                continue
            inferred = schema.field(name).type
            if kinds[name] != "numeric":
                types[name] = pa.string()
            else:  # numeric but empty in the first batch: no inferred type to keep
                types[name] = pa.float64() if pa.types.is_null(inferred) else inferred
        self._types = types

    # -- reading helpers

    def _open(self, *, include=None, types=None, skip_rows: int = 0):
        pacsv = self._pacsv
        read = pacsv.ReadOptions(block_size=CSV_READ_BYTES, skip_rows_after_names=skip_rows)
        parse = pacsv.ParseOptions(delimiter=self._delimiter)
        convert = pacsv.ConvertOptions(
            include_columns=include or [], column_types=types or {}, strings_can_be_null=True
        )
        try:
            return pacsv.open_csv(
                self.path, read_options=read, parse_options=parse, convert_options=convert
            )
        except self._pa.ArrowException as exc:
            raise self._translate(exc) from None

    def _stream(self, reader) -> Iterator[Any]:
        try:
            yield from reader
        except self._pa.ArrowException as exc:
            raise self._translate(exc) from None

    def _first_batch(self):
        reader = self._open()
        try:
            first = next(iter(self._stream(reader)), None)
        finally:
            reader.close()
        return first, reader.schema

    def _count_rows(self, name: str) -> int:
        reader = self._open(include=[name], types={name: self._pa.string()})
        return sum(batch.num_rows for batch in self._stream(reader))

    def _choose(self, cfg: InputConfig, names, kinds, first) -> tuple[str, ...]:
        explicit = set(cfg.columns or ())
        skip = {cfg.id_column, *(cfg.exclude_columns or ()), *self.extra_names}
        for name in names:
            # A column with no value in the first batch may still hold values further
            # down, so look at the whole column before calling it empty or numeric.
            if kinds[name] == "empty" and (name in explicit or cfg.columns is None):
                kinds[name] = self._classify_column(name)
        for name in names:
            candidate = name in explicit or (cfg.columns is None and name not in skip)
            if kinds[name] == "text" and candidate and first is not None:
                self._check_text_column(name, first, explicit=name in explicit)
        return _choose_columns(self.path, names, kinds, cfg, self.extra_names)

    def _check_text_column(self, name: str, first: Any, *, explicit: bool) -> None:
        """Refuse a column of numbers holding some text, naming the first text cell.

        Text among numbers is a typo rather than a label column, so it is reported
        instead of the column being silently left out.
        """
        cells = first.column(name).to_pylist()
        flags = [(row, _looks_numeric(v)) for row, v in enumerate(cells) if v is not None]
        n_numeric = sum(ok for _, ok in flags)
        if n_numeric == 0 or (not explicit and 2 * n_numeric < len(flags)):
            return  # a text column: refused if named in `columns`, else not a feature
        bad = next((row for row, ok in flags if not ok), None)
        if bad is not None:
            raise self._text_error(name, bad, cells[bad])

    def _classify_column(self, name: str) -> str:
        import pyarrow.compute as pc

        pa = self._pa
        reader = self._open(include=[name], types={name: pa.string()})
        seen = False
        for batch in self._stream(reader):
            col = batch.column(0).drop_null()
            if len(col) == 0:
                continue
            seen = True
            try:
                pc.cast(col, pa.float64())
            except pa.ArrowInvalid:
                return "text"
        return "numeric" if seen else "empty"

    # -- errors

    def _line_of_row(self, row: int) -> int | None:
        """1-based line on which 0-based data row ``row`` starts."""
        if self._simple:
            return row + 2
        with open(self.path, newline="", encoding="utf-8-sig", errors="replace") as fh:
            reader = csv.reader(fh, delimiter=self._delimiter)
            seen = -1  # the header is row -1
            start = 1
            for fields in reader:
                if fields:
                    if seen == row:
                        return start
                    seen += 1
                start = reader.line_num + 1
        return None

    def _where(self, row: int) -> str:
        line = self._line_of_row(row)
        return f"row {row + 1}" + (f" (line {line})" if line is not None else "")

    def _text_error(self, name: str, row: int | None, text: str) -> InputError:
        at = f" at {self._where(row)}" if row is not None else ""
        if name == getattr(self, "id_name", None) or name in self.extra_names:
            return InputError(
                f"Column '{name}' of '{self.path}' holds '{text}'{at}, but its first rows "
                "looked like numbers; make the column consistent (all numbers or all text)."
            )
        return InputError(
            f"Column '{name}' of '{self.path}' holds the text '{text}'{at}, which is not a "
            "number; fix that value, or leave the column out with `[input] exclude_columns` "
            "(or `[input] columns`)."
        )

    def _translate(self, exc: Exception) -> InputError:
        message = str(exc)
        match = _CONVERSION.search(message)
        if match:
            index, text = int(match.group(1)), match.group(3)
            name = self._names[index] if index < len(getattr(self, "_names", ())) else f"#{index}"
            return self._text_error(name, self._find_text(name, text), text)
        match = _RAGGED.search(message)
        if match:
            return self._ragged_error(int(match.group(1)))
        if "Empty CSV file" in message:
            return InputError(f"Input file '{self.path}' is empty input: no header and no rows.")
        return InputError(f"Cannot parse CSV file '{self.path}': {message}.")

    def _find_text(self, name: str, text: str) -> int | None:
        """0-based row of the first cell of ``name`` equal to ``text``."""
        import pyarrow.compute as pc

        pa = self._pa
        try:
            reader = self._pacsv.open_csv(
                self.path,
                read_options=self._pacsv.ReadOptions(block_size=CSV_READ_BYTES),
                parse_options=self._pacsv.ParseOptions(delimiter=self._delimiter),
                convert_options=self._pacsv.ConvertOptions(
                    include_columns=[name], column_types={name: pa.string()}
                ),
            )
            offset = 0
            for batch in reader:
                hits = pc.equal(batch.column(0), text).fill_null(False)
                index = pc.index(hits, True).as_py()
                if index >= 0:
                    return offset + index
                offset += batch.num_rows
        except pa.ArrowException:
            return None
        return None

    def _ragged_error(self, expected: int) -> InputError:
        with open(self.path, newline="", encoding="utf-8-sig", errors="replace") as fh:
            reader = csv.reader(fh, delimiter=self._delimiter)
            start = 1
            for fields in reader:
                if fields and len(fields) != expected:
                    return InputError(
                        f"Line {start} of '{self.path}' has {len(fields)} fields but the header "
                        f"has {expected}; every line needs the same number of "
                        f"{self._delimiter!r}-separated fields (look for a stray or missing "
                        "delimiter or an unclosed quote)."
                    )
                start = reader.line_num + 1
        return InputError(
            f"A line of '{self.path}' does not have the header's {expected} fields; every line "
            "needs the same number of fields."
        )

    # -- blocks

    def _blocks(self, block_rows: int, start: int) -> Iterator[RowBlock]:
        if start >= self.n_rows:
            return iter(())
        return _rebatch(self._pieces(start), block_rows, start)

    def _pieces(self, start: int):
        include = list(self._types)
        # Arrow's row skipping counts blank lines as rows, so it is only used when the
        # file has none; otherwise rows before ``start`` are parsed and dropped.
        fast_skip = start if self._simple else 0
        skip = start - fast_skip
        reader = self._open(include=include, types=self._types, skip_rows=fast_skip)
        out_dtype = self.block_dtype
        seen = fast_skip
        for batch in self._stream(reader):
            seen += batch.num_rows
            cut = min(skip, batch.num_rows)
            skip -= cut
            if batch.num_rows > cut:
                yield _batch_parts(batch.slice(cut), self, out_dtype)
        if seen != self.n_rows:
            raise InputError(
                f"'{self.path}' changed while being read or could not be counted: expected "
                f"{self.n_rows} rows but parsed {seen}; make sure no other program writes it."
            )


# ----------------------------------------------------------------------------------------
# bad values


def _batch_parts(batch, source, out_dtype):
    """(values, ids, extra columns) of one Arrow record batch of a table source."""
    return (
        _columns_to_matrix(batch, source.columns, out_dtype),
        _column_values(batch, source.id_name) if source.id_name else None,
        {name: _column_values(batch, name) for name in source.extra_names},
    )


def bad_value_mask(values: Any) -> np.ndarray:
    """Return a ``(m,)`` boolean mask of the rows of ``values`` holding NaN or +-inf."""
    values = np.asarray(values)
    if values.dtype.kind in "iub":
        return np.zeros(len(values), dtype=bool)
    finite = np.isfinite(values)
    if values.ndim == 1:
        return ~finite
    return ~finite.all(axis=1)


def describe_bad_value(
    block: RowBlock, columns: Sequence[str], path: str | os.PathLike, *, fmt: str | None = None
) -> str:
    """One-line message about the first NaN or infinite value in ``block``.

    Parameters
    ----------
    block : RowBlock
        A block holding at least one bad value.
    columns : sequence of str
        Names of the block's columns.
    path : path-like
        The input, named in the message.
    fmt : str, optional
        Input format; taken from the suffix of ``path`` when None. For CSV the line
        number (row + 1, for the header) is added.

    Raises
    ------
    ValueError
        If the block holds no bad value.
    """
    rows = np.flatnonzero(bad_value_mask(block.values))
    if rows.size == 0:
        raise ValueError("describe_bad_value: the block holds no NaN or infinite value.")
    i = int(rows[0])
    row_values = np.atleast_1d(block.values[i])
    j = int(np.flatnonzero(~np.isfinite(row_values))[0])
    value = float(row_values[j])
    text = "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if fmt is None:
        fmt = {".csv": "csv", ".txt": "csv"}.get(Path(path).suffix.lower(), "")
    row = block.start + i + 1
    where = f"row {row}" + (f" (line {row + 1})" if fmt == "csv" else "")
    if block.ids is not None:
        ident = block.ids[i]
        where += f" (id {ident.item() if isinstance(ident, np.generic) else ident!r})"
    name = columns[j] if j < len(columns) else f"col{j + 1}"
    note = " (an empty or NA cell reads as nan)" if fmt == "csv" and text == "nan" else ""
    return (
        f"Bad value in '{path}' at {where}, column '{name}': {text}{note}; {_DROP_HINT}."
    )

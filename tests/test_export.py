"""Coordinate export: every format reads back to the written values, ids included.

References: the exported array itself, read back with independent readers (numpy.load,
pyarrow.parquet, pyarrow.csv) as well as with eigenstream's own input readers.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
import zarr

from eigenstream.config import InputConfig
from eigenstream.errors import ConfigError
from eigenstream.io.export import export_coordinates
from eigenstream.io.readers import open_source

N, K = 29, 3


@pytest.fixture(scope="module")
def coords():
    rng = np.random.default_rng(77)
    return rng.standard_normal((N, K)) * np.array([1.0, 1e-9, 1e8])


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("block_rows", [1, 4, N, 100])
def test_npy_round_trip(tmp_path, coords, dtype, block_rows):
    y = coords.astype(dtype)
    out = export_coordinates(y, tmp_path / "emb.npy", block_rows=block_rows, ids=np.arange(N))
    assert out == tmp_path / "emb.npy"
    back = np.load(out)  # reference reader: numpy
    assert back.dtype == dtype
    np.testing.assert_array_equal(back, y)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["emb.npy"]  # no temp file left


@pytest.mark.parametrize("ids", [None, "int", "str"])
def test_parquet_round_trip_with_one_row_group_per_block(tmp_path, coords, ids):
    id_values = {None: None, "int": np.arange(1000, 1000 + N),
                 "str": np.array([f"r{i}" for i in range(N)], dtype=object)}[ids]
    out = export_coordinates(coords, tmp_path / "emb.parquet", ids=id_values, block_rows=8)
    pf = pq.ParquetFile(out)  # reference reader: pyarrow.parquet
    assert pf.metadata.num_row_groups == math.ceil(N / 8)
    table = pf.read()
    names = ["component_1", "component_2", "component_3"]
    assert table.column_names == ([] if ids is None else ["id"]) + names
    got = np.column_stack([table[name].to_numpy() for name in names])
    np.testing.assert_array_equal(got, coords)
    if ids is not None:
        assert table["id"].to_pylist() == id_values.tolist()
        # And eigenstream's own reader gets the same ids and values back.
        with open_source(InputConfig(path=str(out), id_column="id")) as source:
            block = next(source.blocks(N))
        assert block.ids.tolist() == id_values.tolist()
        np.testing.assert_array_equal(block.values, coords)


@pytest.mark.parametrize("ids", [None, "int", "str"])
def test_csv_round_trip(tmp_path, coords, ids):
    id_values = {None: None, "int": np.arange(N) * 3,
                 "str": [f"row, {i}" for i in range(N)]}[ids]  # a comma needs quoting
    out = export_coordinates(coords, tmp_path / "emb.csv", ids=id_values, id_name="key",
                             column_prefix="dim", block_rows=5)
    table = pacsv.read_csv(out)  # reference reader: pyarrow.csv
    names = ["dim_1", "dim_2", "dim_3"]
    assert table.column_names == ([] if ids is None else ["key"]) + names
    # Floats are written as the shortest text that reads back to the same double.
    got = np.column_stack([table[name].to_numpy() for name in names])
    np.testing.assert_array_equal(got, coords)
    with open_source(InputConfig(path=str(out), id_column="key" if ids else None)) as source:
        assert source.n_rows == N and source.columns == tuple(names)
        blocks = list(source.blocks(7))
    np.testing.assert_array_equal(np.concatenate([b.values for b in blocks]), coords)
    if ids is not None:
        assert np.concatenate([b.ids for b in blocks]).tolist() == list(id_values)


def test_csv_float32_round_trip(tmp_path, coords):
    y = coords.astype(np.float32)
    out = export_coordinates(y, tmp_path / "e.csv", block_rows=6)
    table = pacsv.read_csv(out)
    got = np.column_stack([table[c].to_numpy() for c in table.column_names])
    # Shortest float32 text parsed as a double, cast back to float32, is the same value.
    np.testing.assert_array_equal(got.astype(np.float32), y)


def test_zarr_array_as_source(tmp_path, coords):
    z = zarr.create_array(str(tmp_path / "c.zarr"), shape=coords.shape, dtype="f8", chunks=(6, K))
    z[:] = coords
    for name in ("z.npy", "z.parquet", "z.csv"):
        out = export_coordinates(z, tmp_path / name, block_rows=10)
        with open_source(InputConfig(path=str(out))) as source:
            np.testing.assert_array_equal(next(source.blocks(N)).values, coords)


def test_explicit_format_overrides_suffix(tmp_path, coords):
    out = export_coordinates(coords, tmp_path / "emb.data", fmt="parquet")
    np.testing.assert_array_equal(pq.read_table(out)["component_2"].to_numpy(), coords[:, 1])


def test_format_errors(tmp_path, coords):
    with pytest.raises(ConfigError, match="`--format`") as info:
        export_coordinates(coords, tmp_path / "emb.xlsx")
    assert "emb.xlsx" in str(info.value)
    with pytest.raises(ConfigError, match="`--format`"):
        export_coordinates(coords, tmp_path / "emb.csv", fmt="feather")
    assert list(tmp_path.iterdir()) == []


def test_argument_errors(tmp_path, coords):
    with pytest.raises(ValueError, match="ids"):
        export_coordinates(coords, tmp_path / "e.csv", ids=np.arange(N - 1))
    with pytest.raises(ValueError, match="2-D"):
        export_coordinates(coords[:, 0], tmp_path / "e.csv")


class _FailingCoords:
    """Row-sliceable coordinates whose second block cannot be read."""

    def __init__(self, values):
        self.values = values
        self.shape = values.shape
        self.dtype = values.dtype

    def __getitem__(self, rows):
        if rows.start > 0:
            raise OSError("disk went away")
        return self.values[rows]


@pytest.mark.parametrize("name", ["e.npy", "e.parquet", "e.csv"])
def test_failure_leaves_no_partial_output(tmp_path, coords, name):
    with pytest.raises(OSError, match="disk went away"):
        export_coordinates(_FailingCoords(coords), tmp_path / name, block_rows=10)
    assert list(tmp_path.iterdir()) == []
    # An existing file is left untouched by a failed export ...
    export_coordinates(coords[:5], tmp_path / name)
    before = (tmp_path / name).read_bytes()
    with pytest.raises(OSError):
        export_coordinates(_FailingCoords(coords), tmp_path / name, block_rows=10)
    assert (tmp_path / name).read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == [name]
    # ... and replaced by a successful one.
    export_coordinates(coords, tmp_path / name)
    with open_source(InputConfig(path=str(tmp_path / name))) as source:
        assert source.n_rows == N


def test_missing_parent_directory_is_created(tmp_path, coords):
    out = export_coordinates(coords, tmp_path / "a" / "b" / "e.npy")
    np.testing.assert_array_equal(np.load(out), coords)

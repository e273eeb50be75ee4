"""Chunked input readers: every format gives the same rows, and bad inputs give clear errors.

The reference for every value check is the array the test itself wrote with an
independent library (numpy.save, zarr, h5py, pyarrow.parquet, Python's csv text): a
reader is right when it gives back exactly what was stored.
"""

from __future__ import annotations

import os
import pickle

import h5py
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zarr

from eigenstream.config import InputConfig
from eigenstream.errors import ConfigError, InputError
from eigenstream.io import readers
from eigenstream.io.readers import (
    RowBlock,
    bad_value_mask,
    block_dtype,
    describe_bad_value,
    open_source,
)

N, D = 23, 3


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(20240611)
    # Mixed magnitudes so that text round trips are not trivially short decimals.
    return rng.standard_normal((N, D)) * np.array([1.0, 1e-7, 3e5])


def _csv_text(values, ids=None, labels=None, header=None, fmt=repr):
    header = header or ([*(["id"] if ids is not None else []),
                         *[f"x{j + 1}" for j in range(values.shape[1])],
                         *(["label"] if labels is not None else [])])
    lines = [",".join(header)]
    for i, row in enumerate(values):
        cells = [fmt(float(v)) for v in row]
        if ids is not None:
            cells.insert(0, str(ids[i]))
        if labels is not None:
            cells.append(labels[i])
        lines.append(",".join(cells))
    return "\n".join(lines) + "\n"


def _write_all(tmp_path, x):
    """Store ``x`` in every format; return {name: InputConfig}."""
    cfgs = {}
    np.save(tmp_path / "x.npy", x)
    cfgs["npy"] = InputConfig(path=str(tmp_path / "x.npy"))

    arr = zarr.create_array(str(tmp_path / "a.zarr"), shape=x.shape, dtype=x.dtype, chunks=(5, 2))
    arr[:] = x
    cfgs["zarr-array"] = InputConfig(path=str(tmp_path / "a.zarr"))

    group = zarr.open_group(str(tmp_path / "g.zarr"), mode="w")
    inner = group.create_group("runs").create_array("emb", shape=x.shape, dtype=x.dtype,
                                                     chunks=(4, 3))
    inner[:] = x
    group.create_array("other", shape=(4, 2), dtype="f8")
    cfgs["zarr-group"] = InputConfig(path=str(tmp_path / "g.zarr"), dataset="runs/emb")

    with h5py.File(tmp_path / "x.h5", "w") as fh:
        fh.create_dataset("features/x", data=x, chunks=(4, x.shape[1]))
        fh.create_dataset("meta", data=np.arange(5))
    cfgs["hdf5"] = InputConfig(path=str(tmp_path / "x.h5"), dataset="features/x")

    (tmp_path / "x.csv").write_text(_csv_text(x))
    cfgs["csv"] = InputConfig(path=str(tmp_path / "x.csv"))

    table = pa.table({f"x{j + 1}": x[:, j] for j in range(x.shape[1])})
    pq.write_table(table, tmp_path / "x.parquet", row_group_size=5)
    cfgs["parquet"] = InputConfig(path=str(tmp_path / "x.parquet"))
    return cfgs


def _collect(source, block_rows, start=0):
    blocks = list(source.blocks(block_rows, start=start))
    for b in blocks:
        assert isinstance(b, RowBlock)
        assert b.values.flags.c_contiguous
    return blocks


def _check_layout(blocks, block_rows, start, n):
    # Consecutive blocks of block_rows rows starting at `start`, the last one short.
    expected_starts = list(range(start, n, block_rows))
    assert [b.start for b in blocks] == expected_starts
    assert [len(b) for b in blocks] == [min(block_rows, n - s) for s in expected_starts]


FORMATS = ["npy", "zarr-array", "zarr-group", "hdf5", "csv", "parquet"]


@pytest.mark.parametrize("block_rows", [1, 7, N, N + 10])
@pytest.mark.parametrize("start", [0, 5, N - 1, N])
def test_every_format_gives_the_stored_float64_rows(tmp_path, data, block_rows, start):
    cfgs = _write_all(tmp_path, data)
    for name in FORMATS:
        with open_source(cfgs[name]) as source:
            assert source.n_rows == N and source.n_columns == D, name
            assert source.dtype == np.float64 and source.block_dtype == np.float64
            blocks = _collect(source, block_rows, start)
        _check_layout(blocks, block_rows, start, N)
        got = np.concatenate([b.values for b in blocks]) if blocks else np.empty((0, D))
        assert got.dtype == np.float64
        # Reference: the array written above. Python's repr(float) is the shortest
        # text that reads back to the same double (Python docs, floating point
        # tutorial), so even the CSV must match bit for bit.
        np.testing.assert_array_equal(got, data[start:], err_msg=name)


def test_column_names(tmp_path, data):
    cfgs = _write_all(tmp_path, data)
    for name in ("npy", "zarr-array", "zarr-group", "hdf5"):
        with open_source(cfgs[name]) as source:
            assert source.columns == ("col1", "col2", "col3")
            assert source.format == name.split("-")[0]
    for name in ("csv", "parquet"):
        with open_source(cfgs[name]) as source:
            assert source.columns == ("x1", "x2", "x3")


def test_float32_inputs_give_float32_blocks(tmp_path, data):
    x32 = data.astype(np.float32)
    cfgs = _write_all(tmp_path, x32)
    for name in ("npy", "zarr-array", "zarr-group", "hdf5", "parquet"):
        with open_source(cfgs[name]) as source:
            assert source.dtype == np.float32
            got = np.concatenate([b.values for b in source.blocks(6)])
        assert got.dtype == np.float32, name
        np.testing.assert_array_equal(got, x32, err_msg=name)  # reference: stored array
    # CSV text is parsed as float64; the float32 values written with 9 significant
    # digits come back within float32 rounding (IEEE 754: 9 digits identify a binary32).
    (tmp_path / "x32.csv").write_text(_csv_text(x32, fmt=lambda v: f"{v:.9g}"))
    with open_source(InputConfig(path=str(tmp_path / "x32.csv"))) as source:
        got = np.concatenate([b.values for b in source.blocks(4)])
    assert got.dtype == np.float64
    np.testing.assert_allclose(got, x32, rtol=np.finfo(np.float32).eps / 2, atol=0)
    np.testing.assert_array_equal(got.astype(np.float32), x32)


@pytest.mark.parametrize("dtype", [np.int8, np.int64, np.uint16, np.float16])
def test_integer_and_half_inputs_become_float32(tmp_path, dtype):
    x = (np.arange(30).reshape(10, 3) - 7).astype(dtype) if np.dtype(dtype).kind != "u" else (
        np.arange(30, dtype=dtype).reshape(10, 3))
    np.save(tmp_path / "i.npy", x)
    with open_source(InputConfig(path=str(tmp_path / "i.npy"))) as source:
        assert source.dtype == dtype
        got = np.concatenate([b.values for b in source.blocks(3)])
    assert got.dtype == np.float32
    np.testing.assert_array_equal(got, x.astype(np.float32))  # reference: numpy's cast


def test_block_dtype_rule():
    # The documented rule: float64 stays float64, everything else becomes float32.
    assert block_dtype(np.dtype("f8")) == np.float64
    for stored in ("f4", "f2", "i8", "i4", "u1"):
        assert block_dtype(np.dtype(stored)) == np.float32


def test_parquet_mixed_column_types_use_numpy_promotion(tmp_path):
    table = pa.table({"a": pa.array([1, 2, 3], pa.int32()),
                      "b": pa.array([0.5, 1.5, 2.5], pa.float32())})
    pq.write_table(table, tmp_path / "m.parquet")
    with open_source(InputConfig(path=str(tmp_path / "m.parquet"))) as source:
        # NumPy's promotion rule: int32 with float32 gives float64.
        assert source.dtype == np.result_type(np.int32, np.float32) == np.float64
        got = next(source.blocks(10)).values
    np.testing.assert_array_equal(got, [[1, 0.5], [2, 1.5], [3, 2.5]])


# ---------------------------------------------------------------- ids and extra columns


def _tables_with_ids(tmp_path, data, ids, labels):
    (tmp_path / "t.csv").write_text(_csv_text(data, ids=ids, labels=labels))
    table = pa.table({"id": ids, **{f"x{j + 1}": data[:, j] for j in range(D)}, "label": labels})
    pq.write_table(table, tmp_path / "t.parquet", row_group_size=4)
    return [str(tmp_path / "t.csv"), str(tmp_path / "t.parquet")]


@pytest.mark.parametrize("kind", ["int", "str"])
@pytest.mark.parametrize("start", [0, 9])
def test_ids_and_extra_columns_round_trip(tmp_path, data, kind, start):
    ids = list(range(100, 100 + N)) if kind == "int" else [f"s-{i:03d}" for i in range(N)]
    labels = [f"group{i % 3}" for i in range(N)]
    for path in _tables_with_ids(tmp_path, data, ids, labels):
        cfg = InputConfig(path=path, id_column="id")
        with open_source(cfg, extra_columns=["label"]) as source:
            assert source.columns == ("x1", "x2", "x3")  # id and label not features
            assert source.id_name == "id" and source.extra_names == ("label",)
            blocks = _collect(source, 5, start)
        _check_layout(blocks, 5, start, N)
        got_ids = np.concatenate([b.ids for b in blocks])
        assert got_ids.tolist() == ids[start:], path
        if kind == "int":
            assert got_ids.dtype.kind == "i"
        assert np.concatenate([b.extra["label"] for b in blocks]).tolist() == labels[start:]
        np.testing.assert_array_equal(np.concatenate([b.values for b in blocks]), data[start:])


def test_array_extra_column_by_name(tmp_path, data):
    np.save(tmp_path / "x.npy", data)
    with open_source(InputConfig(path=str(tmp_path / "x.npy")), extra_columns=["col2"]) as src:
        blocks = list(src.blocks(10))
    np.testing.assert_array_equal(np.concatenate([b.extra["col2"] for b in blocks]), data[:, 1])
    assert all(b.ids is None for b in blocks)


def test_columns_and_exclude_columns(tmp_path, data):
    ids = list(range(N))
    labels = ["a"] * N
    for path in _tables_with_ids(tmp_path, data, ids, labels):
        with open_source(InputConfig(path=path, columns=("x3", "x1"))) as source:
            assert source.columns == ("x3", "x1")
            got = np.concatenate([b.values for b in source.blocks(7)])
        np.testing.assert_array_equal(got, data[:, [2, 0]])
        # Without id_column the integer id column is numeric and would be a feature.
        with open_source(InputConfig(path=path)) as source:
            assert source.columns == ("id", "x1", "x2", "x3")
        with open_source(InputConfig(path=path, exclude_columns=("id", "x2"))) as source:
            assert source.columns == ("x1", "x3")


# ---------------------------------------------------------------- CSV specifics


def test_csv_many_small_batches_and_resume(tmp_path, data, monkeypatch):
    monkeypatch.setattr(readers, "CSV_READ_BYTES", 256)  # many Arrow batches
    (tmp_path / "x.csv").write_text(_csv_text(data))
    with open_source(InputConfig(path=str(tmp_path / "x.csv"))) as source:
        for block_rows, start in [(1, 0), (4, 3), (7, 17), (50, 11)]:
            blocks = _collect(source, block_rows, start)
            _check_layout(blocks, block_rows, start, N)
            np.testing.assert_array_equal(np.concatenate([b.values for b in blocks]),
                                          data[start:])


@pytest.mark.parametrize(
    "variant", ["crlf", "no-final-newline", "trailing-blank-lines", "blank-line-inside",
                "quoted-header", "tab"]
)
def test_csv_layout_variants(tmp_path, data, variant, monkeypatch):
    monkeypatch.setattr(readers, "CSV_READ_BYTES", 300)
    text = _csv_text(data)
    name = "v.csv"
    if variant == "crlf":
        text = text.replace("\n", "\r\n")
    elif variant == "no-final-newline":
        text = text.rstrip("\n")
    elif variant == "trailing-blank-lines":
        text += "\n\n"
    elif variant == "blank-line-inside":
        lines = text.split("\n")
        text = "\n".join(lines[:6] + [""] + lines[6:])
    elif variant == "quoted-header":
        text = text.replace("x1,x2,x3", '"x1","x2","x3"', 1)
    elif variant == "tab":
        text, name = text.replace(",", "\t"), "v.txt"
    (tmp_path / name).write_text(text, newline="")
    with open_source(InputConfig(path=str(tmp_path / name))) as source:
        assert source.n_rows == N
        assert source.columns == ("x1", "x2", "x3")
        for start in (0, 8):
            got = np.concatenate([b.values for b in source.blocks(6, start=start)])
            np.testing.assert_array_equal(got, data[start:])


def test_csv_quoted_line_breaks_are_counted_as_one_row(tmp_path):
    text = 'id,x,note\n1,0.5,"two\nlines"\n2,1.5,plain\n3,2.5,"a,b"\n'
    (tmp_path / "q.csv").write_text(text)
    cfg = InputConfig(path=str(tmp_path / "q.csv"), id_column="id")
    with open_source(cfg, extra_columns=["note"]) as source:
        assert source.n_rows == 3  # three records, four data lines
        block = next(source.blocks(10))
    np.testing.assert_array_equal(block.values[:, 0], [0.5, 1.5, 2.5])
    assert block.extra["note"].tolist() == ["two\nlines", "plain", "a,b"]


def test_csv_empty_cells_and_special_values_read_as_nonfinite(tmp_path):
    (tmp_path / "s.csv").write_text("a,b\n1,\n2,inf\n-inf,3\nnan,4\n")
    with open_source(InputConfig(path=str(tmp_path / "s.csv"))) as source:
        values = next(source.blocks(10)).values
    # IEEE 754 special values; an empty cell is a missing value -> NaN.
    assert np.isnan(values[0, 1]) and values[1, 1] == np.inf and values[2, 0] == -np.inf
    assert np.isnan(values[3, 0])
    assert bad_value_mask(values).tolist() == [True, True, True, True]


def test_csv_column_empty_at_first_but_filled_later(tmp_path, monkeypatch):
    monkeypatch.setattr(readers, "CSV_READ_BYTES", 64)
    rows = [f"{i},\n" for i in range(20)] + ["20,7.5\n"]
    (tmp_path / "late.csv").write_text("a,b\n" + "".join(rows))
    with open_source(InputConfig(path=str(tmp_path / "late.csv"))) as source:
        assert source.columns == ("a", "b")
        values = np.concatenate([b.values for b in source.blocks(8)])
    assert values[-1].tolist() == [20.0, 7.5] and np.isnan(values[:20, 1]).all()


# ---------------------------------------------------------------- bad values


def test_bad_value_mask_matches_isfinite():
    x = np.arange(12.0).reshape(4, 3)
    x[1, 2], x[3, 0] = np.nan, -np.inf
    # Reference: a row is bad when numpy.isfinite is False anywhere in it.
    assert bad_value_mask(x).tolist() == [False, True, False, True]
    assert bad_value_mask(x.astype(np.float32)).tolist() == [False, True, False, True]
    assert not bad_value_mask(np.ones((3, 2), dtype=np.int64)).any()


@pytest.mark.parametrize("bad, text", [(np.nan, "nan"), (np.inf, "inf"), (-np.inf, "-inf")])
def test_describe_bad_value_names_row_line_column(tmp_path, bad, text):
    values = np.zeros((6, 3))
    values[4, 1] = bad
    values[5, 0] = np.nan  # later bad values are not the one described
    block = RowBlock(start=10, values=values, ids=np.arange(100, 106), extra={})
    msg = describe_bad_value(block, ("u", "v", "w"), tmp_path / "cells.csv")
    # 0-based row 10 + 4 -> 1-based row 15; line 16 counting the header line.
    assert "cells.csv" in msg and "row 15" in msg and "line 16" in msg
    assert "'v'" in msg and f": {text}" in msg and "104" in msg
    assert 'on_bad_rows = "drop"' in msg and "fix the value" in msg
    assert "\n" not in msg
    msg = describe_bad_value(block, ("u", "v", "w"), tmp_path / "cells.parquet")
    assert "row 15" in msg and "line" not in msg


def test_describe_bad_value_on_clean_block_is_an_error():
    with pytest.raises(ValueError):
        describe_bad_value(RowBlock(0, np.ones((2, 2)), None, {}), ("a", "b"), "x.npy")


def test_bad_values_found_through_a_reader(tmp_path):
    (tmp_path / "b.csv").write_text("a,b\n1,2\n3,4\n5,\n7,8\n")
    with open_source(InputConfig(path=str(tmp_path / "b.csv"))) as source:
        blocks = list(source.blocks(2))
    block = next(b for b in blocks if bad_value_mask(b.values).any())
    msg = describe_bad_value(block, source.columns, source.path)
    assert "row 3" in msg and "line 4" in msg and "'b'" in msg  # the empty cell "5,"


# ---------------------------------------------------------------- blocks() arguments, misc


def test_blocks_argument_checks(tmp_path, data):
    np.save(tmp_path / "x.npy", data)
    with open_source(InputConfig(path=str(tmp_path / "x.npy"))) as source:
        with pytest.raises(ValueError):
            source.blocks(0)
        with pytest.raises(ValueError):
            source.blocks(5, start=N + 1)
        with pytest.raises(ValueError):
            source.blocks(5, start=-1)
        assert list(source.blocks(5, start=N)) == []


def test_source_pickles_by_reopening(tmp_path, data):
    cfgs = _write_all(tmp_path, data)
    for name in ("hdf5", "csv", "parquet"):
        with open_source(cfgs[name]) as source:
            clone = pickle.loads(pickle.dumps(source))
        with clone:
            np.testing.assert_array_equal(next(clone.blocks(N)).values, data)


# ---------------------------------------------------------------- errors: paths


def _raises(exc_type, cfg, *words, extra_columns=()):
    with pytest.raises(exc_type) as info:
        open_source(cfg, extra_columns=extra_columns)
    message = str(info.value)
    for word in words:
        assert word in message, (word, message)
    assert "\n" not in message
    return message


@pytest.mark.parametrize("suffix", [".npy", ".zarr", ".csv", ".parquet", ".h5"])
def test_missing_input(tmp_path, suffix):
    path = tmp_path / f"nowhere{suffix}"
    msg = _raises(InputError, InputConfig(path=str(path)), "not found", "`[input] path`")
    assert msg == f"Input file '{path}' not found; check `[input] path`."


@pytest.mark.parametrize("suffix", [".npy", ".csv", ".parquet", ".h5"])
def test_directory_instead_of_file(tmp_path, suffix):
    path = tmp_path / f"folder{suffix}"
    path.mkdir()
    _raises(InputError, InputConfig(path=str(path)), "directory", f"folder{suffix}")


def test_file_instead_of_zarr_store(tmp_path):
    (tmp_path / "flat.zarr").write_text("not a store")
    _raises(InputError, InputConfig(path=str(tmp_path / "flat.zarr")), "flat.zarr", "directory")


def test_directory_that_is_not_a_zarr_store(tmp_path):
    (tmp_path / "plain.zarr").mkdir()
    _raises(InputError, InputConfig(path=str(tmp_path / "plain.zarr")), "not a zarr store")


def test_unreadable_file_reported(tmp_path, data, monkeypatch):
    np.save(tmp_path / "x.npy", data)
    # os.access is what the reader consults; make it deny reading.
    monkeypatch.setattr(readers.os, "access", lambda *a, **k: False)
    _raises(InputError, InputConfig(path=str(tmp_path / "x.npy")), "permission", "x.npy")


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0,
                    reason="root reads files whatever their permissions")
def test_unreadable_file_really_unreadable(tmp_path, data):
    np.save(tmp_path / "x.npy", data)
    os.chmod(tmp_path / "x.npy", 0)
    try:
        _raises(InputError, InputConfig(path=str(tmp_path / "x.npy")), "permission")
    finally:
        os.chmod(tmp_path / "x.npy", 0o600)


def test_unknown_suffix_is_a_config_error(tmp_path):
    (tmp_path / "x.xlsx").write_text("")
    _raises(ConfigError, InputConfig(path=str(tmp_path / "x.xlsx")), "`[input] format`")


# ---------------------------------------------------------------- errors: arrays


def test_truncated_and_damaged_npy(tmp_path, data):
    np.save(tmp_path / "x.npy", data)
    raw = (tmp_path / "x.npy").read_bytes()
    (tmp_path / "cut.npy").write_bytes(raw[:-40])
    _raises(InputError, InputConfig(path=str(tmp_path / "cut.npy")),
            "cut.npy", "truncated or damaged .npy")
    (tmp_path / "junk.npy").write_bytes(b"this is not an array at all")
    _raises(InputError, InputConfig(path=str(tmp_path / "junk.npy")),
            "junk.npy", "truncated or damaged .npy")
    (tmp_path / "half.npy").write_bytes(raw[:20])  # cut inside the header
    _raises(InputError, InputConfig(path=str(tmp_path / "half.npy")), "truncated or damaged")


@pytest.mark.parametrize("shape, words", [
    ((7,), ["(7,)", "2-D", "reshape(-1, 1)"]),
    ((2, 3, 4), ["(2, 3, 4)", "2-D"]),
    ((0, 3), ["empty input", "(0, 3)"]),
    ((5, 0), ["empty input", "(5, 0)"]),
])
def test_array_shape_errors_in_every_array_format(tmp_path, shape, words):
    x = np.zeros(shape)
    np.save(tmp_path / "s.npy", x)
    zarr.create_array(str(tmp_path / "s.zarr"), shape=shape, dtype="f8")
    with h5py.File(tmp_path / "s.h5", "w") as fh:
        fh.create_dataset("only", data=x)
    for name in ("s.npy", "s.zarr", "s.h5"):
        _raises(InputError, InputConfig(path=str(tmp_path / name)), name, *words)


@pytest.mark.parametrize("values, word", [
    (np.array([[True, False]]), "bool"),
    (np.array([[1 + 2j, 3j]]), "complex"),
    (np.array([["a", "b"]]), "text"),
])
def test_array_value_types_refused(tmp_path, values, word):
    np.save(tmp_path / "v.npy", values)
    _raises(InputError, InputConfig(path=str(tmp_path / "v.npy")), word, "dtype", "v.npy")
    with h5py.File(tmp_path / "v.h5", "w") as fh:
        fh.create_dataset("x", data=values if values.dtype.kind != "U" else values.astype("S"))
    _raises(InputError, InputConfig(path=str(tmp_path / "v.h5")), "dtype")


def test_object_npy_refused(tmp_path):
    np.save(tmp_path / "o.npy", np.array([[1, "a"]], dtype=object), allow_pickle=True)
    _raises(InputError, InputConfig(path=str(tmp_path / "o.npy")), "Python object", "o.npy")


def test_table_options_on_arrays_are_config_errors(tmp_path, data):
    np.save(tmp_path / "x.npy", data)
    for key, value in [("columns", ("col1",)), ("exclude_columns", ("col1",)),
                       ("id_column", "col1")]:
        cfg = InputConfig(path=str(tmp_path / "x.npy"), **{key: value})
        _raises(ConfigError, cfg, f"`[input] {key}`", "CSV and Parquet")
    _raises(ConfigError, InputConfig(path=str(tmp_path / "x.npy"), dataset="a"),
            "`[input] dataset`")
    _raises(InputError, InputConfig(path=str(tmp_path / "x.npy")), "'col9'", "col1..col3",
            extra_columns=["col9"])


def test_zarr_dataset_errors(tmp_path, data):
    cfgs = _write_all(tmp_path, data)
    store = cfgs["zarr-group"].path
    msg = _raises(InputError, InputConfig(path=store, dataset="runs/emd"),
                  "'runs/emd'", "`[input] dataset`", "available arrays")
    assert "'runs/emb'" in msg and "'other'" in msg
    _raises(ConfigError, InputConfig(path=store), "several arrays", "`[input] dataset`")
    _raises(ConfigError, InputConfig(path=cfgs["zarr-array"].path, dataset="x"),
            "single zarr array", "remove `dataset`")
    # A group with exactly one array needs no `dataset`.
    group = zarr.open_group(str(tmp_path / "one.zarr"), mode="w")
    group.create_array("solo", shape=data.shape, dtype="f8")[:] = data
    with open_source(InputConfig(path=str(tmp_path / "one.zarr"))) as source:
        np.testing.assert_array_equal(next(source.blocks(N)).values, data)


def test_hdf5_dataset_errors(tmp_path, data):
    cfgs = _write_all(tmp_path, data)
    path = cfgs["hdf5"].path
    msg = _raises(InputError, InputConfig(path=path, dataset="features/y"),
                  "'features/y'", "available", "x.h5")
    assert "'features/x'" in msg and "'meta'" in msg
    _raises(ConfigError, InputConfig(path=path), "several arrays", "`[input] dataset`")
    (tmp_path / "fake.h5").write_text("hello")
    _raises(InputError, InputConfig(path=str(tmp_path / "fake.h5")), "not an HDF5 file")


def test_hdf5_file_is_closed(tmp_path, data):
    cfgs = _write_all(tmp_path, data)
    source = open_source(cfgs["hdf5"])
    handle = source._file
    source.close()
    assert not handle.id.valid
    source.close()  # twice is fine


# ---------------------------------------------------------------- errors: CSV


def _csv(tmp_path, text, name="t.csv"):
    (tmp_path / name).write_text(text)
    return str(tmp_path / name)


@pytest.mark.parametrize("small_batches", [False, True])
def test_csv_ragged_line(tmp_path, monkeypatch, small_batches):
    if small_batches:
        monkeypatch.setattr(readers, "CSV_READ_BYTES", 128)
    rows = [f"{i},{i + 0.5},{i * 2}" for i in range(40)]
    rows[30] = "30,30.5"  # data row 31 sits on line 32
    path = _csv(tmp_path, "a,b,c\n" + "\n".join(rows) + "\n")
    with pytest.raises(InputError) as info:
        with open_source(InputConfig(path=path)) as source:
            list(source.blocks(8))
    msg = str(info.value)
    assert "Line 32" in msg and "t.csv" in msg and "2 fields" in msg and "header has 3" in msg


@pytest.mark.parametrize("small_batches", [False, True])
def test_csv_text_in_numeric_column(tmp_path, monkeypatch, small_batches):
    if small_batches:
        monkeypatch.setattr(readers, "CSV_READ_BYTES", 128)
    rows = [f"{i},{i + 0.5},{i * 2}" for i in range(40)]
    rows[33] = "33,12..5,66"  # data row 34 sits on line 35
    path = _csv(tmp_path, "a,b,c\n" + "\n".join(rows) + "\n")
    with pytest.raises(InputError) as info:
        with open_source(InputConfig(path=path)) as source:
            list(source.blocks(8))
    msg = str(info.value)
    for word in ("'b'", "t.csv", "row 34", "line 35", "'12..5'", "exclude_columns"):
        assert word in msg, (word, msg)


def test_csv_line_numbers_exact_after_blank_lines_and_quotes(tmp_path):
    text = 'a,b,"c"\n1,2,3\n\n4,5,6\n"7",oops,9\n'
    path = _csv(tmp_path, text)
    # Data row 3 is on line 5 (line 3 is blank).
    _raises(InputError, InputConfig(path=path), "row 3", "line 5", "'oops'", "'b'")


def test_csv_label_column_named_in_columns(tmp_path):
    path = _csv(tmp_path, "x,name\n1,alice\n2,bob\n")
    _raises(InputError, InputConfig(path=path, columns=("x", "name")),
            "'name'", "not numbers", "`[input] columns`")
    # Without `columns` the text column is simply not a feature.
    with open_source(InputConfig(path=path)) as source:
        assert source.columns == ("x",)


def test_csv_entirely_empty_column(tmp_path):
    path = _csv(tmp_path, "a,b,c\n1,,3\n4,,6\n")
    _raises(InputError, InputConfig(path=path), "'b'", "empty", "exclude_columns")
    _raises(InputError, InputConfig(path=path, columns=("a", "b")), "'b'", "empty")
    with open_source(InputConfig(path=path, exclude_columns=("b",))) as source:
        assert source.columns == ("a", "c")


def test_csv_header_required_and_empty_files(tmp_path):
    _raises(InputError, InputConfig(path=_csv(tmp_path, "1,2,3\n4,5,6\n")), "header row")
    _raises(InputError, InputConfig(path=_csv(tmp_path, "", "e.csv")), "empty input", "e.csv")
    _raises(InputError, InputConfig(path=_csv(tmp_path, "a,b\n", "h.csv")), "empty input",
            "no rows")


def test_csv_no_numeric_columns(tmp_path):
    path = _csv(tmp_path, "name,city\nann,oslo\n")
    _raises(InputError, InputConfig(path=path), "no numeric columns")


# ---------------------------------------------------------------- errors: tables


@pytest.fixture()
def table_paths(tmp_path, data):
    return _tables_with_ids(tmp_path, data, list(range(N)), ["l"] * N)


def test_missing_columns_named(table_paths):
    for path in table_paths:
        msg = _raises(InputError, InputConfig(path=path, columns=("x1", "x9")),
                      "'x9'", "`[input] columns`", "available columns")
        assert "'x1'" in msg and "'label'" in msg
        _raises(InputError, InputConfig(path=path, id_column="key"), "'key'",
                "`[input] id_column`")
        _raises(InputError, InputConfig(path=path, exclude_columns=("zz",)), "'zz'")
        _raises(InputError, InputConfig(path=path), "'colour'", "color_column",
                extra_columns=["colour"])


def test_non_numeric_column_named_in_columns(table_paths):
    for path in table_paths:
        _raises(InputError, InputConfig(path=path, columns=("x1", "label")),
                "'label'", "not numbers")


def test_column_listed_twice_is_a_config_error(table_paths):
    for path in table_paths:
        _raises(ConfigError, InputConfig(path=path, columns=("x1", "id"), id_column="id"),
                "'id'")


def test_parquet_specific_errors(tmp_path):
    table = pa.table({"a": [1.0, 2.0], "flag": [True, False],
                      "gone": pa.array([None, None], pa.float64())})
    pq.write_table(table, tmp_path / "p.parquet")
    path = str(tmp_path / "p.parquet")
    _raises(InputError, InputConfig(path=path, columns=("a", "flag")), "'flag'", "bool")
    _raises(InputError, InputConfig(path=path), "'gone'", "empty")
    with open_source(InputConfig(path=path, exclude_columns=("gone",))) as source:
        assert source.columns == ("a",)
    (tmp_path / "bad.parquet").write_bytes(b"PAR1 but not really")
    _raises(InputError, InputConfig(path=str(tmp_path / "bad.parquet")),
            "not a Parquet file", "bad.parquet")
    pq.write_table(pa.table({"a": pa.array([], pa.float64())}), tmp_path / "none.parquet")
    _raises(InputError, InputConfig(path=str(tmp_path / "none.parquet")), "empty input")


def test_dataset_on_tables_is_a_config_error(table_paths):
    for path in table_paths:
        _raises(ConfigError, InputConfig(path=path, dataset="x"), "`[input] dataset`")

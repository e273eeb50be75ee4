"""Block-wise writes to real zarr arrays on disk (io/store.py)."""

from __future__ import annotations

import numpy as np
import pytest

from eigenstream.io import store


class _Recorder:
    """A real zarr array that also records the row ranges written to it."""

    def __init__(self, array):
        self.array, self.chunks, self.calls = array, array.chunks, []

    def __setitem__(self, key, values):
        self.calls.append((key.start, key.stop))
        self.array[key] = values


@pytest.mark.parametrize(("n", "start", "chunk"), [(100, 0, 7), (93, 3, 7), (1, 0, 5), (40, 0, 1)])
def test_write_rows_stores_every_row_in_chunk_aligned_calls(tmp_path, n, start, chunk):
    # Oracle: the values read back by zarr itself; the calls are checked against the chunk grid.
    group = store.open_group(tmp_path / "t.zarr", mode="w")
    arr = store.create_array(group, "x", shape=(start + n, 3), chunk_rows=chunk, dtype=np.float64)
    values = np.random.default_rng(0).standard_normal((n, 3))
    rec = _Recorder(arr)
    store.write_rows(rec, values, start=start, block_bytes=2 * chunk * values[:1].nbytes)
    assert np.array_equal(np.asarray(arr[start:]), values)
    assert rec.calls[0][0] == start and rec.calls[-1][1] == start + n
    for (_, stop), (nxt, _) in zip(rec.calls, rec.calls[1:], strict=False):
        assert stop == nxt and stop % chunk == 0  # contiguous, boundaries on chunk edges
    assert all(e - s <= 2 * chunk for s, e in rec.calls)
    if n > 2 * chunk:
        assert len(rec.calls) > 1


def test_write_rows_takes_at_least_one_chunk_per_call(tmp_path):
    group = store.open_group(tmp_path / "t.zarr", mode="w")
    arr = store.create_array(group, "x", shape=(50,), chunk_rows=10, dtype=np.int64)
    rec = _Recorder(arr)
    store.write_rows(rec, np.arange(50), block_bytes=1)
    assert rec.calls == [(0, 10), (10, 20), (20, 30), (30, 40), (40, 50)]
    assert np.array_equal(np.asarray(arr[...]), np.arange(50))

"""Feature values as the graph sees them (stages/features.py), read from a real zarr store."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.preprocessing import StandardScaler

from eigenstream.io import store
from eigenstream.stages import features


def _stored(tmp_path, X, chunk=64):
    group = store.open_group(tmp_path / "read.zarr", mode="w")
    arr = store.create_array(group, "rows", shape=X.shape, chunk_rows=chunk, dtype=X.dtype)
    arr[...] = X
    return str(tmp_path / "read.zarr")


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_block_wise_transform_equals_the_whole_table_formula(tmp_path, monkeypatch, dtype):
    # Oracles: numpy's one-shot ((X - shift) / scale) cast back to the stored dtype (bit for
    # bit: the block-wise form does the same float64 arithmetic), and scikit-learn's
    # StandardScaler for the standardised values themselves.
    rng = np.random.default_rng(4)
    X = (rng.standard_normal((1001, 9)) * rng.uniform(0.1, 50, 9) + 3).astype(dtype)
    shift, scale = X.astype(np.float64).mean(axis=0), X.astype(np.float64).std(axis=0)
    spec = features.FeatureSpec(_stored(tmp_path, X), "rows", shift, scale, 1.0)
    monkeypatch.setattr(features, "_APPLY_BLOCK_BYTES", 7 * 9 * 8)  # 7 rows a block, short last
    got = spec.load()
    assert got.dtype == dtype
    assert np.array_equal(got, ((X - shift) / scale).astype(dtype))
    ref = StandardScaler().fit_transform(X.astype(np.float64)).astype(dtype)
    np.testing.assert_allclose(got, ref, rtol=1e-5, atol=1e-6)
    assert np.array_equal(spec.load(1000, 1001), got[1000:])  # one row
    assert np.array_equal(spec.load_rows(np.array([0, 500, 1000])), got[[0, 500, 1000]])
    assert spec.load(5, 5).shape == (0, 9)

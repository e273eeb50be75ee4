"""Which rows the graph is built on and how their feature values are read.

* All rows: the stored rows (``read``), shifted and scaled (standardised, or divided by a power
  of two near their root-mean-square so that squared distances stay in float range), or the
  PCA-reduced rows of the ``prep`` stage.
* Graph rows: all rows in full-graph mode, the landmarks in landmark mode.

A :class:`FeatureSpec` travels to dask workers as a small value (a path and a few vectors); the
worker opens the zarr array itself.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from eigenstream.config import Config
from eigenstream.core.moments import standardizer
from eigenstream.io import store

# Float64 scratch of one block of :meth:`FeatureSpec.apply`.
_APPLY_BLOCK_BYTES = 4 << 20


@dataclass(frozen=True)
class FeatureSpec:
    """Where feature values live and the affine map applied when they are read."""

    path: str
    name: str
    shift: np.ndarray
    scale: np.ndarray
    unit: float
    metric: str = "euclidean"

    @property
    def array(self):
        return store.open_group(self.path, mode="r")[self.name]

    @property
    def n_rows(self) -> int:
        return int(self.array.shape[0])

    def apply(self, values: np.ndarray) -> np.ndarray:
        """The feature transform applied to raw stored values (a new array, same dtype)."""
        values = np.asarray(values)
        out = np.empty(values.shape, dtype=values.dtype)
        # In row blocks: the float64 intermediates of a whole 200k x 50 float32 table were
        # 160 MiB, the peak of the neighbour stage. Same arithmetic, block by block.
        step = max(1, _APPLY_BLOCK_BYTES // max(1, 8 * values[:1].size))
        for s in range(0, values.shape[0], step):
            part = values[s:s + step] - self.shift
            part /= self.scale
            out[s:s + step] = part
        return out

    def load(self, start: int | None = None, stop: int | None = None) -> np.ndarray:
        """Feature rows ``start:stop`` (all rows by default)."""
        return self.apply(self.array[start:stop])

    def load_rows(self, rows: np.ndarray) -> np.ndarray:
        """Feature values of the given (sorted) row indices."""
        return self.apply(self.array.get_orthogonal_selection((np.asarray(rows), slice(None))))

    def distances_to_input_units(self, distances: np.ndarray) -> np.ndarray:
        return distances * (self.unit if self.metric == "euclidean" else 1.0)


def feature_transform(group, standardize: bool) -> tuple[np.ndarray, np.ndarray, float]:
    """Shift, per-column scale and distance unit of the stored rows.

    Without standardisation the rows are only divided by a power of two near their
    root-mean-square value: exact in floating point, and it keeps squared distances of
    tables holding 1e30 or 1e-30 inside float32 range. Distances are multiplied back by
    that unit, so they are in the input's units.
    """
    mean, std = np.asarray(group["mean"][...]), np.asarray(group["std"][...])
    if standardize:
        shift, scale = standardizer(mean, std)
        return shift, scale, 1.0
    rms = float(np.sqrt(np.mean(std**2 + mean**2)))
    unit = 2.0 ** np.round(np.log2(rms)) if rms > 0 and np.isfinite(rms) else 1.0
    return np.zeros_like(mean), np.full_like(mean, unit), unit


def stored_rows_spec(workdir, config: Config) -> FeatureSpec:
    """The stored rows as the neighbour search sees them (before any PCA)."""
    path = workdir.stage_store("read")
    shift, scale, unit = feature_transform(store.open_group(path, mode="r"), config.prep.standardize)
    return FeatureSpec(str(path), "rows", shift, scale, unit, config.graph.metric)


def all_rows_spec(workdir, config: Config) -> FeatureSpec:
    """Every row's features: PCA-reduced when ``[prep] pca_components`` > 0."""
    stored = stored_rows_spec(workdir, config)
    if config.prep.pca_components:
        # PCA is fitted on the stored rows as transformed above, so distances between
        # reduced rows are in the same (scaled) units.
        dim = config.prep.pca_components
        return FeatureSpec(str(workdir.stage_store("prep")), "features", np.zeros(dim),
                           np.ones(dim), stored.unit, config.graph.metric)
    return stored


def graph_rows_spec(workdir, config: Config) -> FeatureSpec:
    """The rows the graph is built on: the landmarks, or all rows."""
    if config.landmarks.count:
        base = all_rows_spec(workdir, config)
        dim = base.shift.shape[0]
        return FeatureSpec(str(workdir.stage_store("landmarks")), "features", np.zeros(dim),
                           np.ones(dim), base.unit, config.graph.metric)
    return all_rows_spec(workdir, config)


__all__ = ["FeatureSpec", "all_rows_spec", "feature_transform", "graph_rows_spec",
           "stored_rows_spec"]

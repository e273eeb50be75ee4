"""Prep stage: optional PCA of the rows before neighbours, computed out of core.

``[prep] pca_components = c`` (0 = off). The PCA (:mod:`eigenstream.core.pca`) is fitted over
row blocks of the stored rows (after standardisation or scaling, see
:mod:`eigenstream.stages.features`), then every block is reduced and written to
``prep/data.zarr/features`` (n, c) with block markers. The model (mean, components, explained
variance) is stored beside it and its explained variance is reported.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from eigenstream.checkpoint import values_checksum
from eigenstream.core.pca import PCAModel, fit_pca
from eigenstream.errors import ConfigError
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext
from eigenstream.stages.features import stored_rows_spec


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    c = config.prep.pca_components
    if c == 0:
        return {"pca": None}
    spec = stored_rows_spec(ctx.workdir, config)
    n, dim = spec.array.shape
    if c > dim:
        raise ConfigError(
            f"`[prep] pca_components` = {c} exceeds the {dim} input columns; lower it (or 0)."
        )
    chunk = config.run.chunk_rows
    ranges = store.block_ranges(n, chunk)
    out = ctx.store(mode="w")
    model = _model(ctx, out, spec, ranges, c)
    features = ctx.array(out, "features", shape=(n, c), chunk_rows=chunk, dtype=np.float32)
    ctx.set_blocks_total(len(ranges))
    finished = ctx.finished_blocks([features])
    with ctx.progress(n, "rows", desc="prep (PCA transform)") as bar:
        for number, (s, e) in enumerate(ranges):
            if number not in finished:
                block = model.transform(spec.load(s, e)).astype(np.float32)
                features[s:e] = block
                ctx.mark_block(number, s, e, values_checksum([block]))
            bar.update(e - s)
            ctx.check_stop(f"rows {s + 1}-{e}")
    ratio = model.explained_variance_ratio
    # the rows were divided by spec.scale (a power of two, or the column std when
    # standardising, where unit = 1); report variances in the input's units
    return {
        "pca": c,
        "explained_variance": (model.explained_variance * spec.unit**2).tolist(),
        "explained_variance_ratio": ratio.tolist(),
        "explained_total": float(ratio.sum()),
    }


def _model(ctx: StageContext, out, spec, ranges, c: int) -> PCAModel:
    """The fitted PCA, reused from the store when resuming."""
    if ctx.resuming and "model" in out:
        group = out["model"]
        return PCAModel.from_arrays({k: np.asarray(group[k][...]) for k in group.array_keys()})

    def blocks():
        for s, e in ranges:
            yield spec.load(s, e)

    with ctx.progress(None, "passes", desc="prep (PCA fit)"):
        model = fit_pca(blocks, c, rng=np.random.default_rng(ctx.config.run.seed))
    group = out.require_group("model")
    for key, values in model.to_arrays().items():
        store.write_small(group, key, np.atleast_1d(np.asarray(values)))
    return model


STAGE = Stage(
    name="prep",
    version=1,
    config_keys=("prep.pca_components", "prep.standardize", "run.seed", "run.chunk_rows"),
    inputs=("read",),
    run=_run,
)

"""Landmark stage: choose the rows the graph is built on in landmark mode.

``[landmarks] count = m`` (0 = full graph, nothing to do). ``method = "uniform"``: a seeded
uniform sample without replacement; ``"kmeans++"``: k-means++ seeding (Arthur & Vassilvitskii
2007, scikit-learn's ``kmeans_plusplus``) on a seeded uniform sample of max(3 m, 10,000) rows, which
spreads landmarks over the data (Zhang, Tsang & Kwok 2008 bound the Nystrom error by the
distance of rows to their nearest landmark). Landmarks are always real rows, so placing them
again reproduces their coordinates. Outputs ``indices`` (m,) and ``features`` (m, dim).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from eigenstream.errors import ConfigError
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext
from eigenstream.stages.features import all_rows_spec


def choose(n: int, m: int, method: str, seed: int, spec) -> np.ndarray:
    """Sorted indices of ``m`` landmark rows out of ``n``."""
    rng = np.random.default_rng(seed)
    if method == "uniform" or m == n:
        return np.sort(rng.choice(n, size=m, replace=False))
    from sklearn.cluster import kmeans_plusplus

    # k-means++ costs O(pool x m) distances: a pool of 3 m rows (at least 10,000) keeps it
    # affordable at m = 20,000 (a 10 m pool took 274 s there)
    pool = np.sort(rng.choice(n, size=min(n, max(3 * m, 10_000)), replace=False))
    values = spec.load_rows(pool).astype(np.float64)
    _, chosen = kmeans_plusplus(values, m, random_state=seed)
    return np.sort(pool[np.unique(chosen)])


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    m = config.landmarks.count
    if m == 0:
        return {"count": 0, "mode": "full graph"}
    spec = all_rows_spec(ctx.workdir, config)
    n = spec.n_rows
    if m > n:
        raise ConfigError(
            f"`[landmarks] count` = {m} exceeds the {n} rows of the input; lower it (or 0 for "
            "the full graph)."
        )
    with ctx.progress(2, "steps") as bar:
        indices = choose(n, m, config.landmarks.method, config.run.seed, spec)
        bar.update(1)
        out = ctx.store(mode="w")
        store.write_small(out, "indices", indices.astype(np.int64))
        features = spec.load_rows(indices)
        arr = store.create_array(out, "features", shape=features.shape, chunk_rows=len(indices),
                                 dtype=features.dtype)
        arr[...] = features
        bar.update(1)
    return {"count": int(len(indices)), "method": config.landmarks.method, "rows": n,
            "mode": "landmarks"}


STAGE = Stage(
    name="landmarks",
    version=1,
    config_keys=("landmarks.count", "landmarks.method", "run.seed", "prep.standardize"),
    inputs=("prep",),
    run=_run,
)

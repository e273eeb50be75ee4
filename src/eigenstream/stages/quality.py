"""Quality stage: diagnostics of every run, each with a documented warn threshold.

Outputs ``quality/quality.json`` (also the stage summary, shown by ``status --json`` under
``quality``) and ``quality/bandwidths.png``. Thresholds and their meaning: docs/quality.md.
"""

from __future__ import annotations

import logging
from typing import Any

import numpy as np

from eigenstream.allocator import reusing
from eigenstream.core.harmonics import harmonic_residuals
from eigenstream.core.neighbors import knn_recall, nearest_in_blocks
from eigenstream.core.quality import continuity, eigengap, trustworthiness
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext
from eigenstream.stages.features import all_rows_spec, graph_rows_spec
from eigenstream.workdir import write_json_atomic

log = logging.getLogger(__name__)

SAMPLE_ROWS = 1000
MAP_ROWS = 20_000
QUALITY_NEIGHBORS = 10
# Graph rows read at a time for the exact neighbours of the recall sample (float64: 7.6 MiB
# at 50 columns; 100,000 rows made the recall check +156 MiB at 200k rows, 20,000 +50).
RECALL_BLOCK_ROWS = 20_000
# Scratch of the recall search that reuses heap memory from block to block.
RECALL_REUSE_BYTES = 64 << 20

# name -> (threshold, direction, what a breach means); "min": value must be >= threshold.
THRESHOLDS: dict[str, tuple[float, str, str]] = {
    "max_residual": (1e-6, "max", "an eigenvector has not converged; tighten [solver] tol"),
    "components": (1, "max", "the graph was disconnected and had to be bridged"),
    "knn_recall": (0.9, "min", "the approximate neighbour graph misses many true neighbours"),
    "trustworthiness": (0.85, "min", "map neighbours are often far apart in the data"),
    "continuity": (0.85, "min", "data neighbours are often torn apart on the map"),
    "duplicate_fraction": (0.05, "max", "many rows have an exact duplicate"),
    "bandwidth_spread": (1e3, "max", "bandwidths span many orders of magnitude (outliers?)"),
    # ours: clear harmonics measured at 0.05-0.25 (bench sheet and a 3.5 x 1 strip 0.07, swiss
    # roll 0.06-0.25, methods.md §9.5), weaker ones up to 0.38, new directions at 0.6-1.0; the
    # demo's grouped table has coordinates at 0.30-0.45. Warn only on the clear cases.
    "harmonic_residual": (0.25, "min", "a map coordinate is mostly a function of earlier ones "
                          "(a harmonic); set [embedding] choose_from, e.g. 3 x components"),
}


def _map_subset(n: int, seed: int) -> np.ndarray | None:
    """Rows used for trustworthiness/continuity: all up to MAP_ROWS, else a seeded subset."""
    if n <= MAP_ROWS:
        return None
    return np.sort(np.random.default_rng(seed + 1).choice(n, size=MAP_ROWS, replace=False))


def _sample_rows(n: int, seed: int) -> np.ndarray:
    if n <= SAMPLE_ROWS:
        return np.arange(n)
    return np.sort(np.random.default_rng(seed).choice(n, size=SAMPLE_ROWS, replace=False))


def recall_on_sample(query, blocks, stored_indices, method: str, rows: np.ndarray,
                     metric: str) -> float:
    """Recall of the stored kNN lists of the sampled rows against exact neighbours.

    Parameters
    ----------
    query : ndarray, shape (len(rows), D)
        The sampled graph rows.
    blocks : iterable of (start, ndarray)
        All graph rows, block by block (see ``core.neighbors.nearest_in_blocks``).
    stored_indices : ndarray of int, shape (len(rows), k)
        The stored lists of the sampled rows.
    method : str
        The neighbour stage's method ("exact" lists have recall 1 by construction).
    rows : ndarray of int
        Indices of the sampled rows.
    metric : {"euclidean", "cosine"}
    """
    if method == "exact":
        return 1.0
    k = stored_indices.shape[1]
    idx, _ = nearest_in_blocks(np.asarray(query, dtype=np.float64), blocks, k + 1,
                               metric=metric)
    exact = np.array([row[row != r][:k] for row, r in zip(idx, rows, strict=True)])
    return knn_recall(stored_indices, exact)


def _graph_blocks(spec, block_rows: int = RECALL_BLOCK_ROWS):
    """The graph rows as float64 blocks (start, values), one read at a time."""
    for s, e in store.block_ranges(spec.n_rows, block_rows):
        yield s, spec.load(s, e).astype(np.float64)


def checks(values: dict[str, float | None]) -> list[dict[str, Any]]:
    """Pass/warn verdict of each diagnostic against its threshold."""
    out = []
    for name, (threshold, direction, meaning) in THRESHOLDS.items():
        value = values.get(name)
        if value is None:
            continue
        ok = value >= threshold if direction == "min" else value <= threshold
        out.append({"name": name, "value": value, "threshold": threshold,
                    "direction": direction, "status": "pass" if ok else "warn", "meaning": meaning})
    return out


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    graph = graph_rows_spec(ctx.workdir, config)
    everything = all_rows_spec(ctx.workdir, config)
    n_all = everything.n_rows
    subset = _map_subset(n_all, config.run.seed)
    data = (everything.load() if subset is None else everything.load_rows(subset)).astype(np.float64)
    n = data.shape[0]
    knn = ctx.input_store("neighbors")
    nearest = np.asarray(knn["distances"][:, 0])
    sigma = np.asarray(ctx.input_store("affinity")["sigma"][...])
    solved = ctx.input_store("solve")
    eigenvalues = np.asarray(solved["eigenvalues"][...])
    residuals = np.asarray(solved["residuals"][...])
    coord_array = ctx.input_store("extend")["coordinates"]
    coords = np.asarray(
        coord_array[...] if subset is None
        else coord_array.get_orthogonal_selection((subset, slice(None)))
    )
    rows = _sample_rows(graph.n_rows, config.run.seed)
    sample = None if n <= SAMPLE_ROWS else SAMPLE_ROWS
    k = min(QUALITY_NEIGHBORS, max(1, (n - 1) // 2 - 1))
    rng = np.random.default_rng(config.run.seed)
    with ctx.progress(4, "checks") as bar:
        method = ctx.upstream.get("neighbors", {}).get("method", "exact")
        stored = np.asarray(knn["indices"].get_orthogonal_selection((rows, slice(None))))
        with reusing(up_to=RECALL_REUSE_BYTES):  # the same scratch for every block
            recall = recall_on_sample(graph.load_rows(rows), _graph_blocks(graph), stored,
                                      method, rows, config.graph.metric)
        bar.update(1)
        trust = trustworthiness(data, coords, n_neighbors=k, sample=sample, rng=rng)
        bar.update(1)
        cont = continuity(data, coords, n_neighbors=k, sample=sample, rng=rng)
        bar.update(1)
        gap_index, gap = eigengap(eigenvalues) if eigenvalues.size > 1 else (0, None)
        harmonic = harmonic_residuals(coords, seed=config.run.seed)
        affinity = ctx.upstream.get("affinity", {})
        values = {
            "max_residual": float(np.max(residuals)),
            "components": int(affinity.get("connected_components", 1)),
            "knn_recall": float(recall),
            "trustworthiness": float(trust),
            "continuity": float(cont),
            "duplicate_fraction": float(np.mean(nearest == 0)),
            "bandwidth_spread": float(sigma.max() / sigma.min()),
            "harmonic_residual": float(harmonic.min()),
        }
        report = {
            **values,
            "component_sizes": affinity.get("component_sizes", []),
            "bridges": affinity.get("bridges", []),
            "duplicate_rows": int(np.sum(nearest == 0)),
            "eigengap": {"after_component": int(gap_index) + 1, "gap": gap},
            "harmonic_residuals": harmonic.tolist(),
            "bandwidth_quantiles": dict(zip(
                ("min", "p01", "p25", "median", "p75", "p99", "max"),
                np.quantile(sigma, [0, 0.01, 0.25, 0.5, 0.75, 0.99, 1]).tolist(), strict=True,
            )),
            "sample_rows": int(rows.size),
            "map_rows_used": int(n),
            "quality_neighbors": k,
            "neighbor_method": method,
            "checks": checks(values),
        }
        folder = ctx.workdir.stage_dir(ctx.name)
        _bandwidth_plot(sigma, folder / "bandwidths.png")
        write_json_atomic(folder / "quality.json", report)
        bar.update(1)
    for check in report["checks"]:
        if check["status"] == "warn":
            log.warning("quality: %s = %.4g (threshold %s %.4g): %s", check["name"],
                        check["value"], ">=" if check["direction"] == "min" else "<=",
                        check["threshold"], check["meaning"])
    store.open_group(ctx.workdir.stage_store(ctx.name), mode="w")
    return report


def _bandwidth_plot(sigma: np.ndarray, path) -> None:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6, 3.2), dpi=110)
    ax = fig.add_subplot()
    positive = sigma[sigma > 0]
    bins = np.geomspace(positive.min(), positive.max() * 1.0001, 40) if positive.size else 10
    ax.hist(positive, bins=bins, color="#3b6ea8")
    ax.set_xscale("log")
    ax.set_xlabel("bandwidth sigma_i (input units)")
    ax.set_ylabel("rows")
    ax.set_title("Bandwidth distribution")
    fig.tight_layout()
    tmp = path.with_name(path.name + ".tmp.png")
    fig.savefig(tmp)
    tmp.replace(path)


STAGE = Stage(
    name="quality",
    version=2,
    config_keys=("graph.metric",),
    inputs=("extend", "affinity", "neighbors"),
    # trustworthiness on more than MAP_ROWS rows is measured within a seeded subset of them
    run=_run,
)

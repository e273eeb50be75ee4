"""Affinity stage: Gaussian kernel on the kNN edges, symmetrised, alpha-normalised.

Outputs in ``affinity/data.zarr``: the symmetric kernel K as CSR (``K/indptr``, ``K/indices``,
``K/data``; union rule plus unit self loops, see docs/method.md), the bandwidths ``sigma``, the
kernel row sums ``q``, the degrees of the alpha-normalised kernel ``degrees``, the operator
scaling ``scale`` (A = diag(scale) K diag(scale)) and connected-component ``labels``.
"""

from __future__ import annotations

import logging
from typing import Any

import numpy as np

from eigenstream.core.components import bridge, closest_pairs
from eigenstream.core.graph import (
    alpha_normalize,
    connected_components,
    directed_affinity,
    union_affinity,
)
from eigenstream.core.kernels import adaptive_bandwidths, fill_zero_bandwidths, gaussian_weights
from eigenstream.errors import InputError
from eigenstream.io import store
from eigenstream.io.graphstore import write_csr
from eigenstream.pipeline import Stage, StageContext
from eigenstream.stages.features import graph_rows_spec

log = logging.getLogger(__name__)


def bandwidths(distances: np.ndarray, kernel_config, source: str = "the input") -> np.ndarray:
    """Per-row sigma: adaptive (k-th neighbour distance) or the configured global value."""
    n = distances.shape[0]
    if kernel_config.bandwidth != "adaptive":
        return np.full(n, float(kernel_config.bandwidth))
    sigma = adaptive_bandwidths(distances, neighbor=kernel_config.bandwidth_neighbor)
    try:
        return fill_zero_bandwidths(sigma)
    except ValueError:
        raise InputError(
            f"Every row of {source} is identical to its neighbours (all neighbour distances "
            "are 0): there is no structure to embed; check the input columns (or set "
            '`[run] dtype = "float64"` if they differ only in fine digits).'
        ) from None


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    knn = ctx.input_store("neighbors")
    indices = np.asarray(knn["indices"][...])
    distances = np.asarray(knn["distances"][...])
    n = indices.shape[0]
    with ctx.progress(4, "steps") as bar:
        sigma = bandwidths(distances, config.kernel, config.input.path)
        weights = gaussian_weights(distances, sigma, sigma[indices])
        del distances  # not needed from here; the union build is the stage's peak
        bar.update(1)
        W = directed_affinity(indices, weights, n, self_loops=True)
        del indices, weights  # the lists go before the union
        K = union_affinity(W)  # max(W, W^T), as core.graph.symmetric_affinity
        del W
        bar.update(1)
        count, labels = connected_components(K)
        bridges: list = []
        if count > 1:
            K, bridges, weight = _bridge(ctx, K, labels)
        norm = alpha_normalize(K, config.kernel.alpha)
        bar.update(1)
        out = ctx.store(mode="w")
        write_csr(out, K)
        for name, values in (
            ("sigma", sigma),
            ("q", norm.q),
            ("degrees", norm.degrees),
            ("scale", norm.scale),
            ("labels", labels.astype(np.int64)),
        ):
            store.write_small(out, name, values)
        bar.update(1)
    sizes = np.sort(np.bincount(labels))[::-1]
    if count > 1:
        log.warning(
            "the affinity graph has %d connected components (largest sizes %s); each smaller one "
            "was bridged to the largest by its closest pair of rows, so the map shows them as "
            "separate groups whose distances mean nothing. Raise `[graph] neighbors` to connect "
            "them from the data.",
            count, sizes[:5].tolist(),
        )
    return {
        "nnz": int(K.nnz),
        "connected_components": int(count),
        "component_sizes": sizes[:20].tolist(),
        "bridges": [[int(a), int(b), float(d)] for a, b, d in bridges],
        "volume": float(norm.volume),
        "sigma_quantiles": np.quantile(sigma, [0.0, 0.5, 1.0]).tolist(),
    }


def _bridge(ctx: StageContext, K, labels):
    """Link every smaller component to the largest (policy: docs/method.md, section 7)."""
    data = graph_rows_spec(ctx.workdir, ctx.config).load()
    pairs = closest_pairs(data, labels, metric=ctx.config.graph.metric,
                          rng=np.random.default_rng(ctx.config.run.seed))
    K, weight = bridge(K, pairs)
    return K, pairs, weight


STAGE = Stage(
    name="affinity",
    version=1,
    config_keys=("kernel.bandwidth", "kernel.bandwidth_neighbor", "kernel.alpha"),
    inputs=("neighbors",),
    run=_run,
)

"""Extend stage: map coordinates for every row, written block by block.

Full-graph mode: every row is a graph vertex, so the coordinates are the diffusion coordinates
lambda^t psi of the solve stage. Landmark mode: every row block is placed against the landmarks
with the Nystrom formula (docs/landmarks.md), one dask task per block, each writing the chunk it
owns. Output: ``extend/data.zarr/coordinates`` (n, components), float64, in input order.
"""

from __future__ import annotations

from functools import partial
from typing import Any

import numpy as np

from eigenstream.checkpoint import values_checksum
from eigenstream.core.extension import extend_rows
from eigenstream.core.spectral import time_power
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext
from eigenstream.stages.features import FeatureSpec, all_rows_spec, graph_rows_spec
from eigenstream.workdir import Workdir


def training_state(workdir: Workdir, k: int) -> dict[str, np.ndarray]:
    """What placing a row needs from a finished graph: radii, bandwidths, q, degrees, psi."""
    knn = store.open_group(workdir.stage_store("neighbors"), mode="r")
    aff = store.open_group(workdir.stage_store("affinity"), mode="r")
    solved = store.open_group(workdir.stage_store("solve"), mode="r")
    return {
        "radius": np.asarray(knn["distances"][:, k - 1]),
        "sigma": np.asarray(aff["sigma"][...]),
        "q": np.asarray(aff["q"][...]),
        "degrees": np.asarray(aff["degrees"][...]),
        "psi": np.asarray(solved["psi"][...]),
        "eigenvalues": np.asarray(solved["eigenvalues"][...]),
    }


def place_block(rows: np.ndarray, graph: np.ndarray, state: dict, settings: dict,
                unit: float) -> np.ndarray:
    """Coordinates of feature rows (in the features' scaled units) against the graph rows."""
    bandwidth = settings["bandwidth"]
    return extend_rows(
        rows, graph, radius=state["radius"] / unit, sigma=state["sigma"] / unit, q=state["q"],
        degrees=state["degrees"], psi=state["psi"], eigenvalues=state["eigenvalues"],
        k=settings["neighbors"],
        bandwidth=bandwidth if bandwidth == "adaptive" else float(bandwidth) / unit,
        bandwidth_neighbor=settings["bandwidth_neighbor"], alpha=settings["alpha"],
        diffusion_time=settings["diffusion_time"], metric=settings["metric"],
    )


def settings_of(config) -> dict[str, Any]:
    return {
        "neighbors": config.graph.neighbors,
        "metric": config.graph.metric,
        "bandwidth": config.kernel.bandwidth,
        "bandwidth_neighbor": config.kernel.bandwidth_neighbor,
        "alpha": config.kernel.alpha,
        "diffusion_time": config.embedding.diffusion_time,
    }


def _landmark_block(workdir_path: str, everything: FeatureSpec, graph: FeatureSpec,
                    settings: dict, out_path: str, start: int, stop: int):
    state = training_state(Workdir(workdir_path), settings["neighbors"])
    unit = everything.unit if settings["metric"] == "euclidean" else 1.0
    coords = place_block(everything.load(start, stop).astype(np.float64),
                         graph.load().astype(np.float64), state, settings, unit)
    store.open_group(out_path, mode="r+")["coordinates"][start:stop] = coords
    return start, stop, values_checksum([coords])


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    solved = ctx.input_store("solve")
    c = solved["psi"].shape[1]
    everything = all_rows_spec(ctx.workdir, config)
    n = everything.n_rows
    chunk = config.run.chunk_rows
    out = ctx.store(mode="w")
    coords = ctx.array(out, "coordinates", shape=(n, c), chunk_rows=chunk, dtype=np.float64)
    ranges = store.block_ranges(n, chunk)
    ctx.set_blocks_total(len(ranges))
    finished = ctx.finished_blocks([coords])
    if config.landmarks.count:
        _extend_from_landmarks(ctx, everything, ranges, finished)
    else:
        _copy_diffusion_coordinates(ctx, solved, coords, ranges, finished)
    mode = "landmarks" if config.landmarks.count else "full graph"
    return {"rows": n, "components": c, "diffusion_time": config.embedding.diffusion_time,
            "mode": mode}


def _copy_diffusion_coordinates(ctx, solved, coords, ranges, finished) -> None:
    psi = solved["psi"]
    weights = time_power(np.asarray(solved["eigenvalues"][...]), ctx.config.embedding.diffusion_time)
    with ctx.progress(ranges[-1][1] if ranges else 0, "rows") as bar:
        for number, (s, e) in enumerate(ranges):
            if number not in finished:
                block = np.asarray(psi[s:e]) * weights
                coords[s:e] = block
                ctx.mark_block(number, s, e, values_checksum([block]))
            bar.update(e - s)
            ctx.check_stop(f"rows {s + 1}-{e}")


def _extend_from_landmarks(ctx, everything, ranges, finished) -> None:
    graph = graph_rows_spec(ctx.workdir, ctx.config)
    settings = settings_of(ctx.config)
    out_path = str(ctx.workdir.stage_store(ctx.name))
    tasks = [
        (number, partial(ctx.client.submit, _landmark_block, str(ctx.workdir.path), everything,
                         graph, settings, out_path, s, e, pure=False))
        for number, (s, e) in enumerate(ranges)
        if number not in finished
    ]
    ctx.collect_blocks(tasks, ranges, finished, desc="extend (Nystrom)")


STAGE = Stage(
    name="extend",
    version=2,
    config_keys=("embedding.diffusion_time", "run.chunk_rows"),
    inputs=("solve", "landmarks"),
    run=_run,
)

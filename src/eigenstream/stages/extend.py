"""Extend stage: map coordinates for every row, written block by block.

In full-graph mode every row is a graph vertex, so the coordinates are the diffusion
coordinates lambda^t psi of the solve stage. Output: ``extend/data.zarr/coordinates``
(n, components), float64, in input order.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from eigenstream.checkpoint import values_checksum
from eigenstream.core.spectral import time_power
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    solved = ctx.input_store("solve")
    psi = solved["psi"]
    weights = time_power(
        np.asarray(solved["eigenvalues"][...]), config.embedding.diffusion_time
    )
    n, c = psi.shape
    out = ctx.store(mode="w")
    chunk = config.run.chunk_rows
    coords = ctx.array(out, "coordinates", shape=(n, c), chunk_rows=chunk, dtype=np.float64)
    ranges = store.block_ranges(n, chunk)
    ctx.set_blocks_total(len(ranges))
    finished = ctx.finished_blocks([coords])
    with ctx.progress(n, "rows") as bar:
        for number, (s, e) in enumerate(ranges):
            if number not in finished:
                block = np.asarray(psi[s:e]) * weights
                coords[s:e] = block
                ctx.mark_block(number, s, e, values_checksum([block]))
            bar.update(e - s)
            ctx.check_stop(f"rows {s + 1}-{e}")
    return {"rows": n, "components": c, "diffusion_time": config.embedding.diffusion_time}


STAGE = Stage(
    name="extend",
    version=1,
    config_keys=("embedding.diffusion_time",),
    inputs=("solve",),
    run=_run,
)

"""Solve stage: leading eigenpairs of A = D^-1/2 Q^-a K Q^-a D^-1/2 through its matvec.

The matvec reads K from ``affinity/data.zarr`` (from memory when it fits, else streamed row
block by row block). Outputs in ``solve/data.zarr``: ``eigenvalues`` (descending, trivial one
removed), ``residuals`` (relative, one per pair) and ``psi`` (n, components), the right
eigenvectors of the Markov matrix with signs fixed by the documented rule.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from eigenstream.core.spectral import solve_embedding
from eigenstream.io import store
from eigenstream.io.graphstore import StoredCSR
from eigenstream.pipeline import Stage, StageContext


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    graph_path = ctx.workdir.stage_store("affinity")
    aff = ctx.input_store("affinity")
    K = StoredCSR(graph_path)
    scale = np.asarray(aff["scale"][...])
    degrees = np.asarray(aff["degrees"][...])
    with ctx.progress(None, "matvec", desc="solve (Lanczos passes)") as bar:

        def counted(x: np.ndarray) -> np.ndarray:
            bar.update(1)
            return K.matvec(x)

        emb = solve_embedding(
            counted,
            scale,
            degrees,
            components=config.embedding.components,
            diffusion_time=config.embedding.diffusion_time,
            tol=config.solver.tol,
            max_matvecs=config.solver.max_matvecs,
            seed=config.run.seed,
        )
    out = ctx.store(mode="w")
    store.write_small(out, "eigenvalues", emb.eigenvalues)
    store.write_small(out, "residuals", emb.residuals)
    psi = store.create_array(out, "psi", shape=emb.psi.shape, chunk_rows=config.run.chunk_rows,
                             dtype=np.float64)
    psi[...] = emb.psi
    return {
        "eigenvalues": emb.eigenvalues.tolist(),
        "residuals": emb.residuals.tolist(),
        "matvecs": int(emb.matvecs),
        "matvec_mode": K.mode,
        "max_residual": float(np.max(emb.residuals)),
    }


STAGE = Stage(
    name="solve",
    version=1,
    config_keys=("embedding.components", "solver.tol", "solver.max_matvecs", "run.seed"),
    inputs=("affinity",),
    run=_run,
)

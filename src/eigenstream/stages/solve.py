"""Solve stage: leading eigenpairs of A = D^-1/2 Q^-a K Q^-a D^-1/2 through its matvec.

The matvec reads K from ``affinity/data.zarr`` (from memory when it fits, else streamed row
block by row block). Outputs in ``solve/data.zarr``: ``eigenvalues`` (descending, trivial one
removed), ``residuals`` (relative, one per pair) and ``psi`` (n, components), the right
eigenvectors of the Markov matrix with signs fixed by the documented rule.
"""

from __future__ import annotations

import logging
import shutil
import time
from pathlib import Path
from typing import Any

import numpy as np

from eigenstream.checkpoint import STOP
from eigenstream.core.lanczos import LanczosState
from eigenstream.core.spectral import solve_embedding
from eigenstream.io import store
from eigenstream.io.graphstore import StoredCSR
from eigenstream.pipeline import Stage, StageContext, fault_point
from eigenstream.workdir import read_json, write_json_atomic

log = logging.getLogger(__name__)


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    graph_path = ctx.workdir.stage_store("affinity")
    aff = ctx.input_store("affinity")
    K = StoredCSR(graph_path)
    scale = np.asarray(aff["scale"][...])
    degrees = np.asarray(aff["degrees"][...])
    lanczos = config.solver.method == "lanczos"
    state = load_checkpoint(ctx) if lanczos and ctx.resuming else None
    if state is not None:
        log.info("solve: continuing from the checkpoint after restart %d (%d products so far)",
                 state.restarts, state.matvecs)
    with ctx.progress(None, "matvec", desc="solve (Lanczos passes)") as bar:
        if state is not None:
            bar.update(state.matvecs)

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
            check_multiplicity=config.solver.check_multiplicity,
            solver=config.solver.method,
            state=state,
            on_restart=checkpoint_writer(ctx) if lanczos and config.run.checkpoints else None,
        )
    clear_checkpoint(ctx)
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
        "solver": config.solver.method,
        "resumed_from_restart": state.restarts if state is not None else None,
        "max_residual": float(np.max(emb.residuals)),
    }


def _folder(ctx: StageContext) -> Path:
    return ctx.workdir.stage_dir(ctx.name) / "checkpoint"


def load_checkpoint(ctx: StageContext) -> LanczosState | None:
    """The Lanczos state saved at the last restart, or None."""
    meta = read_json(_folder(ctx) / "state.json")
    if not meta:
        return None
    group = store.open_group(_folder(ctx) / meta["arrays"], mode="r")
    arrays = {name: np.asarray(group[name][...]) for name in group.array_keys()}
    return LanczosState.from_parts(arrays, meta["scalars"])


def checkpoint_writer(ctx: StageContext):
    """Callback saving the Lanczos state after a restart (at most every checkpoint_seconds).

    The arrays go to a new zarr group first; the JSON pointer to it is renamed into place
    after, so a crash leaves either the old or the new checkpoint, never half of one.
    """
    every = ctx.config.run.checkpoint_seconds
    last = [time.monotonic()]

    def save(state: LanczosState) -> None:
        now = time.monotonic()
        if now - last[0] < every and not STOP.requested:
            return
        last[0] = now
        folder = _folder(ctx)
        folder.mkdir(parents=True, exist_ok=True)
        name = f"restart-{state.restarts:06d}.zarr"
        group = store.open_group(folder / name, mode="w")
        for key, values in state.arrays().items():
            values = np.asarray(values)
            arr = store.create_array(group, key, shape=values.shape,
                                     chunk_rows=ctx.config.run.chunk_rows, dtype=values.dtype)
            arr[...] = values
        write_json_atomic(folder / "state.json", {"arrays": name, "scalars": state.scalars()})
        for old in folder.glob("restart-*.zarr"):
            if old.name != name:
                shutil.rmtree(old, ignore_errors=True)
        fault_point(ctx.name, ctx.workdir.stage_dir(ctx.name))
        ctx.check_stop(f"Lanczos restart {state.restarts}")

    return save


def clear_checkpoint(ctx: StageContext) -> None:
    shutil.rmtree(_folder(ctx), ignore_errors=True)


STAGE = Stage(
    name="solve",
    version=2,
    config_keys=(
        "embedding.components",
        "solver.method",
        "solver.tol",
        "solver.max_matvecs",
        "solver.check_multiplicity",
        "run.seed",
    ),
    inputs=("affinity",),
    run=_run,
)

"""Solve stage: leading eigenpairs of A = D^-1/2 Q^-a K Q^-a D^-1/2 through its matvec.

The matvec reads K from ``affinity/data.zarr`` (from memory when it fits, else streamed row
block by row block). ``[solver] method = "auto"`` uses LOBPCG with a multigrid preconditioner
from 50,000 rows up when K fits in memory, else our thick-restart Lanczos. Both save their
state to ``solve/checkpoint`` (after Lanczos restarts / LOBPCG rounds) for resuming. Outputs in ``solve/data.zarr``: ``eigenvalues`` (descending, trivial one
removed), ``residuals`` (relative, one per pair) and ``psi`` (n, components), the right
eigenvectors of the Markov matrix with signs fixed by the documented rule. With
``[embedding] choose_from = N`` the leading N pairs are solved and the ``components`` that are
not harmonics of earlier ones are kept (local linear regression, Dsilva et al. 2018); the
summary lists which, with every candidate's eigenvalue and regression residual.
"""

from __future__ import annotations

import logging
import shutil
import time
from pathlib import Path
from typing import Any

import numpy as np

from eigenstream import budget
from eigenstream.checkpoint import STOP
from eigenstream.core.amg_lobpcg import BlockState
from eigenstream.core.harmonics import keep_coordinates
from eigenstream.core.lanczos import LanczosState
from eigenstream.core.spectral import choose_solver, solve_embedding
from eigenstream.io import store
from eigenstream.io.graphstore import StoredCSR
from eigenstream.pipeline import Stage, StageContext, fault_point
from eigenstream.stages.graph_on_workers import WorkerGraph
from eigenstream.workdir import read_json, write_json_atomic

log = logging.getLogger(__name__)

# Driver memory of the LOBPCG path per stored non-zero, an upper estimate: K (12-16 B) next
# to its reordered, shifted Laplacian (12 B) while that is built; then the Laplacian and the
# multigrid setup's transients (~30 B, measured at 200k and 1M rows).
LOBPCG_BYTES_PER_NONZERO = 64


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    graph_path = ctx.workdir.stage_store("affinity")
    aff = ctx.input_store("affinity")
    graph_bytes = budget.driver_graph_bytes(config)
    scale = np.asarray(aff["scale"][...])
    degrees = np.asarray(aff["degrees"][...])
    if products_on_workers(config):
        K = WorkerGraph(ctx.client, graph_path, worker_memory=budget.worker_share(config).bytes)
        fits = False
    else:
        K = StoredCSR(graph_path, memory_budget=graph_bytes)
        fits = K.in_memory and K.nnz * LOBPCG_BYTES_PER_NONZERO <= graph_bytes
    try:
        return _solve(ctx, K, scale, degrees,
                      choose_solver(config.solver.method, K.n, matrix_in_memory=fits))
    finally:
        if isinstance(K, WorkerGraph):
            K.close()


def products_on_workers(config) -> bool:
    """Whether the eigensolver's products run on the dask workers.

    "auto": on the workers when they are not on this machine (a running scheduler or a batch
    queue), so the driver holds only vectors; with a local cluster the driver's own memory
    is as close to the data and avoids a task round trip per product.
    """
    where = config.solver.matvec
    if where == "auto":
        return config.cluster.kind != "local" and config.solver.method != "lobpcg"
    return where == "workers"


def _solve(ctx: StageContext, K, scale, degrees, solver: str) -> dict[str, Any]:
    config = ctx.config
    state = load_checkpoint(ctx, solver) if ctx.resuming else None
    if state is not None:
        log.info("solve: continuing from the checkpoint of %s (%d products so far)",
                 solver, state.matvecs)
    unit = "round" if solver == "lobpcg" else "matvec"
    desc = "solve (LOBPCG rounds)" if solver == "lobpcg" else "solve (Lanczos passes)"
    with ctx.progress(None, unit, desc=desc) as bar:
        if state is not None:
            bar.update(state.rounds if solver == "lobpcg" else state.matvecs)
        save = checkpoint_writer(ctx, solver) if config.run.checkpoints else None

        def counted(x: np.ndarray) -> np.ndarray:
            bar.update(1)
            return K.matvec(x)

        def on_state(new_state) -> None:
            if solver == "lobpcg":
                bar.update(1)
            if save is not None:
                save(new_state)

        emb = solve_embedding(
            K.take() if solver == "lobpcg" else counted,  # handed over: freed early
            scale,
            degrees,
            components=config.embedding.choose_from or config.embedding.components,
            diffusion_time=config.embedding.diffusion_time,
            tol=config.solver.tol,
            max_matvecs=config.solver.max_matvecs,
            seed=config.run.seed,
            check_multiplicity=config.solver.check_multiplicity,
            solver=solver,
            state=state,
            on_restart=on_state if solver in ("lanczos", "lobpcg") else None,
        )
    clear_checkpoint(ctx)
    kept, candidate_residuals = choose(emb, config)
    out = ctx.store(mode="w")
    values, residuals = emb.eigenvalues[kept], emb.residuals[kept]
    store.write_small(out, "eigenvalues", values)
    store.write_small(out, "residuals", residuals)
    vectors = emb.psi[:, kept]
    psi = store.create_array(out, "psi", shape=vectors.shape, chunk_rows=config.run.chunk_rows,
                             dtype=np.float64)
    psi[...] = vectors
    return {
        "eigenvalues": values.tolist(),
        "residuals": residuals.tolist(),
        "eigenvectors_kept": [int(i) + 1 for i in kept],
        "candidate_harmonic_residuals": candidate_residuals,
        "candidate_eigenvalues": emb.eigenvalues.tolist() if candidate_residuals else None,
        "matvecs": int(emb.matvecs),
        "graph_passes": int(emb.passes or emb.matvecs),
        "lobpcg_steps": int(emb.steps) if solver == "lobpcg" else None,
        "matvec_mode": K.mode,
        "solver": solver,
        "resumed_from_restart": _position(state),
        "max_residual": float(np.max(emb.residuals)),
    }


def choose(emb, config) -> tuple[np.ndarray, list[float] | None]:
    """Which of the solved eigenvectors become coordinates (``core.harmonics.keep_coordinates``)."""
    t = time.perf_counter()
    kept, residuals = keep_coordinates(emb.psi, config.embedding.components,
                                       config.embedding.choose_from, seed=config.run.seed)
    if residuals is not None:
        log.info("solve: kept eigenvectors %s of %d (local linear regression residuals %s; "
                 "%.1f s)", [int(i) + 1 for i in kept], emb.psi.shape[1],
                 " ".join(f"{r:.2f}" for r in residuals), time.perf_counter() - t)
    return kept, residuals


def _position(state) -> int | None:
    if state is None:
        return None
    return state.rounds if isinstance(state, BlockState) else state.restarts


def _folder(ctx: StageContext) -> Path:
    return ctx.workdir.stage_dir(ctx.name) / "checkpoint"


def load_checkpoint(ctx: StageContext, solver: str) -> LanczosState | BlockState | None:
    """The state ``solver`` saved last (Lanczos restart or LOBPCG round), or None."""
    meta = read_json(_folder(ctx) / "state.json")
    if not meta or meta.get("solver", "lanczos") != solver:
        return None
    group = store.open_group(_folder(ctx) / meta["arrays"], mode="r")
    arrays = {name: np.asarray(group[name][...]) for name in group.array_keys()}
    if solver == "lobpcg":
        return BlockState(block=arrays["block"], **meta["scalars"])
    return LanczosState.from_parts(arrays, meta["scalars"])


def checkpoint_writer(ctx: StageContext, solver: str):
    """Callback saving the solver state (at most every checkpoint_seconds).

    The arrays go to a new zarr group first; the JSON pointer to it is renamed into place
    after, so a crash leaves either the old or the new checkpoint, never half of one.
    """
    every = ctx.config.run.checkpoint_seconds
    last = [time.monotonic()]

    def save(state: LanczosState | BlockState) -> None:
        now = time.monotonic()
        if now - last[0] < every and not STOP.requested:
            return
        last[0] = now
        folder = _folder(ctx)
        folder.mkdir(parents=True, exist_ok=True)
        blockwise = isinstance(state, BlockState)
        position = state.rounds if blockwise else state.restarts
        name = f"restart-{position:06d}.zarr"
        group = store.open_group(folder / name, mode="w")
        arrays = {"block": state.block} if blockwise else state.arrays()
        for key, values in arrays.items():
            values = np.asarray(values)
            arr = store.create_array(group, key, shape=values.shape,
                                     chunk_rows=ctx.config.run.chunk_rows, dtype=values.dtype)
            arr[...] = values
        write_json_atomic(folder / "state.json",
                          {"arrays": name, "solver": solver, "scalars": state.scalars()})
        for old in folder.glob("restart-*.zarr"):
            if old.name != name:
                shutil.rmtree(old, ignore_errors=True)
        fault_point(ctx.name, ctx.workdir.stage_dir(ctx.name))
        ctx.check_stop(f"LOBPCG round {position}" if blockwise else f"Lanczos restart {position}")

    return save


def clear_checkpoint(ctx: StageContext) -> None:
    shutil.rmtree(_folder(ctx), ignore_errors=True)


STAGE = Stage(
    name="solve",
    version=3,
    config_keys=(
        "embedding.components",
        "embedding.choose_from",
        "solver.method",
        "solver.tol",
        "solver.max_matvecs",
        "solver.check_multiplicity",
        "run.seed",
    ),
    inputs=("affinity",),
    run=_run,
)

"""Stage order, fingerprints, reuse of finished stages and the run record.

A stage is reused only when its ``stage.json`` says ``done`` and its fingerprint (a hash of
the stage's name and version, the config keys it reads, its inputs' fingerprints and the
package version) equals the one computed now. Otherwise its outputs are cleared and it runs.
The run record (``run.json``) says ``complete`` only after every stage is done.
"""

from __future__ import annotations

import errno
import hashlib
import json
import logging
import os
import platform
import resource
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tqdm.auto import tqdm

from eigenstream import __version__
from eigenstream.config import Config, coerce_config
from eigenstream.errors import CheckpointError, EigenstreamError
from eigenstream.io import store
from eigenstream.workdir import Workdir

log = logging.getLogger(__name__)

SAMPLE_BYTES = 1 << 20
OUTPUT_FILES = ("run.json", "manifest.json", "map.png", "map-season.png", "spectrum.png")
_STORAGE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM}


@dataclass(frozen=True)
class Stage:
    """One pipeline stage: what it reads and the runner that produces its outputs."""

    name: str
    version: int
    config_keys: tuple[str, ...]
    inputs: tuple[str, ...]
    run: Callable[[StageContext], dict[str, Any]]


@dataclass
class StageContext:
    """What a runner gets: the config, the work directory, the client and its inputs."""

    config: Config
    workdir: Workdir
    client: Any
    name: str
    upstream: dict[str, dict[str, Any]] = field(default_factory=dict)
    show_progress: bool = True

    def store(self, mode: str = "a"):
        """This stage's zarr group."""
        self.workdir.stage_dir(self.name).mkdir(parents=True, exist_ok=True)
        return store.open_group(self.workdir.stage_store(self.name), mode=mode)

    def input_store(self, name: str):
        """An upstream stage's zarr group, read-only."""
        return store.open_group(self.workdir.stage_store(name), mode="r")

    def progress(self, total: int | None, unit: str, desc: str | None = None) -> tqdm:
        """A progress bar (rows or steps done, rate and ETA) on stderr."""
        return tqdm(
            total=total,
            unit=unit,
            unit_scale=True,
            desc=desc or self.name,
            file=sys.stderr,
            disable=not self.show_progress,
            mininterval=0.5,
            leave=True,
            dynamic_ncols=True,
        )


def _canonical(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str)


def config_value(config: Config, dotted: str) -> Any:
    """The value of ``section.key`` in ``config``."""
    section, key = dotted.split(".")
    return getattr(getattr(config, section), key)


def input_fingerprint(path: str | Path) -> dict[str, Any]:
    """Size, modification time and a hash of sampled bytes of an input file or store.

    For a directory (a zarr store) the sorted list of file names, sizes and times is hashed.
    """
    path = Path(path)
    digest = hashlib.sha256()
    if path.is_dir():
        files = sorted(p for p in path.rglob("*") if p.is_file())
        for p in files:
            st = p.stat()
            digest.update(f"{p.relative_to(path)}:{st.st_size}:{st.st_mtime_ns};".encode())
        return {"kind": "directory", "files": len(files), "sha256": digest.hexdigest()}
    st = path.stat()
    with open(path, "rb") as fh:
        for offset in _sample_offsets(st.st_size):
            fh.seek(offset)
            digest.update(fh.read(SAMPLE_BYTES))
    return {"kind": "file", "size": st.st_size, "mtime_ns": st.st_mtime_ns, "sha256": digest.hexdigest()}


def _sample_offsets(size: int) -> list[int]:
    if size <= 4 * SAMPLE_BYTES:
        return [0] if size <= SAMPLE_BYTES else list(range(0, size, SAMPLE_BYTES))
    return [0, size // 3, (2 * size) // 3, max(0, size - SAMPLE_BYTES)]


def stage_fingerprint(stage: Stage, config: Config, upstream: dict[str, str], extra: Any) -> str:
    """Hash of everything a stage's output depends on."""
    payload = {
        "stage": stage.name,
        "version": stage.version,
        "package": __version__,
        "settings": {key: config_value(config, key) for key in stage.config_keys},
        "inputs": {name: upstream[name] for name in stage.inputs},
        "extra": extra,
    }
    return hashlib.sha256(_canonical(payload).encode()).hexdigest()[:24]


def peak_memory_bytes() -> dict[str, int]:
    """Peak resident memory of this process and of its finished children (OS accounting)."""
    scale = 1 if sys.platform == "darwin" else 1024
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * scale
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * scale
    return {"driver": own, "largest_child": children}


def versions() -> dict[str, str]:
    """Versions of Python and of the libraries that shape the numbers."""
    import dask
    import numpy
    import pynndescent
    import scipy
    import sklearn
    import zarr

    return {
        "eigenstream": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "dask": dask.__version__,
        "zarr": zarr.__version__,
        "pynndescent": getattr(pynndescent, "__version__", "unknown"),
        "scikit-learn": sklearn.__version__,
    }


def stages() -> tuple[Stage, ...]:
    """The stages in the order data flows through them."""
    from eigenstream.stages import affinity, extend, neighbors, read, report, solve

    return tuple(module.STAGE for module in (read, neighbors, affinity, solve, extend, report))


@contextmanager
def _run_record(workdir: Workdir, config: Config) -> Iterator[dict[str, Any]]:
    started = time.time()
    record = {
        "state": "running",
        "config": config.to_dict(),
        "seed": config.run.seed,
        "versions": versions(),
        "host": platform.node(),
        "pid": os.getpid(),
        "started": started,
        "error": None,
    }
    workdir.write_run(record)
    try:
        yield record
    except BaseException as exc:
        state = "interrupted" if isinstance(exc, KeyboardInterrupt) else "failed"
        workdir.update_run(state=state, error=str(exc) or type(exc).__name__, finished=time.time())
        raise


def run_pipeline(
    config: Config | dict | str | Path,
    *,
    overrides: list[str] | tuple[str, ...] = (),
    show_progress: bool = True,
    fresh: bool = False,
) -> Path:
    """Run every stage of ``config`` in its work directory and return the directory.

    Finished stages whose fingerprints still match are reused. ``fresh=True`` discards
    everything an earlier run left in the work directory first (and says what).
    """
    from eigenstream.stages.read import preflight

    config = coerce_config(config, overrides)
    preflight(config)
    workdir = Workdir(config.run.workdir)
    workdir.create()
    with workdir.locked():
        if fresh:
            _discard(workdir)
        else:
            _refuse_other_input(workdir, config)
        _execute(workdir, config, show_progress)
    return workdir.path


def _discard(workdir: Workdir) -> None:
    names = [s.name for s in stages() if workdir.stage_dir(s.name).exists()]
    files = [f for f in OUTPUT_FILES if (workdir.path / f).exists()]
    if names or files:
        log.info("--fresh: discarding %s in %s", ", ".join(names + files), workdir.path)
    for name in names:
        workdir.clear_stage(name)
    for name in files:
        (workdir.path / name).unlink()


def _refuse_other_input(workdir: Workdir, config: Config) -> None:
    record = workdir.read_run()
    if not record:
        return
    previous = record.get("config", {}).get("input", {}).get("path")
    if previous and previous != config.input.path:
        raise CheckpointError(
            f"Work directory {str(workdir.path)!r} holds a run of another input ({previous}); "
            "rerun with --fresh to discard it, or choose another `[run] workdir`."
        )


def _execute(workdir: Workdir, config: Config, show_progress: bool) -> None:
    from eigenstream.cluster import make_client

    with _run_record(workdir, config) as record:
        timings: dict[str, float] = {}
        fingerprints: dict[str, str] = {}
        summaries: dict[str, dict[str, Any]] = {}
        with make_client(config.cluster) as client:
            record["cluster"] = {"kind": config.cluster.kind, "dashboard": client.dashboard_link}
            workdir.write_run(record)
            for stage in stages():
                extra = input_fingerprint(config.input.path) if not stage.inputs else None
                fp = stage_fingerprint(stage, config, fingerprints, extra)
                fingerprints[stage.name] = fp
                state = workdir.stage_state(stage.name)
                if state and state.get("state") == "done" and state.get("fingerprint") == fp:
                    log.info("stage %s: reusing finished output", stage.name)
                    summaries[stage.name] = state.get("summary", {})
                    timings[stage.name] = state.get("seconds", 0.0)
                    continue
                ctx = StageContext(config, workdir, client, stage.name, summaries, show_progress)
                with _storage_errors(stage.name, workdir):
                    summaries[stage.name], timings[stage.name] = _run_stage(stage, ctx, fp)
        record.update(
            state="complete",
            finished=time.time(),
            timings=timings,
            fingerprints=fingerprints,
            peak_memory=peak_memory_bytes(),
        )
        workdir.write_run(record)


@contextmanager
def _storage_errors(name: str, workdir: Workdir) -> Iterator[None]:
    """Turn a full disk or a read-only file system into a one-line CheckpointError."""
    try:
        yield
    except OSError as exc:
        if isinstance(exc, EigenstreamError) or exc.errno not in _STORAGE_ERRNOS:
            raise
        raise CheckpointError(
            f"Cannot write stage {name!r} in {str(workdir.path)!r}: {exc.strerror or exc}; "
            "free space (or fix permissions) and run the same command again: finished stages "
            "are kept."
        ) from None


def _run_stage(stage: Stage, ctx: StageContext, fp: str) -> tuple[dict[str, Any], float]:
    ctx.workdir.clear_stage(stage.name)
    ctx.workdir.write_stage_state(stage.name, {"state": "partial", "fingerprint": fp})
    t0 = time.perf_counter()
    summary = stage.run(ctx)
    seconds = time.perf_counter() - t0
    ctx.workdir.write_stage_state(
        stage.name,
        {"state": "done", "fingerprint": fp, "summary": summary, "seconds": seconds},
    )
    log.info("stage %s: done in %.1f s", stage.name, seconds)
    return summary, seconds


def status(workdir: str | Path) -> dict[str, Any]:
    """What a work directory holds: per-stage state, and the results when complete."""
    wd = Workdir(workdir)
    record = wd.read_run()
    if record is None:
        raise_missing(wd)
    names = [s.name for s in stages()]
    states = {}
    for name in names:
        st = wd.stage_state(name)
        states[name] = st.get("state", "pending") if st else "pending"
    complete = record.get("state") == "complete" and all(v == "done" for v in states.values())
    out: dict[str, Any] = {
        "workdir": str(wd.path.resolve()),
        "complete": complete,
        "state": record.get("state"),
        "error": record.get("error"),
        "stages": states,
        "timings": record.get("timings", {}),
        "peak_memory": record.get("peak_memory"),
        "rows": None,
        "components": record.get("config", {}).get("embedding", {}).get("components"),
        "eigenvalues": [],
        "residuals": [],
    }
    read_state = wd.stage_state("read")
    if read_state and read_state.get("state") == "done":
        out["rows"] = read_state["summary"].get("rows")
    solve_state = wd.stage_state("solve")
    if solve_state and solve_state.get("state") == "done":
        summary = solve_state["summary"]
        out["eigenvalues"] = summary.get("eigenvalues", [])
        out["residuals"] = summary.get("residuals", [])
        out["matvecs"] = summary.get("matvecs")
    aff_state = wd.stage_state("affinity")
    if aff_state and aff_state.get("state") == "done":
        out["graph"] = {k: aff_state["summary"].get(k) for k in ("nnz", "connected_components")}
    return out


def raise_missing(wd: Workdir) -> None:
    if not wd.path.exists():
        raise CheckpointError(f"Work directory {str(wd.path)!r} does not exist; check the path.")
    raise CheckpointError(
        f"{str(wd.path)!r} holds no eigenstream run (no run.json); "
        "point to the `[run] workdir` of a run."
    )


__all__ = ["EigenstreamError", "Stage", "StageContext", "run_pipeline", "status", "stages"]

"""Stage order, fingerprints, reuse of finished stages and the run record.

A stage is reused only when its ``stage.json`` says ``done`` and its fingerprint (a hash of
the stage's name and version, the config keys it reads, its inputs' fingerprints and the
package version) equals the one computed now. Otherwise its outputs are cleared and it runs.
The run record (``run.json``) says ``complete`` only after every stage is done.
"""

from __future__ import annotations

import dataclasses
import errno
import hashlib
import json
import logging
import os
import platform
import resource
import signal
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tqdm.auto import tqdm

from eigenstream import __version__, allocator
from eigenstream.checkpoint import STOP, stop_on_signals, verified_blocks
from eigenstream.config import Config, coerce_config
from eigenstream.errors import CheckpointError, EigenstreamError
from eigenstream.io import store
from eigenstream.workdir import Workdir

log = logging.getLogger(__name__)

SAMPLE_BYTES = 1 << 20
OUTPUT_FILES = (
    "run.json", "manifest.json", "report.html", "map.png", "map-season.png", "spectrum.png"
)
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
    resuming: bool = False
    verify_all: bool = False

    def store(self, mode: str = "a"):
        """This stage's zarr group (opened for appending when the stage is resuming)."""
        self.workdir.stage_dir(self.name).mkdir(parents=True, exist_ok=True)
        if self.resuming and mode == "w":
            mode = "a"
        return store.open_group(self.workdir.stage_store(self.name), mode=mode)

    def array(self, group, name: str, *, shape: tuple[int, ...], chunk_rows: int, dtype):
        """An output array: the existing one when resuming with the same layout, else new."""
        if self.resuming and name in group:
            arr = group[name]
            if tuple(arr.shape) == tuple(shape) and arr.chunks[0] == min(chunk_rows, max(shape[0], 1)):
                return arr
        return store.create_array(group, name, shape=shape, chunk_rows=chunk_rows, dtype=dtype)

    def finished_blocks(self, arrays) -> dict[int, dict[str, Any]]:
        """Markers of blocks already written (verified; empty unless resuming)."""
        if not self.resuming:
            return {}
        return verified_blocks(self.workdir, self.name, arrays, full=self.verify_all)

    def mark_block(self, block: int, start: int, stop: int, crc: int, **info: Any) -> None:
        """Record block ``block`` (rows start:stop, checksum crc) as written."""
        if not self.config.run.checkpoints:
            return
        self.workdir.mark_block(
            self.name, block,
            {"start": start, "stop": stop, "crc": crc, "written": time.time(), "pid": os.getpid(),
             **info},
        )
        fault_point(self.name, self.workdir.stage_dir(self.name))

    def collect_blocks(self, tasks, ranges, finished, *, desc: str | None = None) -> None:
        """Run row-block tasks returning (start, stop, crc) and record each as it finishes.

        ``tasks`` lists ``(block number, submit)``, ``submit()`` starting the block's task and
        returning its future; at most :func:`eigenstream.budget.blocks_in_flight` of them are
        outstanding at once, the next submitted as one finishes (a dict future -> block
        number of tasks already submitted is taken as it is). Each block is marked as soon as
        its task finishes and its result released (so a lost worker does not make dask
        recompute it); progress counts rows, finished ones included.
        """
        from distributed import as_completed

        from eigenstream.budget import blocks_in_flight

        waiting = [] if isinstance(tasks, dict) else list(tasks)[::-1]
        numbers = dict(tasks) if isinstance(tasks, dict) else {}
        pending = as_completed(list(numbers))

        def submit_more() -> None:
            # the cluster's threads are asked again each time: job-queue workers come and go
            limit = blocks_in_flight(sum(self.client.nthreads().values())) if waiting else 0
            while waiting and len(numbers) < limit:
                number, submit = waiting.pop()
                future = submit()
                numbers[future] = number
                pending.add(future)

        with self.progress(ranges[-1][1] if ranges else 0, "rows", desc=desc) as bar:
            bar.update(sum(e - s for i, (s, e) in enumerate(ranges) if i in finished))
            submit_more()
            for fut in pending:
                s, e, crc = fut.result()
                self.mark_block(numbers.pop(fut), s, e, crc)
                fut.release()
                bar.update(e - s)
                self.check_stop(f"rows {s + 1}-{e}")
                submit_more()

    def set_blocks_total(self, total: int) -> None:
        """Tell ``status`` how many blocks this stage has."""
        state = self.workdir.stage_state(self.name) or {}
        state["blocks_total"] = total
        self.workdir.write_stage_state(self.name, state)

    def check_stop(self, where: str) -> None:
        """Stop here (after a finished block) if SIGINT/SIGTERM was received."""
        STOP.check(f"{where} of stage {self.name}")

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


_FAULTS: dict[str, int] = {}


def fault_point(stage: str, folder: Path) -> None:
    """Crash-test hooks, inert unless their environment variable is set.

    ``EIGENSTREAM_KILL_AT="stage:k"`` kills this process with SIGKILL right after the k-th
    checkpoint (block marker, or Lanczos checkpoint for ``solve``) it writes in that stage;
    ``"stage-start:1"`` kills it when the stage starts (after its state says partial).
    ``EIGENSTREAM_PAUSE_AFTER_BLOCK="stage:k"`` instead creates ``<stage>/paused`` there and
    waits (at most 120 s) for SIGINT/SIGTERM, so a test can signal a run at a known point.
    """
    kill = _fault_due("EIGENSTREAM_KILL_AT", stage)
    pause = _fault_due("EIGENSTREAM_PAUSE_AFTER_BLOCK", stage)
    if kill:
        os.kill(os.getpid(), signal.SIGKILL)
    if pause:
        (folder / "paused").touch()
        deadline = time.monotonic() + 120
        while not STOP.requested and time.monotonic() < deadline:
            time.sleep(0.02)


def _fault_due(variable: str, stage: str) -> bool:
    name, _, count = os.environ.get(variable, "").partition(":")
    if name != stage:
        return False
    key = f"{variable}:{stage}"
    _FAULTS[key] = _FAULTS.get(key, 0) + 1
    return _FAULTS[key] == int(count or 1)


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


def stage_depends(stage: Stage, config: Config, upstream: dict[str, str], extra: Any) -> dict:
    """Everything a stage's output depends on, as plain JSON."""
    return json.loads(_canonical({
        "stage": stage.name,
        "version": stage.version,
        "package": __version__,
        "settings": {key: config_value(config, key) for key in stage.config_keys},
        "inputs": {name: upstream[name] for name in stage.inputs},
        "extra": extra,
    }))


def fingerprint(depends: dict) -> str:
    """Short hash of a :func:`stage_depends` payload."""
    return hashlib.sha256(_canonical(depends).encode()).hexdigest()[:24]


def rerun_reason(old: dict | None, new: dict) -> str:
    """One line saying why a stage's stored output no longer fits the settings."""
    if not old:
        return "its earlier output has no record of its settings"
    changed = [
        f"`[{k.split('.')[0]}] {k.split('.')[1]}` {old['settings'].get(k)!r} -> {v!r}"
        for k, v in new["settings"].items()
        if old.get("settings", {}).get(k) != v
    ]
    if old.get("extra") != new.get("extra"):
        changed.append("the input file changed (size, time or content)")
    inputs = [k for k, v in new["inputs"].items() if old.get("inputs", {}).get(k) != v]
    if inputs:
        changed.append("its input stage " + ", ".join(inputs) + " changed")
    if old.get("package") != new.get("package") or old.get("version") != new.get("version"):
        changed.append("eigenstream's version changed")
    return "; ".join(changed) or "its settings changed"


def peak_memory_bytes() -> dict[str, int]:
    """Peak resident memory of this process and of its finished children (OS accounting)."""
    scale = 1 if sys.platform == "darwin" else 1024
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * scale
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * scale
    return {"driver": own, "largest_child": children}


def versions() -> dict[str, str]:
    """Versions of Python and of the libraries that shape the numbers.

    Read from the installed packages' metadata: importing pynndescent (and with it numba)
    only to ask its version would cost the driver a second and ~100 MiB.
    """
    from importlib.metadata import PackageNotFoundError, version

    def installed(name: str) -> str:
        try:
            return version(name)
        except PackageNotFoundError:
            return "unknown"

    return {
        "eigenstream": __version__,
        "python": platform.python_version(),
        **{name: installed(name)
           for name in ("numpy", "scipy", "dask", "zarr", "pynndescent", "scikit-learn")},
    }


def stages() -> tuple[Stage, ...]:
    """The stages in the order data flows through them."""
    from eigenstream.stages import (
        affinity,
        extend,
        landmarks,
        neighbors,
        prep,
        quality,
        read,
        report,
        solve,
    )

    order = (read, prep, landmarks, neighbors, affinity, solve, extend, quality, report)
    return tuple(module.STAGE for module in order)


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
        stopped = isinstance(exc, KeyboardInterrupt) or type(exc).__name__ == "Interrupted"
        state = "interrupted" if stopped else "failed"
        try:
            workdir.update_run(state=state, error=str(exc) or type(exc).__name__,
                               finished=time.time())
        except OSError:
            pass  # a full disk: run.json still says "running", never "complete"
        raise


def run_pipeline(
    config: Config | dict | str | Path,
    *,
    overrides: list[str] | tuple[str, ...] = (),
    show_progress: bool = True,
    fresh: bool = False,
    verify_all: bool = False,
) -> Path:
    """Run every stage of ``config`` in its work directory and return the directory.

    Finished stages whose fingerprints still match are reused. ``fresh=True`` discards
    everything an earlier run left in the work directory first (and says what);
    ``verify_all=True`` reads back every finished block of an unfinished stage before
    trusting it (by default only the newest one is read back).
    """
    from eigenstream.stages.read import preflight

    config = coerce_config(config, overrides)
    n_rows, n_columns = preflight(config)
    log.info("input: %s; work directory: %s", config.input.path, config.run.workdir)
    workdir = Workdir(config.run.workdir)
    workdir.create()
    with workdir.locked(), stop_on_signals():
        if fresh:
            _discard(workdir)
        else:
            _refuse_other_input(workdir, config)
        config = _resolve_chunk_rows(workdir, config, n_rows, n_columns)
        _execute(workdir, config, show_progress, verify_all)
    return workdir.path


def _resolve_chunk_rows(workdir: Workdir, config: Config, n_rows: int, n_columns: int) -> Config:
    """``config`` with ``[run] chunk_rows`` as the number every stage uses (and fingerprints).

    ``"auto"`` keeps the block size of the run already in the work directory when it still
    fits the budget, so a resumed run reuses its finished stages (:mod:`eigenstream.budget`).
    """
    from eigenstream.budget import resolve_chunk_rows

    earlier = ((workdir.read_run() or {}).get("config") or {}).get("run", {}).get("chunk_rows")
    earlier = earlier if isinstance(earlier, int) and not isinstance(earlier, bool) else None
    rows = resolve_chunk_rows(config, n_rows, n_columns, earlier=earlier)
    return dataclasses.replace(config, run=dataclasses.replace(config.run, chunk_rows=rows))


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


def _execute(workdir: Workdir, config: Config, show_progress: bool, verify_all: bool) -> None:
    from eigenstream.cluster import make_client
    from eigenstream.warmup import compile_ahead

    with _run_record(workdir, config) as record, allocator.returning_memory():
        timings: dict[str, float] = {}
        fingerprints: dict[str, str] = {}
        summaries: dict[str, dict[str, Any]] = {}
        with (make_client(config.cluster, config.run.memory_limit) as client,
              compile_ahead(client, workdir, config)):
            record["cluster"] = {"kind": config.cluster.kind, "dashboard": client.dashboard_link}
            workdir.write_run(record)
            for stage in stages():
                extra = input_fingerprint(config.input.path) if not stage.inputs else None
                depends = stage_depends(stage, config, fingerprints, extra)
                fp = fingerprints[stage.name] = fingerprint(depends)
                state = workdir.stage_state(stage.name)
                if state and state.get("state") == "done" and state.get("fingerprint") == fp:
                    log.info("stage %s: reusing finished output", stage.name)
                    summaries[stage.name] = state.get("summary", {})
                    timings[stage.name] = state.get("seconds", 0.0)
                    continue
                ctx = StageContext(config, workdir, client, stage.name, summaries, show_progress,
                                   verify_all=verify_all)
                with _storage_errors(stage.name, workdir):
                    summaries[stage.name], timings[stage.name] = _run_stage(
                        stage, ctx, depends, state
                    )
                allocator.after_stage()
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


def _run_stage(
    stage: Stage, ctx: StageContext, depends: dict, previous: dict | None
) -> tuple[dict[str, Any], float]:
    fp = fingerprint(depends)
    earlier = 0.0
    if previous and previous.get("state") == "partial" and previous.get("fingerprint") == fp:
        ctx.resuming = True
        earlier = float(previous.get("seconds_before", 0.0))
        log.info("stage %s: continuing the unfinished work", stage.name)
    else:
        if previous:
            log.info("stage %s: recomputing: %s", stage.name,
                     rerun_reason(previous.get("depends"), depends))
        ctx.workdir.clear_stage(stage.name)
        ctx.workdir.write_stage_state(
            stage.name, {"state": "partial", "fingerprint": fp, "depends": depends}
        )
    fault_point(f"{stage.name}-start", ctx.workdir.stage_dir(stage.name))
    t0 = time.perf_counter()
    try:
        summary = stage.run(ctx)
    except BaseException:
        state = ctx.workdir.stage_state(stage.name) or {}
        state["seconds_before"] = earlier + time.perf_counter() - t0
        ctx.workdir.write_stage_state(stage.name, state)
        raise
    seconds = earlier + time.perf_counter() - t0
    ctx.workdir.write_stage_state(
        stage.name,
        {"state": "done", "fingerprint": fp, "depends": depends, "summary": summary,
         "seconds": seconds, "resumed": ctx.resuming, "finished_at": time.time()},
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
    states, blocks = {}, {}
    for name in names:
        st = wd.stage_state(name)
        states[name] = st.get("state", "pending") if st else "pending"
        if st and st.get("state") == "partial":
            blocks[name] = {"done": len(wd.done_blocks(name)), "total": st.get("blocks_total")}
    complete = record.get("state") == "complete" and all(v == "done" for v in states.values())
    out: dict[str, Any] = {
        "workdir": str(wd.path.resolve()),
        "complete": complete,
        "state": record.get("state"),
        "error": record.get("error"),
        "stages": states,
        "blocks": blocks,
        "up_to_date": _up_to_date(wd, record),
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
        out["eigenvectors_kept"] = summary.get("eigenvectors_kept")
        out["candidate_harmonic_residuals"] = summary.get("candidate_harmonic_residuals")
    quality_state = wd.stage_state("quality")
    if quality_state and quality_state.get("state") == "done":
        out["quality"] = quality_state["summary"]
    aff_state = wd.stage_state("affinity")
    if aff_state and aff_state.get("state") == "done":
        out["graph"] = {k: aff_state["summary"].get(k) for k in ("nnz", "connected_components")}
    nb_state = wd.stage_state("neighbors")
    if nb_state and nb_state.get("state") == "done":
        out["neighbors"] = {k: v for k, v in nb_state["summary"].items() if k.endswith("seconds")}
    return out


def expected_fingerprints(config: Config) -> dict[str, str]:
    """The fingerprint every stage would have if ``config`` ran now."""
    out: dict[str, str] = {}
    for stage in stages():
        extra = input_fingerprint(config.input.path) if not stage.inputs else None
        out[stage.name] = fingerprint(stage_depends(stage, config, out, extra))
    return out


def _up_to_date(wd: Workdir, record: dict[str, Any]) -> dict[str, bool] | None:
    """Per stage: does its stored fingerprint match the run's config and input file now?"""
    try:
        config = Config.from_dict(record["config"])
        expected = expected_fingerprints(config)
    except (EigenstreamError, OSError, KeyError):
        return None
    out = {}
    for name, fp in expected.items():
        st = wd.stage_state(name)
        out[name] = bool(st) and st.get("fingerprint") == fp
    return out


def raise_missing(wd: Workdir) -> None:
    if not wd.path.exists():
        raise CheckpointError(f"Work directory {str(wd.path)!r} does not exist; check the path.")
    raise CheckpointError(
        f"{str(wd.path)!r} holds no eigenstream run (no run.json); "
        "point to the `[run] workdir` of a run."
    )


__all__ = ["EigenstreamError", "Stage", "StageContext", "run_pipeline", "status", "stages"]

"""The work directory: the single source of truth of a run.

Layout::

    WORKDIR/
      run.json              resolved config, versions, seed, state, timings
      lock                  holder host + pid while a run writes here
      <stage>/stage.json    fingerprint, state (partial | done), summary, timings
      <stage>/data.zarr     the stage's arrays
      <stage>/markers/      one JSON file per finished row block
      manifest.json, map.png, spectrum.png

Every JSON file is written to a temporary name and renamed into place, so a reader never
sees half a file. Only runners (``eigenstream.stages``) and the pipeline touch this.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from eigenstream.errors import CheckpointError
from eigenstream.io.atomic import atomic_path

log = logging.getLogger(__name__)

RUN_FILE = "run.json"
LOCK_FILE = "lock"
STAGE_FILE = "stage.json"


def write_json_atomic(path: Path, obj: Any) -> None:
    """Write ``obj`` as JSON to ``path`` through a temporary file and a rename."""
    with atomic_path(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        json.dump(obj, fh, indent=2, sort_keys=True, default=_json_default)
        fh.flush()
        os.fsync(fh.fileno())


def _json_default(obj: Any) -> Any:
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot store {type(obj).__name__} in JSON")


def read_json(path: Path) -> dict[str, Any] | None:
    """Return the JSON object stored at ``path``, or None when the file does not exist."""
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except (FileNotFoundError, NotADirectoryError):
        return None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise CheckpointError(
            f"{path} is damaged ({exc}); rerun with --fresh to start this work directory again."
        ) from None


LOCK_HEARTBEAT = 30.0
LOCK_STALE = 120.0


def _heartbeat(lock: Path, stop: threading.Event) -> None:
    while not stop.wait(LOCK_HEARTBEAT):
        try:
            os.utime(lock)
        except OSError:
            return


def _stale(lock: Path, holder: dict, host: str) -> bool:
    """Is the lock left by a process that is gone (this host) or silent (another host)?"""
    if holder.get("host") == host:
        return not _pid_alive(int(holder.get("pid", -1)))
    try:
        age = time.time() - lock.stat().st_mtime
    except OSError:
        return True
    return age > LOCK_STALE


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class Workdir:
    """Paths and atomic bookkeeping of one run's work directory.

    Parameters
    ----------
    path : path-like
        The directory; created by :meth:`create`.
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)

    def __repr__(self) -> str:
        return f"Workdir({str(self.path)!r})"

    # -- creation and the run record -------------------------------------------------
    def create(self) -> None:
        """Create the directory (with the user's umask) and check it is writable."""
        if self.path.exists() and not self.path.is_dir():
            raise CheckpointError(
                f"Work directory {str(self.path)!r} exists and is not a directory; "
                "choose another `[run] workdir`."
            )
        try:
            self.path.mkdir(parents=True, exist_ok=True)
            probe = self.path / ".write-probe"
            probe.write_text("ok")
            probe.unlink()
        except OSError as exc:
            raise CheckpointError(
                f"Cannot write to work directory {str(self.path)!r} ({exc.strerror}); "
                "choose a writable `[run] workdir`."
            ) from None

    @property
    def run_file(self) -> Path:
        return self.path / RUN_FILE

    def read_run(self) -> dict[str, Any] | None:
        """The run record, or None when this directory holds no run."""
        return read_json(self.run_file)

    def write_run(self, record: dict[str, Any]) -> None:
        write_json_atomic(self.run_file, record)

    def update_run(self, **fields: Any) -> dict[str, Any]:
        """Merge ``fields`` into the run record and store it."""
        record = self.read_run() or {}
        record.update(fields)
        self.write_run(record)
        return record

    # -- stages --------------------------------------------------------------------
    def stage_dir(self, name: str) -> Path:
        return self.path / name

    def stage_store(self, name: str) -> Path:
        """Path of the zarr group holding a stage's arrays."""
        return self.stage_dir(name) / "data.zarr"

    def stage_state(self, name: str) -> dict[str, Any] | None:
        return read_json(self.stage_dir(name) / STAGE_FILE)

    def write_stage_state(self, name: str, state: dict[str, Any]) -> None:
        self.stage_dir(name).mkdir(parents=True, exist_ok=True)
        write_json_atomic(self.stage_dir(name) / STAGE_FILE, state)

    def clear_stage(self, name: str) -> None:
        """Delete a stage's outputs (never following a link out of the work directory)."""
        target = self.stage_dir(name)
        if target.is_symlink():
            target.unlink()
        elif target.exists():
            shutil.rmtree(target)

    # -- block markers ---------------------------------------------------------------
    def marker_dir(self, name: str) -> Path:
        return self.stage_dir(name) / "markers"

    def mark_block(self, name: str, block: int, info: dict[str, Any]) -> None:
        """Record that row block ``block`` of stage ``name`` is written (after its data)."""
        folder = self.marker_dir(name)
        folder.mkdir(parents=True, exist_ok=True)
        write_json_atomic(folder / f"{block:08d}.json", {"block": block, **info})

    def done_blocks(self, name: str) -> set[int]:
        """Indices of the row blocks of ``name`` whose markers exist."""
        folder = self.marker_dir(name)
        if not folder.is_dir():
            return set()
        return {int(p.stem) for p in folder.glob("*.json") if p.stem.isdigit()}

    # -- the lock --------------------------------------------------------------------
    @contextmanager
    def locked(self) -> Iterator[None]:
        """Hold the work directory's lock for the duration of a ``with`` block.

        The holder refreshes the lock's modification time every ``LOCK_HEARTBEAT`` seconds.
        A lock is stale, and taken over with a message, when its process no longer exists on
        this host, or when it was written on another host (a killed batch job's node) and has
        not been refreshed for ``LOCK_STALE`` seconds.
        """
        lock = self.path / LOCK_FILE
        me = {"host": socket.gethostname(), "pid": os.getpid(), "since": time.time()}
        for _ in range(2):
            try:
                fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = read_json(lock) or {}
                if _stale(lock, holder, me["host"]):
                    log.warning("taking over the stale lock of process %s on host %s",
                                holder.get("pid"), holder.get("host"))
                    lock.unlink(missing_ok=True)
                    continue
                raise CheckpointError(
                    f"Work directory {str(self.path)!r} is in use by process {holder.get('pid')} "
                    f"on host {holder.get('host')}; wait for it to finish or choose another "
                    "`[run] workdir`."
                ) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            break
        stop = threading.Event()
        beat = threading.Thread(target=_heartbeat, args=(lock, stop), daemon=True)
        beat.start()
        try:
            yield
        finally:
            stop.set()
            lock.unlink(missing_ok=True)

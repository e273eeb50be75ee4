"""Block-level checkpoints: markers with checksums, their verification, and clean stops.

A row block counts as finished only when its data is written and then its marker (with a
CRC32 of the bytes written) is renamed into place. On resume, markers are verified: by default
the newest marker of each stage is checked against the stored bytes (the block most likely to
have been caught by a crash) and every marked chunk must exist; with ``--verify`` every marked
block is read back. A damaged block loses its marker and is recomputed.
"""

from __future__ import annotations

import logging
import signal
import threading
import zlib
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from typing import Any

import numpy as np

from eigenstream.errors import EigenstreamError

log = logging.getLogger(__name__)


class Interrupted(EigenstreamError):
    """The run was asked to stop (SIGINT/SIGTERM) and stopped after a finished block."""

    exit_code = 130


class StopFlag:
    """Set by the first SIGINT/SIGTERM; runners check it between blocks."""

    def __init__(self) -> None:
        self.requested: str | None = None

    def check(self, where: str) -> None:
        """Raise :class:`Interrupted` when a stop was requested."""
        if self.requested:
            raise Interrupted(
                f"Stopped on {self.requested} after {where}; finished blocks are kept. Run the "
                "same command again to continue."
            )


STOP = StopFlag()


@contextmanager
def stop_on_signals() -> Iterator[StopFlag]:
    """Turn the first SIGINT/SIGTERM into a stop request; a second one stops at once."""
    STOP.requested = None
    if threading.current_thread() is not threading.main_thread():
        yield STOP
        return

    def handler(signum, frame):
        name = signal.Signals(signum).name
        if STOP.requested:
            raise KeyboardInterrupt(name)
        STOP.requested = name
        log.warning("%s received: stopping after the current block (send again to stop now)", name)

    previous = {sig: signal.signal(sig, handler) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield STOP
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


def block_checksum(arrays: Sequence[Any], start: int, stop: int) -> int:
    """CRC32 of rows ``start:stop`` of every array, in order (numpy or zarr arrays)."""
    crc = 0
    for arr in arrays:
        crc = zlib.crc32(np.ascontiguousarray(np.asarray(arr[start:stop])).tobytes(), crc)
    return crc


def values_checksum(values: Sequence[np.ndarray]) -> int:
    """CRC32 of in-memory blocks, equal to :func:`block_checksum` of the same bytes stored."""
    crc = 0
    for v in values:
        crc = zlib.crc32(np.ascontiguousarray(v).tobytes(), crc)
    return crc


def _chunks_present(arrays: Sequence[Any], start: int, stop: int) -> bool:
    """True when every stored chunk covering rows start:stop exists (a cheap check)."""
    from pathlib import Path

    for arr in arrays:
        root = getattr(arr.store, "root", None)
        if root is None or stop <= start:
            continue
        rows = arr.chunks[0]
        tail = "/0" * (arr.ndim - 1)
        for i in range(start // rows, (stop - 1) // rows + 1):
            if not (Path(root) / f"{arr.path}/c/{i}{tail}").is_file():
                return False
    return True


def verified_blocks(workdir, stage: str, arrays: Sequence[Any], *, full: bool) -> dict[int, dict]:
    """Markers of ``stage`` whose blocks still hold the bytes they were written with.

    Parameters
    ----------
    workdir : Workdir
    stage : str
    arrays : sequence of zarr arrays
        The arrays each block wrote, in the order their checksum covers.
    full : bool
        Check every marked block (``--verify``); otherwise only the newest one.
    """
    from eigenstream.workdir import read_json

    folder = workdir.marker_dir(stage)
    markers = {}
    for block in sorted(workdir.done_blocks(stage)):
        markers[block] = read_json(folder / f"{block:08d}.json") or {}
    if not markers:
        return {}
    newest = max(markers, key=lambda b: markers[b].get("written", 0.0))
    for block in list(markers):
        info = markers[block]
        start, stop = info.get("start"), info.get("stop")
        try:
            if full or block == newest:
                ok = block_checksum(arrays, start, stop) == info.get("crc")
            else:
                ok = _chunks_present(arrays, start, stop)
        except Exception as exc:  # a damaged chunk fails its CRC32C codec on read
            log.debug("reading block %d of %s failed: %s", block, stage, exc)
            ok = False
        if not ok:
            log.warning(
                "stage %s: block %d (rows %s-%s) is damaged; recomputing it",
                stage, block, start, stop,
            )
            (folder / f"{block:08d}.json").unlink(missing_ok=True)
            del markers[block]
    return markers

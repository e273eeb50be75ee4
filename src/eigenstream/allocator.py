"""Giving freed memory back to the operating system during a run (glibc's malloc only).

glibc serves an allocation from its heap unless it is at least the "mmap threshold", which
starts at 128 KiB and grows to the size of any mapped block freed (up to 32 MiB). After the
first large temporary is freed, later ones of tens of MiB come from the heap, and what they
leave behind stays resident in holes no later request fits. A run's stages allocate and free
arrays of many other sizes, so the process's resident memory climbed stage after stage while
the memory in use stayed flat (200,000 x 50 bench sheet, measured: 88 MiB of live numpy arrays
between stages against 343 -> 432 -> 511 -> 563 MiB resident; whole-run peak 0.73 GiB).

During a run this module fixes the threshold at :data:`RETURN_FROM`, so every array of that
size or more has its own mapping, returned when freed, and trims the heap after each stage.
Loops that free and allocate the same large temporaries many times (eigensolver iterations)
run inside :func:`reusing`, where blocks come from the heap again and are trimmed after:
mapping fresh pages for every temporary made the LOBPCG solve 1.5-1.8x slower (measured,
same sheet). Elsewhere (macOS, musl) every function here does nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import threading
from collections.abc import Iterator
from contextlib import contextmanager

# mallopt parameter number (glibc's malloc.h).
_M_MMAP_THRESHOLD = -3
# Arrays from this size up are mapped on their own and unmapped when freed.
RETURN_FROM = 1 << 20
# Threshold inside `reusing`: blocks up to this size come from (and return to) the heap.
REUSE_UP_TO = 256 << 20
# glibc's own upper bound of its dynamic threshold on 64-bit, left in place after a run.
_GLIBC_DYNAMIC_MAX = 32 << 20

_lock = threading.Lock()
_state = {"active": 0}
# Thresholds of the open `reusing` scopes, innermost last.
_reuse_stack: list[int] = []


def _libc():
    try:
        lib = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None
    if not (hasattr(lib, "mallopt") and hasattr(lib, "malloc_trim")):
        return None
    return lib


_LIBC = _libc()


def available() -> bool:
    """Whether this process's malloc can be steered (glibc)."""
    return _LIBC is not None


def _threshold(size: int) -> None:
    if _LIBC is not None:
        _LIBC.mallopt(_M_MMAP_THRESHOLD, int(size))


def trim() -> None:
    """Return the free parts of malloc's heaps to the operating system."""
    if _LIBC is not None:
        _LIBC.malloc_trim(0)


@contextmanager
def returning_memory() -> Iterator[None]:
    """Scope of a run: large arrays are unmapped when freed (see the module text).

    On leaving, the threshold is set to 32 MiB (the largest value glibc's own adjustment
    reaches) and the heap is trimmed.
    """
    with _lock:
        _state["active"] += 1
        _threshold(RETURN_FROM)
    try:
        yield
    finally:
        with _lock:
            _state["active"] -= 1
            if not _state["active"]:
                _threshold(_GLIBC_DYNAMIC_MAX)
        trim()


@contextmanager
def reusing(up_to: int = REUSE_UP_TO) -> Iterator[None]:
    """A loop that reallocates the same temporaries: let those up to ``up_to`` bytes come
    from the heap.

    Does nothing outside :func:`returning_memory`; an inner block's end restores the outer
    block's threshold, and the outermost block's end trims the heap.
    """
    with _lock:
        active = bool(_state["active"])
        if active:
            _reuse_stack.append(up_to)
            _threshold(up_to)
    if not active:
        yield
        return
    try:
        yield
    finally:
        with _lock:
            _reuse_stack.pop()
            done = not _reuse_stack
            if _state["active"]:
                _threshold(RETURN_FROM if done else _reuse_stack[-1])
        if done:
            trim()


def after_stage() -> None:
    """Trim the heap between stages of a run (nothing outside :func:`returning_memory`)."""
    if _state["active"]:
        trim()

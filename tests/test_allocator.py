"""Returning freed memory to the operating system (glibc's malloc).

Outside reference: glibc's mallopt(3) and malloc_trim(3) manual pages (M_MMAP_THRESHOLD: blocks
at or above it are mapped on their own and unmapped on free; below it they come from the heap,
where a freed block under a live one is not given back until malloc_trim). Resident memory is
read from the kernel's /proc/self/statm (proc(5)).
"""

from __future__ import annotations

import os
import sys

import numpy as np
import pytest

from eigenstream import allocator

pytestmark = pytest.mark.skipif(
    not (sys.platform.startswith("linux") and allocator.available()),
    reason="needs glibc's malloc on Linux",
)

MIB = 1 << 20


def _resident() -> int:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _left_resident(size: int) -> int:
    """Resident bytes left after freeing a touched block of ``size`` below a live one."""
    before = _resident()
    lower = np.ones(size, dtype=np.uint8)  # touched: every page resident
    upper = np.ones(size, dtype=np.uint8)  # allocated after, above it on the heap
    del lower
    left = _resident() - before - size  # minus the live upper block
    del upper
    return left


def test_a_freed_block_stays_resident_under_a_grown_threshold():
    # Control for the tests below: with the threshold glibc grows to on its own (32 MiB) a
    # 24 MiB block comes from the heap and stays resident when freed below a live block.
    allocator._threshold(32 * MIB)
    try:
        assert _left_resident(24 * MIB) > 16 * MIB
    finally:
        allocator.trim()


def test_within_a_run_freed_blocks_go_back_at_once():
    allocator._threshold(32 * MIB)  # the state an earlier large free leaves behind
    with allocator.returning_memory():
        assert _left_resident(24 * MIB) < 4 * MIB


def test_reusing_keeps_blocks_on_the_heap_and_trims_after():
    allocator._threshold(32 * MIB)
    with allocator.returning_memory():
        before = _resident()
        with allocator.reusing(up_to=64 * MIB):
            assert _left_resident(24 * MIB) > 16 * MIB  # reused from the heap, not unmapped
        assert _resident() - before < 8 * MIB  # trimmed when the loop ends
        assert _left_resident(24 * MIB) < 4 * MIB  # back to returning


def test_outside_a_run_reusing_changes_nothing():
    allocator._threshold(32 * MIB)
    with allocator.reusing(up_to=1 * MIB):  # would map 24 MiB blocks if it acted
        assert _left_resident(24 * MIB) > 16 * MIB
    allocator.trim()


def test_an_inner_reusing_block_gives_the_outer_threshold_back():
    allocator._threshold(32 * MIB)
    with allocator.returning_memory():
        with allocator.reusing(up_to=64 * MIB):
            with allocator.reusing(up_to=1 * MIB):  # maps 24 MiB blocks while it lasts
                assert _left_resident(24 * MIB) < 4 * MIB
            assert _left_resident(24 * MIB) > 16 * MIB  # the outer block's reuse again

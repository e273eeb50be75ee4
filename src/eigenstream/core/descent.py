"""pynndescent's NN-descent build with the squared Euclidean distance fixed, so numba caches it.

pynndescent passes the distance function to its NN-descent core as an argument; numba embeds
the address of such an argument in the compiled code and refuses to cache it, so every fresh
process compiles the core again (35-60 s of one core on the project's machine). This module
holds a copy of that core (pynndescent 0.7.0, ``pynndescent_.py``: ``nn_descent``,
``nn_descent_internal``, ``process_candidates``, ``init_rp_tree``, ``generate_leaf_updates``,
``init_random``) in which the distance is the module-level ``squared_euclidean`` and candidate
updates always take pynndescent's batched squared-Euclidean kernel, in update blocks sized by
memory (:func:`update_block_rows`; pynndescent uses 16,384 rows); everything else (heaps,
candidate building, update sorting, the kernel itself, the random-projection forest and all
parameter choices of ``NNDescent``) is pynndescent's own, called unchanged. With the distance
fixed, numba caches the whole compiled core on disk, once per machine.

:func:`install` routes ``pynndescent.pynndescent_.nn_descent`` through :func:`routed`, which
calls the cached copy exactly when ``NNDescent`` would run the copied path (dense float32 rows,
squared Euclidean distance, no initial graph) and pynndescent's original otherwise. The cosine
metric reaches the cached path through :func:`eigenstream.core.neighbors.approximate_knn`,
which searches unit rows with the Euclidean metric.

The copied code is under pynndescent's licence:

    Copyright (c) 2018, Leland McInnes. All rights reserved.

    Redistribution and use in source and binary forms, with or without modification, are
    permitted provided that the following conditions are met: (1) Redistributions of source
    code must retain the above copyright notice, this list of conditions and the following
    disclaimer. (2) Redistributions in binary form must reproduce the above copyright notice,
    this list of conditions and the following disclaimer in the documentation and/or other
    materials provided with the distribution.

    THIS SOFTWARE IS PROVIDED BY THE COPYRIGHT HOLDERS AND CONTRIBUTORS "AS IS" AND ANY
    EXPRESS OR IMPLIED WARRANTIES, INCLUDING, BUT NOT LIMITED TO, THE IMPLIED WARRANTIES OF
    MERCHANTABILITY AND FITNESS FOR A PARTICULAR PURPOSE ARE DISCLAIMED. IN NO EVENT SHALL THE
    COPYRIGHT HOLDER OR CONTRIBUTORS BE LIABLE FOR ANY DIRECT, INDIRECT, INCIDENTAL, SPECIAL,
    EXEMPLARY, OR CONSEQUENTIAL DAMAGES (INCLUDING, BUT NOT LIMITED TO, PROCUREMENT OF
    SUBSTITUTE GOODS OR SERVICES; LOSS OF USE, DATA, OR PROFITS; OR BUSINESS INTERRUPTION)
    HOWEVER CAUSED AND ON ANY THEORY OF LIABILITY, WHETHER IN CONTRACT, STRICT LIABILITY, OR
    TORT (INCLUDING NEGLIGENCE OR OTHERWISE) ARISING IN ANY WAY OUT OF THE USE OF THIS
    SOFTWARE, EVEN IF ADVISED OF THE POSSIBILITY OF SUCH DAMAGE.

Import this module only after :func:`eigenstream.warmup.use_numba_cache_dir` (numba reads
its cache folder when the first cached function is compiled).
"""

from __future__ import annotations

import numba
import numpy as np
import pynndescent
from pynndescent import pynndescent_
from pynndescent import utils as _utils
from pynndescent.distances import squared_euclidean
from pynndescent.kernels import KERNEL_SQEUCLIDEAN, generate_graph_update_array_batched
from pynndescent.utils import (
    EMPTY_GRAPH,
    apply_graph_update_array,
    apply_sorted_graph_update_array,
    checked_flagged_heap_push,
    int32_bits_as_float32,
    make_heap,
    sort_updates_by_block,
    tau_rand_int,
)

# The pynndescent release this copy follows; tests compare the two builds.
COPIED_FROM = "0.7.0"

_ORIGINAL = pynndescent_.nn_descent

# pynndescent's rows per candidate-update block, and the bytes we allow its update buffers.
PYNNDESCENT_BLOCK_ROWS = 16384
UPDATE_BUFFER_BYTES = 48 << 20


def _cached(function):
    """The same pynndescent function compiled into a new dispatcher that numba may cache."""
    options = {key: value for key, value in function.targetoptions.items() if key != "nopython"}
    options["cache"] = True
    return numba.njit(**options)(function.py_func)


build_candidates_owner = _cached(_utils.build_candidates_owner)
deheap_sort = _cached(_utils.deheap_sort)


@numba.njit(parallel=True, cache=True, fastmath=True)
def _leaf_updates(updates, n_updates_per_thread, leaf_block, current_graph, data, n_threads):
    n_leaves = leaf_block.shape[0]
    leaves_per_thread = (n_leaves // n_threads) + 1
    heap_distances = current_graph[1]
    for t in range(n_threads):
        n_updates_per_thread[t] = 0
    for t in numba.prange(n_threads):
        start_leaf = t * leaves_per_thread
        end_leaf = min(start_leaf + leaves_per_thread, n_leaves)
        max_updates = updates.shape[1]
        count = 0
        for leaf_idx in range(start_leaf, end_leaf):
            for i in range(leaf_block.shape[1]):
                p = leaf_block[leaf_idx, i]
                if p < 0:
                    break
                for j in range(i + 1, leaf_block.shape[1]):
                    q = leaf_block[leaf_idx, j]
                    if q < 0:
                        break
                    d = squared_euclidean(data[p], data[q])
                    max_threshold = max(heap_distances[p, 0], heap_distances[q, 0])
                    if d < max_threshold and count < max_updates:
                        updates[t, count, 0] = int32_bits_as_float32(p)
                        updates[t, count, 1] = int32_bits_as_float32(q)
                        updates[t, count, 2] = d
                        count += 1
        n_updates_per_thread[t] = count
    return updates


@numba.njit(locals={"d": numba.float32, "p": numba.int32, "q": numba.int32}, cache=True,
            parallel=True, fastmath=True)
def _init_from_leaves(data, current_graph, leaf_array, n_threads):
    n_leaves = leaf_array.shape[0]
    block_size = n_threads * 64
    n_blocks = n_leaves // block_size
    max_leaf_size = leaf_array.shape[1]
    updates_per_thread = (
        int(block_size * max_leaf_size * (max_leaf_size - 1) / (2 * n_threads)) + 1
    )
    updates = np.zeros((n_threads, updates_per_thread, 3), dtype=np.float32)
    n_updates_per_thread = np.zeros(n_threads, dtype=np.int32)
    sorted_updates = np.empty((n_threads, 2 * updates_per_thread, 3), dtype=np.float32)
    block_offsets = np.zeros((n_threads, n_threads + 1), dtype=np.int64)
    n_vertices = current_graph[0].shape[0]
    for i in range(n_blocks + 1):
        block_start = i * block_size
        block_end = min(n_leaves, (i + 1) * block_size)
        leaf_block = leaf_array[block_start:block_end]
        _leaf_updates(updates, n_updates_per_thread, leaf_block, current_graph, data, n_threads)
        sort_updates_by_block(
            updates, n_updates_per_thread, sorted_updates, block_offsets, n_vertices, n_threads
        )
        apply_sorted_graph_update_array(current_graph, sorted_updates, block_offsets, n_threads)


@numba.njit(fastmath=True, locals={"d": numba.float32, "idx": numba.int32, "i": numba.int32},
            cache=True)
def _init_random(n_neighbors, data, heap, rng_state):
    for i in range(data.shape[0]):
        if heap[0][i, 0] < 0.0:
            for _ in range(n_neighbors - np.sum(heap[0][i] >= 0.0)):
                idx = np.abs(tau_rand_int(rng_state)) % data.shape[0]
                if data.shape[0] > 1:
                    while idx == i:
                        idx = np.abs(tau_rand_int(rng_state)) % data.shape[0]
                d = squared_euclidean(data[idx], data[i])
                checked_flagged_heap_push(heap[1][i], heap[0][i], heap[2][i], d, idx, np.uint8(1))


@numba.njit(cache=True)
def _process_candidates(data, current_graph, new_candidate_neighbors, old_candidate_neighbors,
                        n_blocks, block_size, n_threads, update_array, n_updates_per_thread,
                        sorted_updates, block_offsets):
    c = 0
    n_vertices = new_candidate_neighbors.shape[0]
    for i in range(n_blocks + 1):
        block_start = i * block_size
        block_end = min(n_vertices, (i + 1) * block_size)
        generate_graph_update_array_batched(
            update_array, n_updates_per_thread, new_candidate_neighbors[block_start:block_end],
            old_candidate_neighbors[block_start:block_end], current_graph, data,
            KERNEL_SQEUCLIDEAN, n_threads,
        )
        if n_threads > 1:
            sort_updates_by_block(update_array, n_updates_per_thread, sorted_updates,
                                  block_offsets, n_vertices, n_threads)
            c += apply_sorted_graph_update_array(current_graph, sorted_updates, block_offsets,
                                                 n_threads)
        else:
            c += apply_graph_update_array(current_graph, update_array, n_updates_per_thread,
                                          n_threads)
    return c


@numba.njit(cache=True)
def _iterate(current_graph, data, n_neighbors, rng_state, max_candidates, n_iters, delta,
             n_threads, block_size):
    n_vertices = data.shape[0]
    n_blocks = n_vertices // block_size
    max_updates_per_thread = (
        int((max_candidates**2 + max_candidates * (max_candidates - 1) / 2)
            * block_size / n_threads)
        + 1024
    )
    update_array = np.empty((n_threads, max_updates_per_thread, 3), dtype=np.float32)
    n_updates_per_thread = np.zeros(n_threads, dtype=np.int32)
    if n_threads > 1:
        sorted_updates = np.empty((n_threads, 2 * max_updates_per_thread, 3), dtype=np.float32)
    else:
        sorted_updates = np.empty((1, 1, 3), dtype=np.float32)
    block_offsets = np.zeros((n_threads, n_threads + 1), dtype=np.int64)
    new_candidate_indices = np.full((n_vertices, max_candidates), -1, dtype=np.int32)
    new_candidate_priority = np.full((n_vertices, max_candidates), np.inf, dtype=np.float32)
    old_candidate_indices = np.full((n_vertices, max_candidates), -1, dtype=np.int32)
    old_candidate_priority = np.full((n_vertices, max_candidates), np.inf, dtype=np.float32)
    active = np.ones(n_vertices, dtype=np.uint8)
    reverse_dst = np.empty(n_vertices * n_neighbors, dtype=np.int32)
    reverse_src = np.empty(n_vertices * n_neighbors, dtype=np.int32)
    bucket_bounds = np.zeros((n_threads, n_threads + 1), dtype=np.int64)
    for _ in range(n_iters):
        new_candidate_neighbors, old_candidate_neighbors = build_candidates_owner(
            current_graph, max_candidates, rng_state, n_threads, new_candidate_indices,
            new_candidate_priority, old_candidate_indices, old_candidate_priority, active,
            reverse_dst, reverse_src, bucket_bounds,
        )
        c = _process_candidates(
            data, current_graph, new_candidate_neighbors, old_candidate_neighbors, n_blocks,
            block_size, n_threads, update_array, n_updates_per_thread, sorted_updates,
            block_offsets,
        )
        if c <= delta * n_neighbors * data.shape[0]:
            return


@numba.njit(cache=True)
def descend(data, n_neighbors, rng_state, max_candidates, n_iters, delta, leaf_array,
            n_threads, block_size=PYNNDESCENT_BLOCK_ROWS):
    """NN-descent from a random-projection forest's leaves, squared Euclidean distance.

    Parameters
    ----------
    data : ndarray of float32, shape (n, D), C-contiguous
    n_neighbors : int
        Neighbours per row, the row itself included.
    rng_state : ndarray of int64, shape (3,)
        pynndescent's random state; advanced in place.
    max_candidates : int
    n_iters : int
    delta : float
        Stop when fewer than ``delta * n_neighbors * n`` heap entries change in an iteration.
    leaf_array : ndarray of int32, shape (leaves, leaf size)
        Leaves of the initialisation forest, padded with -1.
    n_threads : int
        ``numba.get_num_threads()`` of the caller (the work is split into this many parts;
        reading it inside compiled code would keep numba from caching it).
    block_size : int
        Rows whose candidate updates are generated and applied together (pynndescent:
        16,384); the update buffers grow with it (see :func:`update_block_rows`).

    Returns
    -------
    indices : ndarray of int32, shape (n, n_neighbors)
    squared_distances : ndarray of float32, shape (n, n_neighbors)
        Sorted by ascending distance.
    """
    current_graph = make_heap(data.shape[0], n_neighbors)
    _init_from_leaves(data, current_graph, leaf_array, n_threads)
    _init_random(n_neighbors, data, current_graph, rng_state)
    _iterate(current_graph, data, n_neighbors, rng_state, max_candidates, n_iters, delta,
             n_threads, block_size)
    return deheap_sort(current_graph[0], current_graph[1])


def update_block_rows(max_candidates: int) -> int:
    """Rows per NN-descent update block so that the update buffers stay near 48 MiB.

    The buffers hold ``3 x (c^2 + c(c - 1)/2)`` float32 triples per block row (one update
    array and its sorted copy, twice its size) for ``c = max_candidates``: 222 MiB at
    pynndescent's 16,384 rows and c = 16, set once before the first iteration. Smaller blocks
    only apply the same updates in smaller batches (200k rows, k = 15: stage peak 481 -> 458 MiB,
    same recall, same search time). Never more than pynndescent's own 16,384 rows.
    """
    per_row = 3 * 12 * (max_candidates**2 + max_candidates * (max_candidates - 1) / 2)
    rows = int(UPDATE_BUFFER_BYTES // max(per_row, 1))
    return max(256, min(PYNNDESCENT_BLOCK_ROWS, rows))


def routed(data, n_neighbors, rng_state, max_candidates=50, dist=squared_euclidean, n_iters=10,
           delta=0.001, init_graph=EMPTY_GRAPH, rp_tree_init=True, leaf_array=None,
           low_memory=True, verbose=False, kernel=0):
    """``pynndescent_.nn_descent`` with the cached :func:`descend` where it applies.

    Same parameters and result as pynndescent's function; calls its original whenever the
    distance, data layout, initial graph or options differ from the copied path.
    """
    copied_path = (
        dist is squared_euclidean
        and kernel == KERNEL_SQEUCLIDEAN
        and rp_tree_init
        and leaf_array is not None
        and init_graph[0].shape[0] == 1
        and not verbose
    )
    if not copied_path:
        return _ORIGINAL(data, n_neighbors, rng_state, max_candidates, dist, n_iters, delta,
                         init_graph=init_graph, rp_tree_init=rp_tree_init,
                         leaf_array=leaf_array, low_memory=low_memory, verbose=verbose,
                         kernel=kernel)
    return descend(data, n_neighbors, rng_state, max_candidates, n_iters, delta, leaf_array,
                   numba.get_num_threads(), update_block_rows(max_candidates))


def install() -> bool:
    """Make ``pynndescent.NNDescent`` build through :func:`routed` in this process (idempotent).

    Returns
    -------
    bool
        True when routed; False when the installed pynndescent is not the release this copy
        follows (its own build is then used, compiled in every process).
    """
    if pynndescent.__version__ != COPIED_FROM:
        return False
    pynndescent_.nn_descent = routed  # one assignment: safe from several threads
    return True


__all__ = ["COPIED_FROM", "descend", "install", "routed", "update_block_rows"]

"""Memory needed by a run, estimated before any work starts, against ``[run] memory_limit``.

The driver holds the graph stages' arrays in memory (graph rows = all rows, or the landmarks);
the other stages work in row blocks. The estimate is deliberately simple and errs high: it adds
the largest arrays each stage holds at once (bytes per element from their dtypes; pynndescent's
build ~40 bytes per row per neighbour, measured, see docs/storage.md).

The same figures size the row blocks: with ``[run] chunk_rows = "auto"`` a block has as many
rows as let every worker hold its blocks in flight within a fixed fraction of its share of the
memory (:func:`resolve_chunk_rows`), and the driver keeps the graph in memory only within its
own share (:func:`driver_graph_bytes`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

from eigenstream.config import Config, memory_bytes
from eigenstream.core.neighbors import PAIR_BLOCK, SUPPORT_ENTRY_BYTES, support_block_rows
from eigenstream.errors import ConfigError

log = logging.getLogger(__name__)

_GIB = 1 << 30
_MIB = 1 << 20
_SCRATCH = 64 << 20  # exact search scratch per query block (core.neighbors._BLOCK_BYTES)
_EXTRA_CANDIDATES = 8  # core.neighbors._EXTRA_CANDIDATES

# Row-block tasks outstanding per worker thread: the one being computed and the next one, so a
# thread does not wait for the driver to hand it work (common practice for task queues).
IN_FLIGHT_PER_THREAD = 2
# A worker's blocks, scratch and own process stay within this fraction of its share: dask's
# default `spill` threshold of process memory (0.7); it pauses a worker at 0.8 and kills it at
# 0.95, so this leaves room for what the model does not count.
BLOCK_FRACTION = 0.7
# A worker process holds this much before any block: Python, numpy, scipy, zarr, dask and the
# stage modules (measured: 138-148 MiB per worker process, psutil RSS). Thread workers live in
# the driver's process and add nothing.
WORKER_PROCESS_BYTES = 150 << 20
# The solve stage keeps the graph in memory only within this fraction of the driver's memory;
# the rest holds the eigensolver's basis and the product vectors (common practice: half).
DRIVER_GRAPH_FRACTION = 0.5
# A derived block smaller than this is refused: per-block costs (a task, a zarr chunk, a
# marker) would dominate the work (common practice).
MIN_CHUNK_ROWS = 1000
# "auto" never goes above the former fixed default: larger blocks gain little and make each
# checkpoint (one block) costlier to redo after an interruption.
MAX_AUTO_CHUNK_ROWS = 50_000


@dataclass(frozen=True)
class WorkerShare:
    """Memory of one worker for row blocks.

    ``bytes`` shared by its ``threads``, ``process`` of it taken by the worker process
    itself; ``option`` is the setting it is a ``parts``-th of and ``source`` says so in
    words.
    """

    bytes: int
    threads: int
    option: str
    parts: int
    source: str
    process: int = WORKER_PROCESS_BYTES


def available_bytes() -> int:
    """Memory this machine can give the run now (available RAM, within cgroup/rlimit caps)."""
    import psutil
    from distributed.system import MEMORY_LIMIT

    return int(min(psutil.virtual_memory().available, MEMORY_LIMIT))


def total_bytes(config: Config) -> int:
    """``[run] memory_limit`` in bytes; for ``"auto"`` the memory available now."""
    limit = memory_bytes(config.run.memory_limit)
    return limit if limit is not None else available_bytes()


def _limit_text(config: Config) -> str:
    text = config.run.memory_limit
    if text == "auto":
        return f'`[run] memory_limit` = "auto" ({available_bytes() / _GIB:.2f} GiB available)'
    return f"`[run] memory_limit` = {text!r}"


def worker_share(config: Config) -> WorkerShare:
    """The memory one worker has for row blocks, and its threads.

    Local workers split the run's memory equally (as :mod:`eigenstream.cluster` does);
    job-queue workers have ``[cluster] memory`` per job over its processes, but the driver
    reads blocks too, so the run's memory caps it; workers of a running scheduler were started
    elsewhere, so the run's memory is taken as one worker's.
    """
    from eigenstream.cluster import local_worker_count

    cluster = config.cluster
    total = total_bytes(config)
    threads = cluster.threads_per_worker
    if cluster.kind == "local":
        workers = local_worker_count(cluster)
        source = f"{_limit_text(config)} over {workers} local worker{'s' * (workers > 1)}"
        process = WORKER_PROCESS_BYTES if cluster.processes is True else 0
        return WorkerShare(total // workers, threads, "`[run] memory_limit`", workers, source,
                           process)
    if cluster.kind in cluster.JOB_QUEUE_KINDS:
        per_job = cluster.processes_per_job
        share = cluster.memory_bytes() // per_job
        if share <= total:
            source = f"`[cluster] memory` = {cluster.memory!r} over {per_job} processes per job"
            return WorkerShare(share, threads, "`[cluster] memory`", per_job, source)
    return WorkerShare(total, threads, "`[run] memory_limit`", 1, _limit_text(config))


def row_bytes(config: Config, n_columns: int) -> int:
    """Bytes one row takes in a row block.

    Its values, features and coordinates (three float64 copies of the widest) and its
    candidate lists (indices and distances of 3k+1 neighbours, the coordinates).
    """
    dim = config.prep.pca_components or n_columns
    k = config.graph.neighbors
    c = config.embedding.components
    return max(n_columns, dim) * 8 * 3 + (3 * k + 1 + c) * 16


def exact_search_bytes(reference_rows: int, dim: int, k: int, query_rows: int) -> int:
    """Peak bytes of an exact search of ``query_rows`` rows among ``reference_rows`` rows.

    Two float64 copies of the reference rows in the search and two in the stage that loads
    them; per query sub-block (core/neighbors.py: at most 4096 rows, each array at most
    64 MiB) two (sub, n) distance arrays and two (sub, k + 8, dim) difference arrays. Fitted
    to numpy's allocations traced with tracemalloc for 3,000-20,000 reference rows of 10-1,000
    columns (within 10 %, above it where it differs).
    """
    width = (k + _EXTRA_CANDIDATES) * dim
    sub = max(1, min(query_rows, 4096, _SCRATCH // (8 * max(reference_rows, width, 1))))
    return 4 * reference_rows * dim * 8 + 2 * 8 * sub * (reference_rows + width)


def support_search_bytes(reference_rows: int, dim: int, query_rows: int) -> int:
    """Peak bytes of placing ``query_rows`` rows against ``reference_rows`` rows.

    The reference rows as loaded, centred (float64) and for ranking (float32); per query
    sub-block (core/neighbors.py ``support_block_rows``) the float32 ranking scratch, and the
    float64 differences of one slice of candidate pairs. Checked against numpy's allocations
    traced with tracemalloc (bench data, 3,000-50,000 reference rows of 10-300 columns).
    """
    sub = min(max(1, query_rows), support_block_rows(reference_rows))
    return (3 * reference_rows * dim * 8 + SUPPORT_ENTRY_BYTES * sub * reference_rows
            + 3 * PAIR_BLOCK * dim * 8)


def block_scratch_bytes(config: Config, n_rows: int, rows: int, n_columns: int) -> int:
    """Bytes a running block task needs besides its rows (for blocks of ``rows`` rows).

    Landmark mode: placing the block against the landmarks (:func:`support_search_bytes`).
    Full graph with exact neighbours: the neighbour stage's exact search of the block against
    all rows. Approximate search: none (its one task is the "neighbour search"
    part of :func:`estimate`).
    """
    dim = config.prep.pca_components or n_columns
    k = config.graph.neighbors
    if config.landmarks.count:
        return support_search_bytes(config.landmarks.count, dim, rows)
    from eigenstream.stages.neighbors import choose_method

    if choose_method(config, n_rows) != "exact":
        return 0
    return exact_search_bytes(n_rows, dim, k, rows)


def blocks_in_flight(threads: int) -> int:
    """How many row-block tasks may be outstanding at once on workers with ``threads`` threads."""
    return IN_FLIGHT_PER_THREAD * max(1, threads)


def worker_need(config: Config, n_rows: int, n_columns: int, rows: int, threads: int) -> int:
    """Bytes a worker with ``threads`` threads needs for its blocks of ``rows`` rows in flight.

    :func:`blocks_in_flight` blocks of :func:`row_bytes` per row, plus one
    :func:`block_scratch_bytes` per thread (the worker process itself not included).
    """
    return (blocks_in_flight(threads) * rows * row_bytes(config, n_columns)
            + threads * block_scratch_bytes(config, n_rows, rows, n_columns))


def derived_chunk_rows(config: Config, n_rows: int, n_columns: int) -> tuple[int, str]:
    """Rows per block that fit the memory budget for ``n_rows`` x ``n_columns``, and why.

    The most rows whose :func:`worker_need`, with the worker process itself, stays within
    ``BLOCK_FRACTION`` of the worker's share, rounded down to 1, 2 or 5 times a power of ten
    (so small changes of the available memory give the same number) and capped at
    ``MAX_AUTO_CHUNK_ROWS``.

    Raises
    ------
    ConfigError
        If fewer than ``MIN_CHUNK_ROWS`` rows fit.
    """
    share = worker_share(config)
    room = BLOCK_FRACTION * share.bytes - share.process

    def fits(rows: int) -> bool:
        return worker_need(config, n_rows, n_columns, rows, share.threads) <= room

    in_flight = blocks_in_flight(share.threads)
    if not fits(MIN_CHUNK_ROWS):
        need = worker_need(config, n_rows, n_columns, MIN_CHUNK_ROWS, share.threads)
        total = (need + share.process) / BLOCK_FRACTION * share.parts
        local = config.cluster.kind == "local" and share.parts > 1
        process = f" + {share.process / _MIB:.0f} MiB the worker process" if share.process else ""
        raise ConfigError(
            f"{share.source} leaves {share.bytes / _MIB:.0f} MiB per worker, too little for "
            f"{in_flight} blocks of {MIN_CHUNK_ROWS} rows x {n_columns} columns in flight "
            f"({need / _MIB:.0f} MiB{process}); raise {share.option} to at least "
            f"{total / _GIB:.2f} GiB"
            + (" or lower `[cluster] workers`." if local else ".")
        )
    low, high = MIN_CHUNK_ROWS, 10 * MAX_AUTO_CHUNK_ROWS
    if fits(high):
        low = high
    while high - low > 1:  # the need grows with the rows: bisect for the largest that fits
        mid = (low + high) // 2
        low, high = (mid, high) if fits(mid) else (low, mid)
    chunk = min(MAX_AUTO_CHUNK_ROWS, _round_down(low))
    why = (
        f"{in_flight} blocks in flight per worker, {row_bytes(config, n_columns)} bytes per "
        f"row, with the search scratch and the worker process within {BLOCK_FRACTION:.0%} of "
        f"{share.bytes / _MIB:.0f} MiB per worker, from {share.source}"
        + (f"; capped at {MAX_AUTO_CHUNK_ROWS}" if _round_down(low) > MAX_AUTO_CHUNK_ROWS else "")
    )
    return chunk, why


def _round_down(rows: int) -> int:
    """The largest of 1, 2, 5 x 10^j not above ``rows`` (``rows`` >= 1)."""
    power = 10 ** (len(str(int(rows))) - 1)
    return next(step * power for step in (5, 2, 1) if step * power <= rows)


def resolve_chunk_rows(
    config: Config, n_rows: int, n_columns: int, *, earlier: int | None = None
) -> int:
    """Rows per block for a run of ``n_rows`` x ``n_columns``: ``[run] chunk_rows`` resolved.

    An integer setting is returned as it is. For ``"auto"`` the size comes from
    :func:`derived_chunk_rows`; ``earlier`` (the block size of the run already in the work
    directory) is kept instead when it still fits, so a resumed run reuses finished stages
    even when the memory available has changed. The choice and its reason are logged.
    """
    value = config.run.chunk_rows
    if value != "auto":
        return value
    rows, why = derived_chunk_rows(config, n_rows, n_columns)
    if earlier is not None and MIN_CHUNK_ROWS <= earlier < rows:
        log.info('`[run] chunk_rows` = "auto": keeping the work directory\'s %d rows per '
                 "block (up to %d fit: %s)", earlier, rows, why)
        return earlier
    log.info('`[run] chunk_rows` = "auto": %d rows per block (%d rows in %d blocks): %s',
             rows, n_rows, -(-n_rows // rows), why)
    return rows


def driver_graph_bytes(config: Config) -> int:
    """Bytes the driver may use to keep the graph in memory in the solve stage.

    ``DRIVER_GRAPH_FRACTION`` of ``[run] memory_limit`` (for ``"auto"``: of the memory
    available now); above it the graph is streamed from disk for every product.
    """
    return int(DRIVER_GRAPH_FRACTION * total_bytes(config))


def estimate(config: Config, n_rows: int, n_columns: int) -> dict[str, int]:
    """Peak bytes of each stage's work in a run with ``n_rows`` x ``n_columns`` input.

    The graph stages run one after another and their memory goes back to the system between
    them (``eigenstream.allocator``), so a run needs the largest of them plus a row block
    (:func:`check`). Measured on the bench sheet (D = 50, k = 15, a 16 GiB limit; resident
    memory of the process minus the ~300 MiB it holds between stages), against the largest
    modelled stage: 200k rows 0.20-0.23 GiB against 0.41, 1M rows 1.02 against 2.07, 4M rows
    4.45 against 8.29 (the eigensolver's part, which counts the union's upper bound of
    2k + 1 entries per row; the bench graph has 17.7).

    Raises
    ------
    ConfigError
        If ``[run] chunk_rows = "auto"`` and no block of ``MIN_CHUNK_ROWS`` rows fits.
    """
    dim = config.prep.pca_components or n_columns
    graph_rows = config.landmarks.count or n_rows
    k = config.graph.neighbors
    c = config.embedding.choose_from or config.embedding.components  # pairs solved
    chunk = config.run.chunk_rows
    if chunk == "auto":
        chunk = derived_chunk_rows(config, n_rows, n_columns)[0]
    block = min(chunk, n_rows)
    basis = max(2 * (c + 3) + 10, 30)
    union_bound = graph_rows * (2 * k + 1)  # stored entries of the symmetric graph, at most
    from eigenstream.stages.neighbors import choose_method
    from eigenstream.stages.solve import LOBPCG_BYTES_PER_NONZERO

    # exact search: two float64 copies of the rows; NN-descent: the table as read
    value_bytes = (16 if choose_method(config, graph_rows) == "exact"
                   else {"float32": 4, "float64": 8}[config.run.dtype])
    return {
        # the rows, and the search's lists and candidate buffers
        "neighbour search": graph_rows * dim * value_bytes + graph_rows * k * (16 + 40),
        # the lists as read, W and the union built from it in row blocks (an upper bound:
        # 20,000-row sheet, k = 15: 18.5 MiB traced against 32.0)
        "affinity (CSR build)": graph_rows * k * 16 + graph_rows * k * 2 * 24 * 2,
        # the graph is kept only within driver_graph_bytes, else streamed from disk
        "eigensolver": min(union_bound * LOBPCG_BYTES_PER_NONZERO, driver_graph_bytes(config))
        + graph_rows * basis * 8,
        # a block of rows, its coordinates and (landmark mode) its candidate lists
        "row block": block * row_bytes(config, n_columns)
        + block_scratch_bytes(config, n_rows, block, n_columns),
    }


def check(config: Config, n_rows: int, n_columns: int) -> None:
    """Refuse, with the figure, settings whose estimate exceeds ``[run] memory_limit``."""
    parts = estimate(config, n_rows, n_columns)
    limit = memory_bytes(config.run.memory_limit)
    if limit is None:
        return
    graph = max(v for name, v in parts.items() if name != "row block")
    need = graph + parts["row block"]
    if need <= limit:
        return
    largest = max(parts, key=parts.get)
    hint = (
        "lower `[landmarks] count`" if config.landmarks.count
        else "set `[landmarks] count` (landmark mode)"
    )
    if largest == "row block" and config.run.chunk_rows != "auto":
        hint = "lower `[run] chunk_rows`"
    raise ConfigError(
        f"This run needs about {need / _GIB:.2f} GiB ({largest}: {parts[largest] / _GIB:.2f} GiB) "
        f"but `[run] memory_limit` is {limit / _GIB:.2f} GiB; {hint} or raise the limit."
    )

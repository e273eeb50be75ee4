"""Memory needed by a run, estimated before any work starts, against ``[run] memory_limit``.

The driver holds the graph stages' arrays in memory (graph rows = all rows, or the landmarks);
the other stages work in row blocks. The estimate is deliberately simple and errs high: it adds
the largest arrays each stage holds at once (bytes per element from their dtypes; pynndescent's
build ~40 bytes per row per neighbour, measured, see docs/storage.md).
"""

from __future__ import annotations

from eigenstream.config import Config, memory_bytes
from eigenstream.errors import ConfigError

_GIB = 1 << 30
_SCRATCH = 64 << 20  # exact search scratch per query block (core.neighbors._BLOCK_BYTES)


def estimate(config: Config, n_rows: int, n_columns: int) -> dict[str, int]:
    """Peak bytes of each part of a run with ``n_rows`` x ``n_columns`` input."""
    dim = config.prep.pca_components or n_columns
    graph_rows = config.landmarks.count or n_rows
    k = config.graph.neighbors
    c = config.embedding.components
    block = min(config.run.chunk_rows, n_rows)
    basis = max(2 * (c + 3) + 10, 30)
    return {
        "graph features": graph_rows * dim * 8 * 2,
        "neighbour search": graph_rows * k * (16 + 40),
        "affinity (CSR build)": graph_rows * k * 2 * 24 * 2,
        "eigensolver basis": graph_rows * basis * 8,
        # a block of rows, its coordinates and (landmark mode) its candidate lists; the
        # exact search's distance scratch is capped at a fixed size (core/neighbors.py)
        "row block": block * max(n_columns, dim) * 8 * 3
        + block * (3 * k + 1 + c) * 16
        + (4 * _SCRATCH if config.landmarks.count else 0),
    }


def check(config: Config, n_rows: int, n_columns: int) -> None:
    """Refuse, with the figure, settings whose estimate exceeds ``[run] memory_limit``."""
    limit = memory_bytes(config.run.memory_limit)
    if limit is None:
        return
    parts = estimate(config, n_rows, n_columns)
    graph = sum(v for name, v in parts.items() if name != "row block")
    need = graph + parts["row block"]
    if need <= limit:
        return
    largest = max(parts, key=parts.get)
    hint = (
        "lower `[landmarks] count`" if config.landmarks.count
        else "set `[landmarks] count` (landmark mode)"
    )
    if largest == "row block":
        hint = "lower `[run] chunk_rows`"
    raise ConfigError(
        f"This run needs about {need / _GIB:.2f} GiB ({largest}: {parts[largest] / _GIB:.2f} GiB) "
        f"but `[run] memory_limit` is {limit / _GIB:.2f} GiB; {hint} or raise the limit."
    )

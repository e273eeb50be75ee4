"""Read stage: stream the input table into ``read/data.zarr`` block by block.

Outputs: ``rows`` (n, columns) in ``[run] dtype``, ``ids`` (when ``[input] id_column`` is set),
``color`` (when ``[map] color_column`` is set), ``mean`` / ``std`` of every column (one pass,
used by ``[prep] standardize``), and ``dropped.json`` listing rows dropped under
``on_bad_rows = "drop"``. A single writer (the driver) fills the arrays in input order.
"""

from __future__ import annotations

import json
import logging
from typing import Any

import numpy as np

from eigenstream import budget
from eigenstream.checkpoint import values_checksum
from eigenstream.config import Config
from eigenstream.core.moments import ColumnMoments
from eigenstream.errors import ConfigError, InputError
from eigenstream.io import store
from eigenstream.io.readers import bad_value_mask, describe_bad_value, open_source
from eigenstream.pipeline import Stage, StageContext

log = logging.getLogger(__name__)


def _extra_columns(config: Config) -> list[str]:
    return [config.map.color_column] if config.map.color_column else []


def preflight(config: Config) -> tuple[int, int]:
    """Check, before any work starts, that the input opens and fits the settings.

    Returns the input's numbers of rows and columns (they size the row blocks).
    """
    with open_source(config.input, extra_columns=_extra_columns(config)) as src:
        check_row_count(config, src.n_rows, str(src.path))
        budget.check(config, src.n_rows, len(src.columns))
        return src.n_rows, len(src.columns)


def check_row_count(config: Config, n_rows: int, where: str) -> None:
    """Refuse settings that cannot work with ``n_rows`` rows."""
    if n_rows == 0:
        raise InputError(f"'{where}' holds no rows; nothing to embed.")
    k = config.graph.neighbors
    if n_rows < k + 1:
        raise InputError(
            f"'{where}' has {n_rows} row{'' if n_rows == 1 else 's'} but `[graph] neighbors` = "
            f"{k} needs at least {k + 1}; "
            "lower `[graph] neighbors` or provide more rows."
        )
    c = config.embedding.components
    if c >= n_rows - 1:
        raise ConfigError(
            f"`[embedding] components` = {c} must be less than the number of rows minus one "
            f"({n_rows - 1} for {where}); lower it."
        )
    m = config.embedding.choose_from
    if m >= n_rows - 1:
        raise ConfigError(
            f"`[embedding] choose_from` = {m} must be less than the number of rows minus one "
            f"({n_rows - 1} for {where}); lower it (or 0)."
        )


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    chunk = config.run.chunk_rows
    dtype = np.dtype(config.run.dtype)
    with open_source(config.input, extra_columns=_extra_columns(config)) as src:
        n, columns = src.n_rows, list(src.columns)
        group = ctx.store(mode="w")
        rows = ctx.array(group, "rows", shape=(n, len(columns)), chunk_rows=chunk, dtype=dtype)
        _warn_missing(src)
        first, kept, dropped = _resume_point(ctx, rows)
        collapsed = 0
        total = len(store.block_ranges(n, chunk))
        ctx.set_blocks_total(total)
        with ctx.progress(n, "rows") as bar:
            bar.update(min(first * chunk, n))
            for number, block in enumerate(src.blocks(chunk, start=first * chunk), start=first):
                values, ids, extra, lost = _clean(block, config, columns, src)
                m = values.shape[0]
                stored = values.astype(dtype, copy=False)
                collapsed += _collapsed_rows(values, stored)
                rows[kept : kept + m] = stored
                _write_side(ctx, group, "ids", ids, kept, n, chunk)
                for col in extra.values():
                    _write_side(ctx, group, "color", col, kept, n, chunk)
                ctx.mark_block(number, kept, kept + m, values_checksum([stored]), dropped=lost)
                dropped.extend(lost)
                kept += m
                bar.update(len(block.values))
                ctx.check_stop(f"block {number + 1} of {total}")
        if collapsed:
            log.warning(
                "'%s': %d rows became identical to another row when stored as %s (they "
                'differ only in digits it cannot hold); set `[run] dtype = "float64"` to keep '
                "them apart", src.path, collapsed, dtype.name,
            )
        if kept < n:
            _shrink(group, kept)
        check_row_count(config, kept, f"{src.path} (after dropping {len(dropped)} bad rows)")
        moments = ColumnMoments(len(columns))
        for s, e in store.block_ranges(kept, chunk):
            moments.update(np.asarray(rows[s:e]))
        store.write_small(group, "mean", moments.mean)
        store.write_small(group, "std", moments.std)
        if dropped:
            (ctx.workdir.stage_dir("read") / "dropped.json").write_text(
                json.dumps({"count": len(dropped), "rows_or_ids": dropped})
            )
        return {
            "rows": kept,
            "input_rows": n,
            "dropped": len(dropped),
            "columns": columns,
            "id_column": config.input.id_column,
            "color_column": config.map.color_column,
            "source": str(src.path),
            "format": src.format,
        }


def _collapsed_rows(values: np.ndarray, stored: np.ndarray) -> int:
    """Rows of a block that distinct input values no longer tell apart after the cast."""
    if stored.dtype == values.dtype or len(values) < 2:
        return 0
    before = len(np.unique(values, axis=0))
    return before - len(np.unique(stored, axis=0))


def _warn_missing(src) -> None:
    gaps = src.missing_rows()
    if gaps:
        spans = ", ".join(f"{a + 1}-{b}" for a, b in gaps[:5]) + (" ..." if len(gaps) > 5 else "")
        log.warning(
            "%s: the chunks holding rows %s are not stored, so they read as the fill value "
            "(%s); restore them if they were lost", src.path, spans,
            getattr(getattr(src, "_array", None), "fill_value", "unknown"),
        )


def _resume_point(ctx: StageContext, rows) -> tuple[int, int, list[Any]]:
    """First block to read, rows already stored, and rows dropped so far (from markers).

    Blocks are written in order by one writer, so the finished ones form a prefix.
    """
    markers = ctx.finished_blocks([rows])
    first, kept, dropped = 0, 0, []
    while first in markers:
        kept = markers[first]["stop"]
        dropped.extend(markers[first].get("dropped", []))
        first += 1
    return first, kept, dropped


def _clean(block, config: Config, columns, src):
    """Drop (or refuse) rows holding NaN/inf; return values, ids, extra and what was dropped."""
    values, ids, extra = block.values, block.ids, block.extra
    bad = bad_value_mask(values)
    if not bad.any():
        return values, ids, extra, []
    if config.run.on_bad_rows == "refuse":
        raise InputError(describe_bad_value(block, columns, src.path, fmt=src.format))
    numbers = block.start + 1 + np.flatnonzero(bad)
    lost = (ids[bad] if ids is not None else numbers).tolist()
    keep = ~bad
    ids = ids[keep] if ids is not None else None
    return values[keep], ids, {k: v[keep] for k, v in extra.items()}, lost


def _write_side(ctx: StageContext, group, name: str, values, at: int, n: int, chunk: int) -> None:
    if values is None:
        return
    values = np.asarray(values)
    if name not in group:
        dtype = str if values.dtype.kind in "OUST" else values.dtype
        store.create_array(group, name, shape=(n,), chunk_rows=chunk, dtype=dtype)
    group[name][at : at + len(values)] = values


def _shrink(group, kept: int) -> None:
    for name in ("rows", "ids", "color"):
        if name in group:
            arr = group[name]
            arr.resize((kept,) + arr.shape[1:])


STAGE = Stage(
    name="read",
    version=1,
    config_keys=(
        "input.path",
        "input.format",
        "input.dataset",
        "input.columns",
        "input.exclude_columns",
        "input.id_column",
        "map.color_column",
        "run.on_bad_rows",
        "run.dtype",
        "run.chunk_rows",
    ),
    inputs=(),
    run=_run,
)

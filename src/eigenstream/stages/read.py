"""Read stage: stream the input table into ``read/data.zarr`` block by block.

Outputs: ``rows`` (n, columns) in ``[run] dtype``, ``ids`` (when ``[input] id_column`` is set),
``color`` (when ``[map] color_column`` is set), ``mean`` / ``std`` of every column (one pass,
used by ``[prep] standardize``), and ``dropped.json`` listing rows dropped under
``on_bad_rows = "drop"``. A single writer (the driver) fills the arrays in input order.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from eigenstream.config import Config
from eigenstream.core.moments import ColumnMoments
from eigenstream.errors import ConfigError, InputError
from eigenstream.io import store
from eigenstream.io.readers import bad_value_mask, describe_bad_value, open_source
from eigenstream.pipeline import Stage, StageContext


def _extra_columns(config: Config) -> list[str]:
    return [config.map.color_column] if config.map.color_column else []


def preflight(config: Config) -> None:
    """Check, before any work starts, that the input opens and fits the settings."""
    with open_source(config.input, extra_columns=_extra_columns(config)) as src:
        check_row_count(config, src.n_rows, str(src.path))


def check_row_count(config: Config, n_rows: int, where: str) -> None:
    """Refuse settings that cannot work with ``n_rows`` rows."""
    if n_rows == 0:
        raise InputError(f"{where} holds no rows; nothing to embed.")
    k = config.graph.neighbors
    if n_rows < k + 1:
        raise InputError(
            f"{where} has {n_rows} rows but `[graph] neighbors` = {k} needs at least {k + 1}; "
            "lower `[graph] neighbors` or provide more rows."
        )
    c = config.embedding.components
    if c >= n_rows - 1:
        raise ConfigError(
            f"`[embedding] components` = {c} must be less than the number of rows minus one "
            f"({n_rows - 1} for {where}); lower it."
        )


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    chunk = config.run.chunk_rows
    dtype = np.dtype(config.run.dtype)
    with open_source(config.input, extra_columns=_extra_columns(config)) as src:
        n, columns = src.n_rows, list(src.columns)
        group = ctx.store(mode="w")
        rows = store.create_array(group, "rows", shape=(n, len(columns)), chunk_rows=chunk, dtype=dtype)
        sinks: dict[str, Any] = {}
        moments = ColumnMoments(len(columns))
        dropped: list[Any] = []
        kept = 0
        with ctx.progress(n, "rows") as bar:
            for block in src.blocks(chunk):
                values, ids, extra = block.values, block.ids, block.extra
                bad = bad_value_mask(values)
                if bad.any():
                    if config.run.on_bad_rows == "refuse":
                        raise InputError(describe_bad_value(block, columns, src.path, fmt=src.format))
                    numbers = block.start + 1 + np.flatnonzero(bad)
                    dropped.extend((ids[bad] if ids is not None else numbers).tolist())
                    keep = ~bad
                    values = values[keep]
                    ids = ids[keep] if ids is not None else None
                    extra = {k: v[keep] for k, v in extra.items()}
                m = values.shape[0]
                rows[kept : kept + m] = values.astype(dtype, copy=False)
                _write_side(group, sinks, "ids", ids, kept, n, chunk)
                for col in extra.values():
                    _write_side(group, sinks, "color", col, kept, n, chunk)
                moments.update(values)
                kept += m
                bar.update(block.values.shape[0])
        if kept < n:
            _shrink(group, kept)
        check_row_count(config, kept, f"{src.path} (after dropping {len(dropped)} bad rows)")
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


def _write_side(group, sinks: dict, name: str, values, at: int, n: int, chunk: int) -> None:
    if values is None:
        return
    values = np.asarray(values)
    if name not in sinks:
        dtype = str if values.dtype.kind in "OUST" else values.dtype
        sinks[name] = store.create_array(group, name, shape=(n,), chunk_rows=chunk, dtype=dtype)
    sinks[name][at : at + len(values)] = values


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

"""``eigenstream place``: put new rows on an existing map with the Nystrom extension.

The new rows are read in blocks, checked to have the run's columns, transformed exactly like the
run's rows (standardisation or scaling, then the stored PCA), and placed against the graph rows
(all rows, or the landmarks) with the same kernel, bandwidth rule and alpha normalisation
(docs/landmarks.md). Coordinates go to a temporary zarr array in the work directory, then to
the output file, so a failure leaves no half-written output.
"""

from __future__ import annotations

import dataclasses
import logging
import shutil
from pathlib import Path

import numpy as np

from eigenstream.api import open_result
from eigenstream.config import Config, InputConfig
from eigenstream.core.pca import PCAModel
from eigenstream.errors import InputError
from eigenstream.io import store
from eigenstream.io.export import export_coordinates
from eigenstream.io.readers import bad_value_mask, describe_bad_value, open_source
from eigenstream.stages.extend import place_block, settings_of, training_state
from eigenstream.stages.features import graph_rows_spec, stored_rows_spec

log = logging.getLogger(__name__)


def _input_config(config: Config, path: Path, fmt: str | None, columns) -> InputConfig:
    tabular = config.input.resolved_format in ("csv", "parquet")
    if not Path(path).exists():
        raise InputError(f"Input file {str(path)!r} not found; check `--input`.")
    new = InputConfig(path=str(Path(path).resolve()), format=fmt)
    if tabular and new.resolved_format in ("csv", "parquet"):
        return dataclasses.replace(new, columns=tuple(columns), id_column=config.input.id_column)
    return new


def _check_columns(src, columns: list[str], path) -> None:
    if len(src.columns) != len(columns) or (
        src.format in ("csv", "parquet") and list(src.columns) != list(columns)
    ):
        raise InputError(
            f"{path} has columns {list(src.columns)[:8]} ({len(src.columns)} in all) but the map "
            f"was built from {columns[:8]} ({len(columns)} in all); give rows with the same columns."
        )


def place_rows(workdir: str | Path, new_input: str | Path, output: str | Path, *,
               fmt: str | None = None, input_format: str | None = None) -> Path:
    """Place the rows of ``new_input`` on the map in ``workdir`` and write them to ``output``."""
    result = open_result(workdir)
    config = Config.from_dict(result.manifest["config"])
    wd = result._wd
    columns = wd.stage_state("read")["summary"]["columns"]
    stored = stored_rows_spec(wd, config)
    graph = graph_rows_spec(wd, config).load().astype(np.float64)
    state = training_state(wd, config.graph.neighbors)
    model = _pca_model(wd) if config.prep.pca_components else None
    settings = settings_of(config)
    unit = stored.unit if config.graph.metric == "euclidean" else 1.0
    temp = wd.path / "place-tmp.zarr"
    try:
        with open_source(_input_config(config, Path(new_input), input_format, columns)) as src:
            _check_columns(src, columns, src.path)
            group = store.open_group(temp, mode="w")
            c = state["psi"].shape[1]
            coords = store.create_array(group, "coordinates", shape=(src.n_rows, c),
                                        chunk_rows=config.run.chunk_rows, dtype=np.float64)
            ids = []
            for block in src.blocks(config.run.chunk_rows):
                if bad_value_mask(block.values).any():
                    raise InputError(describe_bad_value(block, src.columns, src.path,
                                                        fmt=src.format))
                # the same casts as the run's own rows: stored dtype, scaled, float32 PCA
                rows = stored.apply(np.asarray(block.values).astype(config.run.dtype))
                if model is not None:
                    rows = model.transform(rows).astype(np.float32)
                rows = rows.astype(np.float64)
                stop = block.start + len(block.values)
                coords[block.start:stop] = place_block(rows, graph, state, settings, unit)
                if block.ids is not None:
                    ids.append(np.asarray(block.ids))
            all_ids = np.concatenate(ids) if ids else None
            return export_coordinates(coords, output, fmt=fmt, ids=all_ids,
                                      id_name=src.id_name or "id")
    finally:
        shutil.rmtree(temp, ignore_errors=True)


def _pca_model(wd) -> PCAModel:
    group = store.open_group(wd.stage_store("prep"), mode="r")["model"]
    return PCAModel.from_arrays({k: np.asarray(group[k][...]) for k in group.array_keys()})

"""``eigenstream demo``: generate the invented household-load data set and map it end to end."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from eigenstream.api import run
from eigenstream.config import load_config
from eigenstream.demo_data import LABEL_COLUMNS, write_demo_table
from eigenstream.plots import plot_map

log = logging.getLogger(__name__)

DEFAULT_ROWS = 30_000
DEMO_SEED = 7

CONFIG_TEMPLATE = """\
# eigenstream demo: one row per household-day, 96 quarter-hour readings (kW).
[input]
path = "households.parquet"
id_column = "row_id"
exclude_columns = {labels}

[graph]
neighbors = 15

[kernel]
bandwidth = "adaptive"
bandwidth_neighbor = 7
alpha = 1.0

[embedding]
components = 4
diffusion_time = 1

[run]
workdir = "run"
seed = {seed}

[map]
color_column = "group"
"""


def write_demo_inputs(folder: Path, rows: int) -> Path:
    """Write the demo table and its config into ``folder``; return the config path."""
    folder.mkdir(parents=True, exist_ok=True)
    table = folder / "households.parquet"
    expected = None
    if table.exists():
        expected = pq.ParquetFile(table).metadata.num_rows
    if expected != rows:
        log.info("writing %d demo rows to %s", rows, table)
        write_demo_table(table, rows, seed=DEMO_SEED)
    labels = [name for name in LABEL_COLUMNS if name != "row_id"]
    config = folder / "demo.toml"
    text = CONFIG_TEMPLATE.format(labels="[" + ", ".join(f'"{c}"' for c in labels) + "]",
                                  seed=DEMO_SEED)
    config.write_text(text)
    return config


def run_demo(folder: Path, *, rows: int | None = None, progress: bool = True) -> Path:
    """Generate data, run the pipeline, draw a season-coloured map too; return the workdir."""
    rows = DEFAULT_ROWS if rows is None else rows
    config_path = write_demo_inputs(Path(folder), rows)
    result = run(load_config(config_path), progress=progress)
    day = pq.read_table(Path(folder) / "households.parquet", columns=["day_of_year"])
    # The two strongest directions separate chargers and panels; the season loop shows in
    # the next two coordinates, so the season map draws components 3 and 4.
    plot_map(result.coordinates, result.workdir / "map-season.png",
             color=np.asarray(day.column(0)), color_label="day of year",
             title=f"{rows:,} household-days, coloured by day of year", seed=DEMO_SEED,
             components=(3, 4))
    log.info("season map: %s", result.workdir / "map-season.png")
    return result.workdir

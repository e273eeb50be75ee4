"""A table larger than the run's memory limit: completes, peak RSS against the limit.

Usage: .venv/bin/python bench/beyond_memory.py [--rows 16000000] [--columns 64]
                                               [--limit 1GiB] [--count 5000]
                                               [--workers 1] [--table PATH]

Writes a float32 table (16M x 64 = 4 GiB by default) with bench/manifold_data.py, then runs
eigenstream in landmark mode with ``[run] memory_limit`` set, in a fresh process, measuring wall
time and the peak RSS of the whole process tree (driver and dask workers) by polling the OS.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path

from _measure import measure
from dask.utils import parse_bytes
from manifold_data import write_table


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=16_000_000)
    parser.add_argument("--columns", type=int, default=64)
    parser.add_argument("--limit", default="1GiB")
    parser.add_argument("--count", type=int, default=5000)
    parser.add_argument("--workers", type=int, default=1)
    parser.add_argument("--table", type=Path, default=None,
                        help="zarr table to reuse (written there first if missing)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent) as tmp:
        tmp = Path(tmp)
        data = args.table or tmp / "big.zarr"
        if not data.exists():
            write_table(data, args.rows, columns=args.columns)
        table_bytes = args.rows * args.columns * 4
        cfg = tmp / "cfg.toml"
        cfg.write_text(
            f'[input]\npath = "{data}"\n[graph]\nneighbors = 15\n[landmarks]\ncount = {args.count}\n'
            f'[embedding]\ncomponents = 2\n[run]\nworkdir = "{tmp / "work"}"\n'
            f'memory_limit = "{args.limit}"\n[cluster]\nworkers = {args.workers}\n'
        )
        r = measure([sys.executable, "-m", "eigenstream", "-q", "run", str(cfg)])
        stages = {}
        for name in ("read", "landmarks", "neighbors", "affinity", "solve", "extend", "quality",
                     "report"):
            path = tmp / "work" / name / "stage.json"
            if path.exists():
                stages[name] = round(json.loads(path.read_text()).get("seconds", 0.0), 1)
    limit = parse_bytes(args.limit)
    print(f"table: {args.rows} x {args.columns} float32 = {table_bytes / 2**30:.2f} GiB; "
          f"memory_limit {args.limit}; landmarks {args.count}; workers {args.workers}")
    print(f"exit {r['code']}; wall {r['seconds']:.1f} s; peak RSS (process tree) "
          f"{r['peak_rss'] / 2**30:.2f} GiB = {r['peak_rss'] / limit:.2f} x the limit")
    print("seconds per stage:", stages)


if __name__ == "__main__":
    main()

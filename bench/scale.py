"""eigenstream at growing row counts: wall time, peak RSS, time per stage, eigensolver products.

Usage: .venv/bin/python bench/scale.py [--full 250000 1000000 4000000]
                                       [--landmarks 1000000 4000000 10000000] [--count 20000]
                                       [--keep FOLDER]

Each run is a fresh process on a table from bench/manifold_data.py (D = 50). Full-graph runs
use the default settings; landmark runs use ``[landmarks] count`` and ``memory_limit = "2GiB"``.
The scaling exponent is the least-squares slope of log(wall) against log(rows).
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np
from _measure import measure
from manifold_data import write_table

STAGES = ("read", "prep", "landmarks", "neighbors", "affinity", "solve", "extend", "quality",
          "report")


def config(data: Path, work: Path, landmarks: int) -> str:
    extra = f'[landmarks]\ncount = {landmarks}\nmethod = "kmeans++"\n' if landmarks else ""
    limit = 'memory_limit = "2GiB"\n' if landmarks else ""
    return (f'[input]\npath = "{data}"\n[graph]\nneighbors = 15\n[embedding]\ncomponents = 2\n'
            f'[run]\nworkdir = "{work}"\nseed = 0\n{limit}{extra}')


def run_one(tmp: Path, n: int, landmarks: int, columns: int) -> dict:
    data = tmp / f"sheet-{n}.zarr"
    if not data.exists():
        write_table(data, n, columns=columns)
    work = tmp / f"work-{n}-{landmarks}"
    if work.exists():
        shutil.rmtree(work)
    cfg = tmp / f"cfg-{n}-{landmarks}.toml"
    cfg.write_text(config(data, work, landmarks))
    r = measure([sys.executable, "-m", "eigenstream", "-q", "run", str(cfg)])
    stages = {}
    for name in STAGES:
        path = work / name / "stage.json"
        if path.exists():
            stages[name] = json.loads(path.read_text()).get("seconds", float("nan"))
    solve = work / "solve" / "stage.json"
    summary = json.loads(solve.read_text())["summary"] if solve.exists() else {}
    r["matvecs"] = summary.get("matvecs")
    r["passes"] = summary.get("graph_passes")
    r["solver"] = summary.get("solver", "-")
    r["residual"] = summary.get("max_residual", float("nan"))
    r["stages"] = stages
    return r


def exponent(ns, seconds) -> float:
    if len(ns) < 2:
        return float("nan")
    return float(np.polyfit(np.log(ns), np.log(seconds), 1)[0])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--full", type=int, nargs="*", default=[250_000, 1_000_000, 4_000_000])
    parser.add_argument("--landmarks", type=int, nargs="*",
                        default=[1_000_000, 4_000_000, 10_000_000])
    parser.add_argument("--count", type=int, default=20_000)
    parser.add_argument("--columns", type=int, default=50)
    parser.add_argument("--keep", type=Path, default=None,
                        help="folder for the tables and workdirs, kept afterwards (reused)")
    args = parser.parse_args()
    rows = []
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent) as scratch:
        tmp = args.keep or Path(scratch)
        tmp.mkdir(parents=True, exist_ok=True)
        for mode, sizes, m in (("full", args.full, 0), ("landmarks", args.landmarks, args.count)):
            done = []
            for n in sizes:
                r = run_one(tmp, n, m, args.columns)
                done.append((n, r["seconds"]))
                per_stage = " ".join(f"{k}={v:.1f}" for k, v in r["stages"].items())
                rows.append(f"{mode:<10} {n:>10} {r['seconds']:>9.1f} {r['peak_rss'] / 2**30:>9.2f}"
                            f" {r['solver']:>8} {str(r['matvecs']):>8} {str(r['passes']):>7}"
                            f" {r['residual']:>9.1e} {r['code']:>4}  {per_stage}")
                print(rows[-1], flush=True)
            ok = [(n, s) for n, s in done]
            if ok:
                rows.append(f"{mode:<10} scaling exponent of wall time vs rows: "
                            f"{exponent(*zip(*ok, strict=True)):.2f}")
    print(f"\n{'mode':<10} {'rows':>10} {'wall s':>9} {'peak GiB':>9} {'solver':>8} {'matvecs':>8}"
          f" {'passes':>7} {'residual':>9} {'exit':>4}  seconds per stage")
    print("\n".join(rows))


if __name__ == "__main__":
    main()

"""Cost of checkpointing: the demo pipeline with block markers and solver checkpoints on vs off.

Usage: .venv/bin/python bench/checkpoint_overhead.py [--rows 20000] [--repeats 3]

Runs the same configuration alternately with ``[run] checkpoints`` true and false (each run
from scratch, --fresh) and prints per-stage wall times (from each stage's stage.json) and the
ratio on/off. The target is an overhead under 5 %.
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path

from eigenstream.api import run
from eigenstream.config import load_config
from eigenstream.demo import write_demo_inputs

STAGES = ("read", "neighbors", "affinity", "solve", "extend", "quality", "report")


def one_run(config_path: Path, checkpoints: bool) -> dict[str, float]:
    config = load_config(config_path, [f"run.checkpoints={str(checkpoints).lower()}",
                                       "cluster.processes=false", "cluster.workers=1"])
    t0 = time.perf_counter()
    result = run(config, progress=False, fresh=True)
    total = time.perf_counter() - t0
    times = {}
    for name in STAGES:
        state = json.loads((result.workdir / name / "stage.json").read_text())
        times[name] = state["seconds"]
    times["total"] = total
    return times


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=20_000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        config_path = write_demo_inputs(Path(tmp), args.rows)
        samples = {True: [], False: []}
        for _ in range(args.repeats):
            for flag in (True, False):
                samples[flag].append(one_run(config_path, flag))
    print(f"demo data, {args.rows} rows, {args.repeats} repeats each, median seconds")
    print(f"{'stage':<10} {'checkpoints on':>15} {'off':>10} {'on/off':>8}")
    for name in (*STAGES, "total"):
        on = statistics.median(s[name] for s in samples[True])
        off = statistics.median(s[name] for s in samples[False])
        ratio = on / off if off > 0 else float("nan")
        print(f"{name:<10} {on:>15.3f} {off:>10.3f} {ratio:>8.3f}")


if __name__ == "__main__":
    main()

"""1 dask worker vs 2: wall-time speedup per stage, tasks and data moved between workers.

Usage: .venv/bin/python bench/workers.py [--rows 1000000] [--full] [--landmarks 20000]
                                         [--chunk-rows N] [--data TABLE.zarr] [--json OUT.json]

Each configuration runs twice in fresh processes (``eigenstream run``), with ``[cluster]
kind = "local"``, 1 worker x 1 thread and 2 workers x 1 thread, same seed, on a table from
bench/manifold_data.py (D = 50):

- landmark mode (``[landmarks] count``, uniform): exact neighbours of the landmarks in row
  blocks, then one Nystrom task per row block (extension dominated);
- full graph with ``[graph] shards = 2`` and ``method = "approximate"`` (one pynndescent index
  task per shard, then one merge task per row block); only with ``--full`` (slow at 1M rows).

Seconds per stage come from the run record (``eigenstream status --json`` -> timings); wall
time and peak RSS of the whole process tree (driver, scheduler and worker processes) from
bench/_measure.py. Task counts and bytes moved between workers come from the run's own
scheduler: this file is also a dask scheduler preload (``DASK_DISTRIBUTED__SCHEDULER__PRELOAD``
set for the child only), whose plugin records every finished task (key prefix, worker, compute
and transfer intervals, result size) and writes them to a JSON file when the scheduler closes.
A dependency is counted as moved when the task that needed it ran on another worker than the
one that computed it; the stages pass rows through zarr stores in the work directory instead,
so the bytes each stage wrote there are listed too. "CPU share" is thread CPU time over task
wall time (workers' own metrics): well below 1 with 2 workers means the tasks waited for cores
(other processes on the machine) or disk, so read speedups together with it and the load average.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import tempfile
from collections import Counter, defaultdict
from importlib import metadata
from pathlib import Path

STAGES = ("read", "prep", "landmarks", "neighbors", "affinity", "solve", "extend", "quality",
          "report")
# Stage of the functions the stage runners submit (dask strips the leading underscore of key
# prefixes); other tasks go to the stage that was running when they started.
PREFIX_STAGE = {
    "exact_block": "neighbors",
    "approximate_all": "neighbors",
    "shard_candidates": "neighbors",
    "merge_block": "neighbors",
    "landmark_block": "extend",
    "warmup": "neighbors",  # pynndescent compile sent at the run's start (eigenstream.warmup)
}
TARGET = 1.6  # issue's speedup target for the neighbour and extension stages on 2 cores
TARGET_STAGES = ("neighbors", "extend")
LOG_VARIABLE = "EIGENSTREAM_BENCH_TASK_LOG"
PACKAGES = ("eigenstream", "dask", "distributed", "numpy", "scipy", "zarr", "pynndescent",
            "numba", "scikit-learn")


# ----------------------------------------------------------------------------- scheduler side


class TaskRecorder:
    """Scheduler plugin: one record per finished task, written as JSON when the scheduler closes.

    Subclasses ``SchedulerPlugin`` at set-up time (see :func:`dask_setup`) so that importing
    this file does not import distributed.
    """

    name = "eigenstream-bench-task-recorder"

    def __init__(self, scheduler, path: str):
        self.scheduler = scheduler
        self.path = path
        self.tasks: list[dict] = []
        self.done_on: dict[str, tuple[str, int]] = {}  # key -> (worker, nbytes)
        self.workers: set[str] = set()

    def add_worker(self, scheduler=None, worker=None, **kwargs):
        if worker is not None:
            self.workers.add(str(worker))

    def transition(self, key, start, finish, *args, **kwargs):
        if not (start == "processing" and finish == "memory"):
            return
        worker = str(kwargs.get("worker"))
        ts = self.scheduler.tasks.get(key)
        moved = 0
        for dep in ts.dependencies if ts is not None else ():
            where, nbytes = self.done_on.get(str(dep.key), (worker, 0))
            if where != worker:
                moved += nbytes
        stops = kwargs.get("startstops") or []
        nbytes = int(kwargs.get("nbytes") or 0)
        self.done_on[str(key)] = (worker, nbytes)
        self.tasks.append({
            "prefix": ts.prefix.name if ts is not None else str(key).rsplit("-", 1)[0],
            "worker": worker,
            "start": min((s["start"] for s in stops), default=None),
            "compute": sum(s["stop"] - s["start"] for s in stops if s["action"] == "compute"),
            "transfers": sum(1 for s in stops if s["action"] == "transfer"),
            "transfer_seconds": sum(s["stop"] - s["start"] for s in stops
                                    if s["action"] == "transfer"),
            "moved_bytes": moved,
            "result_bytes": nbytes,
        })

    def cpu_by_prefix(self) -> dict[str, dict[str, float]]:
        """Thread CPU and non-CPU seconds of task execution per key prefix, as the workers'
        heartbeats reported them (the last heartbeat's share can be missing)."""
        out: dict[str, dict[str, float]] = defaultdict(lambda: {"cpu": 0.0, "noncpu": 0.0})
        for key, value in self.scheduler.cumulative_worker_metrics.items():
            if (isinstance(key, tuple) and len(key) >= 4 and key[0] == "execute"
                    and key[-1] == "seconds" and key[-2] in ("thread-cpu", "thread-noncpu")):
                out[str(key[-3])]["cpu" if key[-2] == "thread-cpu" else "noncpu"] += value
        return dict(out)

    def dump(self) -> None:
        Path(self.path).write_text(json.dumps({"workers": sorted(self.workers),
                                               "tasks": self.tasks,
                                               "cpu": self.cpu_by_prefix()}))

    async def close(self):
        self.dump()


def dask_setup(scheduler) -> None:
    """Preload hook: register the recorder on the run's scheduler (inert without the variable)."""
    path = os.environ.get(LOG_VARIABLE)
    if not path:
        return
    from distributed.diagnostics.plugin import SchedulerPlugin

    recorder_cls = type("TaskRecorderPlugin", (TaskRecorder, SchedulerPlugin), {})
    scheduler.add_plugin(recorder_cls(scheduler, path))


# ------------------------------------------------------------------------------ harness side


def config_text(data: Path, work: Path, *, workers: int, chunk_rows: int, landmarks: int,
                shards: int) -> str:
    lines = [
        "[input]", f'path = "{data}"',
        # method = "approximate": the sharded construction even where exact search would do
        "[graph]", "neighbors = 15",
        *([f"shards = {shards}", 'method = "approximate"'] if shards else []),
        *(["[landmarks]", f"count = {landmarks}", 'method = "uniform"'] if landmarks else []),
        "[embedding]", "components = 2",
        "[run]", f'workdir = "{work}"', "seed = 0", f"chunk_rows = {chunk_rows}",
        "[cluster]", 'kind = "local"', f"workers = {workers}", "threads_per_worker = 1",
    ]
    return "\n".join(lines) + "\n"


def folder_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file()) if path.exists() else 0


def stage_intervals(work: Path) -> dict[str, tuple[float, float]]:
    """(start, end) epoch seconds of each stage run in this process, from its stage.json."""
    out = {}
    for name in STAGES:
        path = work / name / "stage.json"
        state = json.loads(path.read_text()) if path.exists() else {}
        end, seconds = state.get("finished_at"), state.get("seconds")
        if end is not None and seconds is not None and not state.get("resumed"):
            out[name] = (end - seconds, end)
    return out


def stage_of(task: dict, intervals: dict[str, tuple[float, float]]) -> str:
    """The stage of a known function, else the stage running when the task started (the
    workers and the driver share one clock here)."""
    prefix = task["prefix"]
    for known, stage in PREFIX_STAGE.items():
        if prefix == known or prefix.startswith(f"{known}-"):
            return stage
    start = task.get("start")
    for name, (a, b) in intervals.items():
        if start is not None and a <= start <= b:
            return name
    return f"other ({prefix})"


def task_summary(log: dict | None, intervals: dict[str, tuple[float, float]]) -> dict[str, dict]:
    """Per stage: tasks, tasks per worker, compute seconds, transfers, bytes moved, results."""
    out: dict[str, dict] = {}
    if not log:
        return out
    per: dict[str, list[dict]] = defaultdict(list)
    for task in log["tasks"]:
        per[stage_of(task, intervals)].append(task)
    cpu = log.get("cpu", {})
    for stage, tasks in per.items():
        prefixes = Counter(t["prefix"] for t in tasks)
        used = [cpu[p] for p in prefixes if p in cpu]
        busy = sum(c["cpu"] + c["noncpu"] for c in used)
        out[stage] = {
            # share of task wall time spent on CPU: well below 1 means the workers waited
            # (for cores taken by other processes, or for disk)
            "cpu_share": sum(c["cpu"] for c in used) / busy if busy else None,
            "tasks": len(tasks),
            "prefixes": dict(prefixes),
            "per_worker": sorted(Counter(t["worker"] for t in tasks).values(), reverse=True),
            "compute_seconds": sum(t["compute"] for t in tasks),
            "transfers": sum(t["transfers"] for t in tasks),
            "transfer_seconds": sum(t["transfer_seconds"] for t in tasks),
            "moved_bytes": sum(t["moved_bytes"] for t in tasks),
            "result_bytes": sum(t["result_bytes"] for t in tasks),
        }
    return out


def run_one(tmp: Path, data: Path, mode: str, workers: int, args) -> dict:
    from _measure import measure

    from eigenstream.pipeline import status

    tag = f"{mode}-{workers}w"
    work, cfg, log_path = tmp / f"work-{tag}", tmp / f"cfg-{tag}.toml", tmp / f"tasks-{tag}.json"
    cfg.write_text(config_text(
        data, work, workers=workers, chunk_rows=args.chunk_rows,
        landmarks=args.landmarks if mode == "landmarks" else 0,
        shards=2 if mode == "full" else 0,
    ))
    env = {"DASK_DISTRIBUTED__SCHEDULER__PRELOAD": str(Path(__file__).resolve()),
           LOG_VARIABLE: str(log_path)}
    saved = {k: os.environ.get(k) for k in env}
    os.environ.update(env)  # measure() starts the child with this process's environment
    load_before = os.getloadavg()[0]
    try:
        r = measure([sys.executable, "-m", "eigenstream", "--debug", "-q", "run", str(cfg)])
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    r.pop("stdout", None)
    # other processes on the machine take cores from the 2-worker run first: keep the evidence
    r["load_before"], r["load_after"] = load_before, os.getloadavg()[0]
    r["timings"] = status(work)["timings"] if (work / "run.json").exists() else {}
    log = json.loads(log_path.read_text()) if log_path.exists() else None
    r["scheduler_workers"] = len(log["workers"]) if log else None
    r["tasks"] = task_summary(log, stage_intervals(work))
    r["task_log"] = log  # one record per task, for --json
    r["workdir_bytes"] = {s: folder_bytes(work / s) for s in STAGES}
    return r


def size(n: float) -> str:
    from dask.utils import format_bytes

    return format_bytes(int(n))


def speed_table(one: dict, two: dict) -> list[str]:
    lines = ["| stage | 1 worker s | 2 workers s | speedup |", "| --- | ---: | ---: | ---: |"]
    for stage in STAGES:
        a, b = one["timings"].get(stage), two["timings"].get(stage)
        if a is None or b is None:
            continue
        ratio = f"{a / b:.2f}x" if b > 0 else "-"
        mark = f" (target {TARGET}x)" if stage in TARGET_STAGES and one["tasks"].get(stage) else ""
        lines.append(f"| {stage} | {a:.2f} | {b:.2f} | {ratio}{mark} |")
    lines.append(f"| **total wall (process)** | {one['seconds']:.1f} | {two['seconds']:.1f} | "
                 f"{one['seconds'] / two['seconds']:.2f}x |")
    lines.append(f"| **peak RSS of tree, GiB** | {one['peak_rss'] / 2**30:.2f} | "
                 f"{two['peak_rss'] / 2**30:.2f} | |")
    lines.append(f"| exit code / workers seen by scheduler | {one['code']} / "
                 f"{one['scheduler_workers']} | {two['code']} / {two['scheduler_workers']} | |")
    lines.append(f"| 1-min load average before / after | {one['load_before']:.2f} / "
                 f"{one['load_after']:.2f} | {two['load_before']:.2f} / {two['load_after']:.2f} | |")
    return lines


def task_table(results: dict[int, dict]) -> list[str]:
    lines = ["| stage | workers | tasks (by function) | tasks per worker | task compute s | "
             "CPU share | transfers | moved between workers | task results | written to work dir |",
             "| --- | ---: | --- | --- | ---: | ---: | ---: | ---: | ---: | ---: |"]
    any_run = next(iter(results.values()))
    for stage in STAGES:
        written = size(any_run["workdir_bytes"].get(stage, 0))
        for w, r in results.items():
            t = r["tasks"].get(stage)
            if t is None:
                if w == min(results):
                    lines.append(f"| {stage} | - | 0 (no dask task) | | | | | | | "
                                 f"{written} |")
                continue
            funcs = ", ".join(f"{n} `{p}`" for p, n in t["prefixes"].items())
            share = "-" if t["cpu_share"] is None else f"{t['cpu_share']:.2f}"
            lines.append(
                f"| {stage} | {w} | {funcs} | {'/'.join(map(str, t['per_worker']))} | "
                f"{t['compute_seconds']:.2f} | {share} | {t['transfers']} | "
                f"{size(t['moved_bytes'])} | "
                f"{size(t['result_bytes'])} | {written} |")
    for w, r in results.items():
        for stage, t in r["tasks"].items():
            if stage not in STAGES:
                lines.append(f"| {stage} | {w} | {t['tasks']} | | {t['compute_seconds']:.2f} | "
                             f"| {t['transfers']} | {size(t['moved_bytes'])} | "
                             f"{size(t['result_bytes'])} | |")
    return lines


def machine() -> str:
    import psutil

    versions = []
    for name in PACKAGES:
        try:
            versions.append(f"{name} {metadata.version(name)}")
        except metadata.PackageNotFoundError:
            pass
    return (f"Machine: {os.cpu_count()} cores, {psutil.virtual_memory().total / 2**30:.1f} GiB RAM, "
            f"{platform.system()} {platform.machine()}, Python {platform.python_version()}; "
            + ", ".join(versions))


def table_path(args, tmp: Path) -> Path:
    """The input table: ``--data`` (reused when it has the right shape) or a temporary one."""
    import zarr
    from manifold_data import write_table

    path = Path(args.data) if args.data else tmp / f"sheet-{args.rows}.zarr"
    if path.exists():
        try:
            if zarr.open_array(str(path), mode="r").shape == (args.rows, args.columns):
                return path.resolve()
        except Exception:  # not a readable zarr array: written again below
            pass
    write_table(path, args.rows, columns=args.columns, chunk_rows=args.chunk_rows)
    return path.resolve()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--columns", type=int, default=50)
    parser.add_argument("--landmarks", type=int, default=20_000, help="[landmarks] count")
    parser.add_argument("--chunk-rows", type=int, default=None,
                        help="[run] chunk_rows (default: min(50,000, rows / 20), >= 20 blocks)")
    parser.add_argument("--full", action="store_true",
                        help="also run the full graph with [graph] shards = 2 (slow at 1M rows)")
    parser.add_argument("--data", help="zarr table to reuse (written there if missing)")
    parser.add_argument("--json", help="also write the raw results to this JSON file")
    args = parser.parse_args()
    if args.chunk_rows is None:
        args.chunk_rows = max(1_000, min(50_000, args.rows // 20))
    modes = ["landmarks"] + (["full"] if args.full else [])
    raw: dict[str, dict[int, dict]] = {}
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent) as tmp:
        tmp = Path(tmp)
        data = table_path(args, tmp)
        for mode in modes:
            raw[mode] = {}
            for workers in (1, 2):
                r = raw[mode][workers] = run_one(tmp, data, mode, workers, args)
                print(f"{mode} {workers} worker(s): {r['seconds']:.1f} s, exit {r['code']}",
                      file=sys.stderr, flush=True)
    print(f"## 1 worker vs 2 workers, {args.rows:,} rows x {args.columns} float32, "
          f"chunk_rows {args.chunk_rows:,}\n\n{machine()}\n")
    for mode in modes:
        title = (f"landmark mode, m = {args.landmarks:,} (uniform)" if mode == "landmarks"
                 else "full graph, [graph] shards = 2")
        print(f"### {title}: seconds per stage (run record)\n")
        print("\n".join(speed_table(raw[mode][1], raw[mode][2])) + "\n")
        print(f"### {title}: tasks and data per stage (scheduler)\n")
        print("\n".join(task_table(raw[mode])) + "\n")
    if args.json:
        Path(args.json).write_text(json.dumps(
            {"rows": args.rows, "chunk_rows": args.chunk_rows, "runs": raw}, indent=1))


if __name__ == "__main__":
    main()

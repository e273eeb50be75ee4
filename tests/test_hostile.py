"""Hostile inputs, settings, data shapes and resources, through the real command line.

Every case writes real files under a temporary folder and runs
``python -m eigenstream -q run cfg.toml`` in a subprocess, as a user would.

* A refusal must exit with the code of the README's exit-code table (2 configuration,
  3 input, 4 work directory), print exactly one line on stderr naming the file, row, column,
  key or option and the fix, never a traceback, and leave nothing that
  ``eigenstream status WORKDIR --json`` calls complete. Where a finished run already
  existed, it must be untouched.
* A hostile but valid table must give a sane map: exit 0, ``status --json`` complete with
  relative residuals below 1e-6, and finite coordinates.

Each start of the CLI costs one to two seconds of imports, so the module fixture starts
all cases at once on a small thread pool and every test waits for its own case. For the same
reason the work directories are inspected with :func:`eigenstream.pipeline.status`, the
function whose result ``status --json`` prints (checked once against the CLI below).
Cases that need ``mount`` (read-only or full file systems) run only as root and are
skipped otherwise.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zarr

from eigenstream.pipeline import stages, status

MAX_RESIDUAL = 1e-6  # the project's bar for a converged map (as in test_cli.py)
BASE_ROWS = 150


# ------------------------------------------------------------------------------ running


@dataclass
class Run:
    """One ``eigenstream run``: what it printed, and what its work directory holds after."""

    code: int
    out: str
    err: str
    workdir: Path
    status: dict[str, Any] | None = None  # what `status --json` shows, when there is a run record
    coords: np.ndarray | None = None  # extend/data.zarr coordinates, when the run completed
    notes: dict[str, Any] = field(default_factory=dict)  # case-specific observations


def cli(*args: Any, quiet: bool = True) -> tuple[int, str, str]:
    """Run the real command line; returns (exit code, stdout, stderr)."""
    proc = subprocess.run(
        [sys.executable, "-m", "eigenstream", *(["-q"] if quiet else []), *map(str, args)],
        capture_output=True, text=True, timeout=600,
    )
    return proc.returncode, proc.stdout, proc.stderr


def status_json(workdir: Path) -> dict[str, Any]:
    """What ``eigenstream status WORKDIR --json`` prints, from the CLI."""
    code, out, err = cli("status", workdir, "--json")
    assert code == 0, err
    return json.loads(out)


def status_of(workdir: Path) -> dict[str, Any] | None:
    """The same object in-process, or None when there is no run record to show.

    CheckpointError is what ``status`` raises for a directory without a run; any other OSError
    means the path cannot even hold one (see test_status_of_a_path_below_a_file).
    """
    try:
        return json.loads(json.dumps(status(workdir), default=str))
    except OSError:  # CheckpointError included
        return None


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a valid TOML basic string
    return "[" + ", ".join(_toml_value(v) for v in value) + "]"


def toml_text(config: dict[str, dict[str, Any]]) -> str:
    return "".join(
        f"[{name}]\n" + "".join(f"{k} = {_toml_value(v)}\n" for k, v in values.items())
        for name, values in config.items()
    )


def config(inp: dict[str, Any], workdir: str | Path = "work", **sections) -> dict:
    """Small, fast settings (threads, one worker), with ``sections`` merged on top."""
    cfg = {
        "input": inp,
        "graph": {"neighbors": 10},
        "kernel": {"bandwidth_neighbor": 5},
        "run": {"workdir": str(workdir), "chunk_rows": 100},
        "cluster": {"processes": False, "workers": 1},
    }
    for name, values in sections.items():
        cfg.setdefault(name, {}).update(values)
    return cfg


def run_config(folder: Path, cfg: dict, *sets: str, quiet: bool = True, fresh: bool = False,
               with_status: bool = True) -> Run:
    """Write ``cfg`` to ``folder/cfg.toml``, run it, and collect status and coordinates."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "cfg.toml"
    path.write_text(toml_text(cfg))
    args = ["run", path, *[a for s in sets for a in ("--set", s)], *(["--fresh"] if fresh else [])]
    code, out, err = cli(*args, quiet=quiet)
    workdir = Path(cfg["run"]["workdir"])
    workdir = workdir if workdir.is_absolute() else folder / workdir
    run = Run(code, out, err, workdir)
    if with_status:
        run.status = status_of(workdir)
        if run.status is not None and run.status["complete"]:
            run.coords = coordinates(workdir)
    return run


def coordinates(workdir: Path) -> np.ndarray:
    group = zarr.open_group(str(workdir / "extend" / "data.zarr"), mode="r")
    return np.asarray(group["coordinates"][...])


def stored_rows(workdir: Path) -> np.ndarray:
    return np.asarray(zarr.open_group(str(workdir / "read" / "data.zarr"), mode="r")["rows"][...])


def snapshot(folder: Path) -> dict[str, tuple[int, int]]:
    """Size and modification time of every file under ``folder``."""
    return {
        str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns)
        for p in sorted(folder.rglob("*")) if p.is_file()
    }


def stage_names() -> list[str]:
    return [stage.name for stage in stages()]


def stage_states(workdir: Path) -> dict[str, str | None]:
    out = {}
    for name in stage_names():
        f = workdir / name / "stage.json"
        out[name] = json.loads(f.read_text())["state"] if f.is_file() else None
    return out


@contextmanager
def tmpfs(where: Path, size: str, *, read_only: bool = False) -> Iterator[Path]:
    """A small tmpfs mounted at ``where`` (root only; the test is skipped otherwise)."""
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs needs root")
    where.mkdir(parents=True, exist_ok=True)
    opts = f"size={size}" + (",ro" if read_only else "")
    proc = subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(where)],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {proc.stderr.strip()}")
    try:
        yield where
    finally:
        if subprocess.run(["umount", str(where)], capture_output=True).returncode != 0:
            subprocess.run(["umount", "-l", str(where)], capture_output=True)


def remount(where: Path, opts: str) -> None:
    subprocess.run(["mount", "-o", f"remount,{opts}", str(where)], check=True,
                   capture_output=True)


# ------------------------------------------------------------------------------ assertions


def one_line(err: str) -> str:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, f"expected one stderr line, got {len(lines)}:\n{err}"
    return lines[0]


def assert_refused(run: Run, code: int, words: list[str], *, finished_before: bool = False) -> None:
    """One clean line, the right exit code, and nothing new that status calls complete.

    ``finished_before``: the work directory already held a finished run, which the caller
    checks is untouched.
    """
    assert "Traceback" not in run.err, run.err
    assert run.code == code, run.err  # README, "Exit codes"
    line = one_line(run.err)
    assert line.startswith("eigenstream: error: "), line
    for word in words:
        assert word in line, (word, line)
    assert "map:" not in run.out  # no results announced
    # Nothing the status command would call complete: either no run record at all (status
    # refuses the directory) or a record that is not complete.
    if finished_before:
        return
    if run.status is not None:
        assert run.status["complete"] is False, run.status
    else:
        assert not (run.workdir / "run.json").exists()


def assert_sane(run: Run, rows: int, components: int = 2) -> None:
    """Exit 0, complete, converged (residuals below 1e-6) and finite coordinates."""
    assert "Traceback" not in run.err, run.err
    assert run.code == 0, run.err
    assert run.status is not None and run.status["complete"] is True, run.status
    assert run.status["rows"] == rows
    values, residuals = run.status["eigenvalues"], run.status["residuals"]
    assert len(values) == len(residuals) == components
    assert np.all(np.isfinite(values)) and max(residuals) < MAX_RESIDUAL, run.status
    assert run.coords is not None and run.coords.shape == (rows, components)
    assert np.all(np.isfinite(run.coords))


def relative_gap(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(a - b)) / np.max(np.abs(b)))


# ------------------------------------------------------------------------------ data


def base_table(seed: int = 7, n: int = BASE_ROWS) -> np.ndarray:
    """An anisotropic Gaussian cloud: distinct leading eigenvalues, so columns compare 1:1."""
    return np.random.default_rng(seed).standard_normal((n, 3)) * np.array([3.0, 1.0, 0.3])


def csv_text(header: list[str], rows: list[list[Any]]) -> str:
    return ",".join(header) + "\n" + "".join(",".join(map(str, r)) + "\n" for r in rows)


@dataclass
class Base:
    """The finished run that later cases must leave intact and compare against."""

    data: np.ndarray
    input: Path
    workdir: Path
    run: Run
    files: dict[str, tuple[int, int]]


def make_base(folder: Path) -> Base:
    folder.mkdir(parents=True)
    X = base_table()
    np.save(folder / "rows.npy", X)  # float64
    run = run_config(folder, config({"path": "rows.npy"}))
    assert_sane(run, BASE_ROWS)
    return Base(X, folder / "rows.npy", folder / "work", run, snapshot(folder / "work"))


# ------------------------------------------------------------------------------ refusals
#
# Each refusal: how to write its input (returns the `[input]` table), the settings merged
# on top, `--set` overrides, the expected exit code and the words its one line must hold.
# `previous=True` runs against the base run's input and work directory, which must stay
# exactly as it was.


@dataclass
class Refusal:
    make: Callable[[Path], dict] | None
    code: int
    words: list[str]
    settings: dict[str, dict] = field(default_factory=dict)
    sets: tuple[str, ...] = ()
    previous: bool = False
    status_cli: bool = False  # also run `eigenstream status WORKDIR` on the refused directory


def _npy(name: str, array: np.ndarray) -> Callable[[Path], dict]:
    def make(folder: Path) -> dict:
        np.save(folder / name, array)
        return {"path": name}
    return make


def _bytes(name: str, data: bytes) -> Callable[[Path], dict]:
    def make(folder: Path) -> dict:
        (folder / name).write_bytes(data)
        return {"path": name}
    return make


def _text(name: str, text: str, **inp) -> Callable[[Path], dict]:
    def make(folder: Path) -> dict:
        (folder / name).write_text(text)
        return {"path": name, **inp}
    return make


def _npy_cut(name: str, keep: Callable[[int], int]) -> Callable[[Path], dict]:
    def make(folder: Path) -> dict:
        np.save(folder / name, base_table(n=200))
        raw = (folder / name).read_bytes()
        (folder / name).write_bytes(raw[: keep(len(raw))])
        return {"path": name}
    return make


def _h5(name: str, **datasets: np.ndarray) -> Callable[[Path], dict]:
    def make(folder: Path) -> dict:
        with h5py.File(folder / name, "w") as fh:
            for key, values in datasets.items():
                fh[key.replace("__", "/")] = values
        return {"path": name}
    return make


def _parquet(name: str, table: dict[str, Any], **inp) -> Callable[[Path], dict]:
    def make(folder: Path) -> dict:
        pq.write_table(pa.table(table), folder / name)
        return {"path": name, **inp}
    return make


def _with(make: Callable[[Path], dict], **inp) -> Callable[[Path], dict]:
    return lambda folder: {**make(folder), **inp}


def _csv_rows(n: int = 60, seed: int = 3) -> list[list[str]]:
    X = np.random.default_rng(seed).standard_normal((n, 3))
    return [[f"{v:.6f}" for v in row] for row in X]


def _ragged() -> str:
    rows = _csv_rows()
    rows[16] = ["1.0", "2.0"]  # data row 17 = line 18 (the header is line 1)
    return csv_text(["a", "b", "c"], rows)


def _text_in_numbers() -> str:
    rows = _csv_rows()
    rows[22][1] = "oops"  # row 23, line 24, column b
    return csv_text(["a", "b", "c"], rows)


def _inf_then_nan() -> str:
    rows = _csv_rows()
    rows[9][1] = "inf"  # the first bad value: row 10, line 11, column b
    rows[30][0] = "nan"  # a later one the message must not be about
    return csv_text(["a", "b", "c"], rows)


def _minus_inf_table() -> np.ndarray:
    X = base_table(n=60)
    X[6, 2] = -np.inf  # row 7, col3
    X[20, 0] = np.nan
    return X


def _nan_parquet_table() -> dict[str, Any]:
    X = base_table(n=60)
    X[40, 2] = np.nan  # row 41, id s40, column c
    return {"sid": [f"s{i}" for i in range(60)], "a": X[:, 0], "b": X[:, 1], "c": X[:, 2]}


def _under_a_file(folder: Path) -> dict:
    np.save(folder / "ok.npy", base_table(n=60))
    (folder / "afile").write_text("a regular file, not a folder\n")
    return {"path": "ok.npy"}


_NESTED = {"features__x": base_table(n=40), "meta__y": base_table(n=40)}
_IDS = [f"s{i}" for i in range(60)]
_PQ = {"sid": _IDS, "a": base_table(n=60)[:, 0], "b": base_table(n=60)[:, 1]}

REFUSALS: dict[str, Refusal] = {
    # --- input files
    "missing-file-in-missing-folder": Refusal(
        lambda f: {"path": "nowhere/rows.csv"}, 3,
        ["nowhere/rows.csv", "not found", "`[input] path`"]),
    "directory-instead-of-file": Refusal(
        lambda f: (f / "block.npy").mkdir() or {"path": "block.npy"}, 3,
        ["block.npy", "is a directory", "point `[input] path` at the file"]),
    "zero-byte-npy": Refusal(_bytes("e.npy", b""), 3, ["e.npy", "empty", "0 bytes"]),
    "zero-byte-csv": Refusal(_bytes("e.csv", b""), 3, ["e.csv", "empty", "0 bytes"]),
    "csv-header-only": Refusal(
        _text("head.csv", "a,b,c\n"), 3, ["head.csv", "a header but no rows"]),
    "csv-ragged-line": Refusal(
        _text("ragged.csv", _ragged()), 3,
        ["ragged.csv", "Line 18", "2 fields", "header has 3", "stray or missing delimiter"]),
    "csv-text-in-number-column": Refusal(
        _text("typo.csv", _text_in_numbers()), 3,
        ["typo.csv", "Column 'b'", "'oops'", "row 23", "line 24", "exclude_columns"]),
    "csv-column-entirely-empty": Refusal(
        _text("hole.csv", csv_text(["a", "b", "c"], [[r[0], "", r[2]] for r in _csv_rows()])), 3,
        ["hole.csv", "Column 'b'", "empty", "exclude_columns"]),
    "csv-inf-named-before-later-nan": Refusal(
        _text("inf.csv", _inf_then_nan()), 3,
        ["inf.csv", "row 10", "line 11", "column 'b'", ": inf", 'on_bad_rows = "drop"']),
    "hdf5-minus-inf": Refusal(
        _h5("neg.h5", only=_minus_inf_table()), 3,
        ["neg.h5", "row 7", "column 'col3'", "-inf", 'on_bad_rows = "drop"']),
    "parquet-nan-names-the-id": Refusal(
        _parquet("ids.parquet", _nan_parquet_table(), id_column="sid"), 3,
        ["ids.parquet", "row 41", "id 's40'", "column 'c'", "nan", "on_bad_rows"]),
    "npy-three-dimensional": Refusal(
        _npy("cube.npy", np.ones((40, 3, 2))), 3, ["cube.npy", "(40, 3, 2)", "2-D", "reshape"]),
    "npy-zero-columns": Refusal(
        _npy("nocols.npy", np.zeros((40, 0))), 3, ["nocols.npy", "(40, 0)", "empty input"]),
    "npy-single-row": Refusal(
        _npy("single.npy", np.ones((1, 3))), 3,
        ["single.npy", "has 1 row", "`[graph] neighbors` = 10", "at least 11"]),
    "rows-equal-to-neighbors": Refusal(
        _npy("ten.npy", base_table(n=10)), 3,
        ["ten.npy", "has 10 rows", "at least 11", "lower `[graph] neighbors`"]),
    "npy-truncated-data": Refusal(
        _npy_cut("cut.npy", lambda size: size // 2), 3,
        ["cut.npy", "truncated or damaged", "numpy.save"]),
    "hdf5-wrong-dataset-name": Refusal(
        _with(_h5("nested.h5", **_NESTED), dataset="x"), 3,
        ["nested.h5", "no array named 'x'", "'features/x'", "'meta/y'", "`[input] dataset`"]),
    "parquet-id-column-missing": Refusal(
        _parquet("t.parquet", _PQ, id_column="sample"), 3,
        ["t.parquet", "Column 'sample'", "`[input] id_column`", "'sid'", "'a'", "'b'"]),
    "all-rows-identical": Refusal(
        _npy("same.npy", np.tile([1.0, 2.0, 3.0], (80, 1))), 3,
        ["identical", "no structure to embed", "check the input columns"]),
    # --- settings, against the finished base run: it must stay as it was
    "unknown-key-in-file": Refusal(
        None, 2, ["cfg.toml", "`[graph] neighbours`", "Did you mean `neighbors`"],
        settings={"graph": {"neighbours": 12}}, previous=True),
    "neighbors-as-text": Refusal(
        None, 2, ["`[graph] neighbors`", "an integer >= 1", "'ten'"],
        settings={"graph": {"neighbors": "ten"}}, previous=True),
    "neighbors-negative": Refusal(
        None, 2, ["`[graph] neighbors`", ">= 1", "-3"],
        settings={"graph": {"neighbors": -3}}, previous=True),
    "neighbors-not-below-rows": Refusal(
        None, 3, ["rows.npy", f"has {BASE_ROWS} rows", f"at least {BASE_ROWS + 1}",
                  "lower `[graph] neighbors`"],
        sets=(f"graph.neighbors={BASE_ROWS}",), previous=True),
    "alpha-negative": Refusal(
        None, 2, ["`[kernel] alpha`", "[0.0, 1.0]", "-0.1"],
        settings={"kernel": {"alpha": -0.1}}, previous=True),
    "components-not-below-rows-minus-one": Refusal(
        None, 2, [f"`[embedding] components` = {BASE_ROWS - 1}", "rows.npy", "lower it"],
        sets=(f"embedding.components={BASE_ROWS - 1}",), previous=True),
    "diffusion-time-negative": Refusal(
        None, 2, ["`[embedding] diffusion_time`", ">= 0", "-1"],
        settings={"embedding": {"diffusion_time": -1}}, previous=True),
    "set-unknown-section": Refusal(
        None, 2, ["--set grpah.neighbors=5", "Did you mean `graph`"],
        sets=("grpah.neighbors=5",), previous=True),
    # --- work directories that cannot be written
    "workdir-below-a-file": Refusal(
        _under_a_file, 4,
        ["afile/sub", "Not a directory", "choose a writable `[run] workdir`"],
        settings={"run": {"workdir": "afile/sub"}}, status_cli=True),
}


def refusal_job(spec: Refusal) -> Callable[[Path, Base | None], Run]:
    def job(folder: Path, base: Base | None) -> Run:
        folder.mkdir(parents=True)
        if spec.previous:
            inp = {"path": str(base.input)}
            workdir: str | Path = base.workdir
        else:
            inp = spec.make(folder)
            workdir = "work"
        cfg = config(inp, workdir, **spec.settings)
        run = run_config(folder, cfg, *spec.sets, with_status=not spec.previous)
        if spec.previous:
            run.workdir = base.workdir
            run.notes["files_after"] = snapshot(base.workdir)
        if spec.status_cli:
            run.notes["status_cli"] = cli("status", run.workdir, "--json")
        return run
    return job


# ------------------------------------------------------------------------------ sane shapes


def _npy_run(X: np.ndarray, name: str, **sections) -> Callable[[Path, Base | None], Run]:
    """Save ``X`` as ``name`` and run it with the small settings plus ``sections``."""

    def job(folder: Path, base: Base | None) -> Run:
        folder.mkdir(parents=True)
        np.save(folder / name, X)
        return run_config(folder, config({"path": name}, **sections))
    return job


def _duplicates() -> np.ndarray:
    # 120 rows that each appear twice, and one row (the cloud's centre) 30 times: more copies
    # than `bandwidth_neighbor`, so its 5th-neighbour distance (its bandwidth) is 0.
    X = base_table(n=120)
    return np.r_[X, X, np.zeros((30, 3))]


def _blob_in_cloud() -> np.ndarray:
    # 200 rows uniform in the unit cube and 60 rows spread 1e-6 around its centre: the local
    # spacing differs by about 1e6 (density by far more).
    rng = np.random.default_rng(11)
    return np.r_[rng.uniform(0, 1, (200, 3)), 0.5 + 1e-6 * rng.standard_normal((60, 3))]


def _two_clusters() -> np.ndarray:
    X = base_table(n=140)
    X[70:] += 1000.0  # far beyond any neighbour distance: two components
    return X


def _integers() -> np.ndarray:
    return np.round(base_table() * 100).astype(np.int32)


def job_drop_csv_ids(folder: Path, base: Base | None) -> Run:
    folder.mkdir(parents=True)
    X = np.round(base_table(n=80), 6)  # exactly what the CSV text below says
    rows = [[f"s{i}", *(f"{v:.6f}" for v in X[i])] for i in range(80)]
    # Bad cells in three different blocks of 25 rows: +inf, an empty cell (NaN), -inf.
    rows[3][1], rows[30][2], rows[57][3] = "inf", "", "-inf"
    (folder / "ids.csv").write_text(csv_text(["sid", "a", "b", "c"], rows))
    run = run_config(folder, config({"path": "ids.csv", "id_column": "sid"},
                                    run={"chunk_rows": 25, "on_bad_rows": "drop"}))
    run.notes["expected_rows"] = np.delete(X, [3, 30, 57], axis=0)
    return run


def job_zarr_absent_fill_chunk(folder: Path, base: Base | None) -> Run:
    # zarr's default (write_empty_chunks=False) does not store a chunk equal to the fill
    # value: rows 41-60 are all 0.0 here, so their chunk file is legitimately absent.
    folder.mkdir(parents=True)
    X = base_table(n=100)
    X[40:60] = 0.0
    arr = zarr.create_array(str(folder / "gaps.zarr"), shape=X.shape, dtype="f8", chunks=(20, 3),
                            fill_value=0.0)
    arr[...] = X
    run = run_config(folder, config({"path": "gaps.zarr"}))
    run.notes["chunk_absent"] = not (folder / "gaps.zarr" / "c" / "2" / "0").exists()
    run.notes["expected_rows"] = X
    return run


def job_zarr_lost_chunk(folder: Path, base: Base | None) -> Run:
    # Every chunk written (no fill-valued ones), then one chunk file lost, as after an
    # interrupted copy: zarr reads the missing rows 41-60 as the fill value 0.0.
    folder.mkdir(parents=True)
    X = base_table(n=100)
    arr = zarr.create_array(str(folder / "lost.zarr"), shape=X.shape, dtype="f8", chunks=(20, 3),
                            fill_value=0.0)
    arr[...] = X
    (folder / "lost.zarr" / "c" / "2" / "0").unlink()
    run = run_config(folder, config({"path": "lost.zarr"}))
    run.notes["rows_read"] = stored_rows(run.workdir) if run.code == 0 else None
    return run


SANE: dict[str, Callable[[Path, Base | None], Run]] = {
    "values-near-1e30": _npy_run(base_table() * 1e30, "huge.npy"),
    "values-near-1e-30": _npy_run(base_table() * 1e-30, "tiny.npy"),
    "constant-column": _npy_run(np.c_[base_table(), np.full(BASE_ROWS, 5.0)], "const.npy"),
    "constant-column-standardized": _npy_run(
        np.c_[base_table(), np.full(BASE_ROWS, 5.0)], "const.npy", prep={"standardize": True}),
    "standardized-reference": _npy_run(base_table(), "rows.npy",
                                               prep={"standardize": True}),
    "many-duplicate-rows": _npy_run(_duplicates(), "dups.npy"),
    "million-to-one-density": _npy_run(_blob_in_cloud(), "blob.npy"),
    "integer-input": _npy_run(_integers(), "ints.npy"),
    "float16-input": _npy_run(base_table().astype(np.float16), "half.npy"),
    "drop-csv-lists-ids": job_drop_csv_ids,
    "zarr-chunk-absent-as-fill-value": job_zarr_absent_fill_chunk,
    "zarr-chunk-lost": job_zarr_lost_chunk,
}
SANE_ROWS = {
    "many-duplicate-rows": 270, "million-to-one-density": 260, "drop-csv-lists-ids": 77,
    "zarr-chunk-absent-as-fill-value": 100, "zarr-chunk-lost": 100,
}


def job_two_clusters(folder: Path, base: Base | None) -> Run:
    folder.mkdir(parents=True)
    np.save(folder / "two.npy", _two_clusters())
    return run_config(folder, config({"path": "two.npy"}), quiet=False)


# ------------------------------------------------------------------------------ work directories


def job_other_input(folder: Path, base: Base | None) -> dict[str, Any]:
    """A work directory holding a finished run of another input: refused, then --fresh."""
    folder.mkdir(parents=True)
    shutil.copytree(base.workdir, folder / "work")  # a finished run of base.input
    np.save(folder / "other.npy", base_table(seed=8, n=120))
    cfg = config({"path": "other.npy"})
    refused = run_config(folder, cfg)
    refused.notes["coords_after"] = coordinates(folder / "work")
    fresh = run_config(folder, cfg, quiet=False, fresh=True)
    return {"refused": refused, "fresh": fresh}


def job_read_only_mount(folder: Path, base: Base | None) -> Run:
    folder.mkdir(parents=True)
    np.save(folder / "ok.npy", base_table(n=60))
    with tmpfs(folder / "ro", "1m", read_only=True) as mnt:
        return run_config(folder, config({"path": "ok.npy"}, mnt / "work"))


def job_previous_run_read_only(folder: Path, base: Base | None) -> Run:
    """A finished run on a file system that has become read-only, run again."""
    folder.mkdir(parents=True)
    with tmpfs(folder / "mnt", "16m") as mnt:
        shutil.copytree(base.workdir, mnt / "work")
        before = snapshot(mnt / "work")
        remount(mnt, "ro")
        run = run_config(folder, config({"path": str(base.input)}, mnt / "work"))
        run.notes["unchanged"] = snapshot(mnt / "work") == before
        return run


# ------------------------------------------------------------------------------ full disk

_DISK_ROWS = 3000


def _disk_config(folder: Path, workdir: Path, chunk_rows: int) -> dict:
    return config({"path": str(folder / "big.npy")}, workdir, run={"chunk_rows": chunk_rows})


def job_full_disk(folder: Path, base: Base | None) -> dict[str, Any]:
    """The work directory's file system fills up part-way through a run.

    3000 rows x 5 columns with ``chunk_rows = 3000``: every stage writes single large chunks,
    so a write that does not fit fails whole and leaves the remaining space free. Sizes
    (from the arrays' shapes): read ~0.1 MB, neighbours ~0.5 MB (two 3000 x 10 arrays of 8-byte
    values), affinity's K/indices and K/data ~0.36 MB each. Measured: any tmpfs from 0.7 to
    1.6 MB fails inside the affinity stage; 1.1 MB is the middle. 0.3 MB fails inside the
    neighbour stage, whose chunks are written by a dask worker task.
    """
    folder.mkdir(parents=True)
    rng = np.random.default_rng(5)
    np.save(folder / "big.npy", rng.standard_normal((_DISK_ROWS, 5)))
    out: dict[str, Any] = {}

    # The affinity stage overflows: read and neighbours are done and must be kept.
    with tmpfs(folder / "mid", "1100k") as mnt:
        cfg = _disk_config(folder, mnt / "work", 3000)
        failed = run_config(folder / "mid-cfg", cfg)
        failed.notes["states"] = stage_states(mnt / "work")
        kept = {s: (mnt / "work" / s / "stage.json").read_bytes() for s in ("read", "neighbors")
                if (mnt / "work" / s / "stage.json").is_file()}
        remount(mnt, "size=64m")  # free space, then the same command again
        again = run_config(folder / "mid-cfg", cfg)
        again.notes["kept"] = len(kept) == 2 and all(
            (mnt / "work" / s / "stage.json").read_bytes() == kept[s] for s in kept)
        out["mid"], out["again"] = failed, again

    # The neighbour stage overflows inside a dask worker task.
    with tmpfs(folder / "worker", "300k") as mnt:
        out["worker"] = run_config(folder / "worker-cfg", _disk_config(folder, mnt / "work", 3000))
        out["worker"].notes["states"] = stage_states(mnt / "work")

    # Chunks of 100 rows (2 KB, one page each) fill the disk to its last page in the read stage.
    with tmpfs(folder / "last", "96k") as mnt:
        out["last-page"] = run_config(folder / "last-cfg", _disk_config(folder, mnt / "work", 100))
    return out


# ------------------------------------------------------------------------------ the runner

JOBS: dict[str, Callable[[Path, Base | None], Any]] = {
    # the longest first, so the pool's tail is short
    "full-disk": job_full_disk,
    "other-input": job_other_input,
    "two-far-clusters": job_two_clusters,
    "previous-run-read-only": job_previous_run_read_only,
    **SANE,
    "workdir-read-only-mount": job_read_only_mount,
    **{name: refusal_job(spec) for name, spec in REFUSALS.items()},
}


# Jobs that use the finished base run; they are queued last, so it is done when they start.
NEEDS_BASE = {"other-input", "previous-run-read-only",
              *(name for name, spec in REFUSALS.items() if spec.previous)}


class Outcomes:
    def __init__(self, base: Future, futures: dict[str, Future]):
        self._base = base
        self._futures = futures

    @property
    def base(self) -> Base:
        return self._base.result()

    def __getitem__(self, name: str) -> Any:
        return self._futures[name].result()


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory) -> Iterator[Outcomes]:
    root = tmp_path_factory.mktemp("hostile")
    workers = max(2, min(4, (os.cpu_count() or 1) + 1))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        base = pool.submit(make_base, root / "base")
        order = sorted(JOBS, key=lambda name: name in NEEDS_BASE)  # stable: keeps JOBS order
        futures = {
            name: pool.submit(lambda job, folder, needs: job(folder, base.result() if needs else None),
                              JOBS[name], root / name, name in NEEDS_BASE)
            for name in order
        }
        yield Outcomes(base, futures)


# ------------------------------------------------------------------------------ tests: refusals


@pytest.mark.parametrize("name", list(REFUSALS))
def test_refused_with_one_clear_line(outcomes, name):
    spec = REFUSALS[name]
    run = outcomes[name]
    assert_refused(run, spec.code, spec.words, finished_before=spec.previous)
    if spec.previous:
        # The finished run in the same work directory is exactly as it was.
        assert run.notes["files_after"] == outcomes.base.files


INPUT_NAMES = {"all-rows-identical": "same.npy", "npy-single-row": "single.npy",
               "csv-ragged-line": "ragged.csv"}


@pytest.mark.parametrize("name", [
    "all-rows-identical",
    "npy-single-row",
    "csv-ragged-line",
])
def test_refusal_names_the_input_file(outcomes, name):
    line = one_line(outcomes[name].err)
    assert INPUT_NAMES[name] in line, line


def test_all_rows_identical_fails_after_the_neighbour_stage(outcomes):
    # Refused in the affinity stage: what ran before it is kept and marked done.
    run = outcomes["all-rows-identical"]
    assert run.status is not None and run.status["state"] == "failed"
    assert run.status["stages"]["read"] == run.status["stages"]["neighbors"] == "done"
    assert run.status["stages"]["affinity"] != "done"


def test_previous_run_is_intact_after_every_refused_setting(outcomes):
    for name, spec in REFUSALS.items():
        if spec.previous:
            outcomes[name]  # wait for every case that pointed at the finished run
    info = status_json(outcomes.base.workdir)  # from the CLI
    assert info["complete"] is True and info["rows"] == BASE_ROWS
    # The other cases read status in-process (each CLI start costs 1-2 s): the same object.
    keys = ("workdir", "complete", "state", "error", "stages", "rows", "eigenvalues", "residuals")
    assert {k: info[k] for k in keys} == {k: status_of(outcomes.base.workdir)[k] for k in keys}
    assert snapshot(outcomes.base.workdir) == outcomes.base.files
    assert np.array_equal(coordinates(outcomes.base.workdir), outcomes.base.run.coords)


# ------------------------------------------------------------------------------ tests: sane maps


@pytest.mark.parametrize("name", [n for n in SANE if n != "zarr-chunk-lost"])
def test_hostile_but_valid_tables_give_a_sane_map(outcomes, name):
    assert_sane(outcomes[name], SANE_ROWS.get(name, BASE_ROWS))


@pytest.mark.parametrize("name", ["values-near-1e30", "values-near-1e-30"])
def test_map_does_not_depend_on_the_scale_of_the_values(outcomes, name):
    # Self-tuning bandwidth (Zelnik-Manor & Perona, NIPS 2004): sigma_i is a neighbour
    # distance, so d_ij^2 / (sigma_i sigma_j) and with it the whole map are unchanged when
    # every value is multiplied by the same factor. Signs follow the same documented rule
    # (largest-magnitude entry positive), so coordinates compare directly. The 1e-6 bar allows
    # for the float32 rounding of X * scale (relative 6e-8 per value).
    run = outcomes[name]
    assert_sane(run, BASE_ROWS)
    assert relative_gap(run.coords, outcomes.base.run.coords) < 1e-6


@pytest.mark.parametrize(("name", "reference"), [
    ("constant-column", None), ("constant-column-standardized", "standardized-reference")])
def test_constant_column_changes_nothing(outcomes, name, reference):
    # A column holding one value adds 0 to every distance, so the map must be the one of the
    # table without it (with [prep] standardize its zero spread must not divide by zero).
    run = outcomes[name]
    ref = outcomes[reference].coords if reference else outcomes.base.run.coords
    assert_sane(run, BASE_ROWS)
    assert relative_gap(run.coords, ref) < 1e-6


@pytest.mark.parametrize(("name", "values"), [
    ("integer-input", _integers()),
    ("float16-input", base_table().astype(np.float16)),
    ("base", base_table()),
])
def test_input_dtypes_are_stored_as_the_run_dtype(outcomes, name, values):
    # Rule (io/readers.py, "Block dtype rule"): blocks are float64 when the stored values are
    # float64 and float32 otherwise (integers of any width, float16, float32); the read stage
    # then stores rows in `[run] dtype` (float32 by default). Integers of this size and float16
    # values are exact in float32, so the stored rows equal the input exactly; float64 input
    # is rounded to the nearest float32.
    run = outcomes.base.run if name == "base" else outcomes[name]
    assert_sane(run, BASE_ROWS)
    rows = stored_rows(run.workdir)
    assert rows.dtype == np.float32
    assert np.array_equal(rows, values.astype(np.float32))


def test_many_duplicate_rows(outcomes):
    # The 30 copies of one row have a zero 5th-neighbour distance; the map is still sane and
    # the graph stays in one piece.
    run = outcomes["many-duplicate-rows"]
    assert_sane(run, 270)
    assert run.status["graph"]["connected_components"] == 1


def test_million_to_one_density_separates_the_blob(outcomes):
    # With per-row bandwidths (Zelnik-Manor & Perona 2004) the blob (sigma ~1e-6) and the
    # cloud (sigma ~0.2) are each resolved at their own scale; across the gap
    # d^2 / (sigma_i sigma_j) ~ 0.01 / 2e-7 ~ 1e5, so the kernel is 0 there and the blob is a
    # group of its own (methods.md 3.6: components). The first coordinate must tell the two
    # apart: the blob's values and the cloud's do not overlap.
    run = outcomes["million-to-one-density"]
    assert_sane(run, 260)
    first = run.coords[:, 0]
    cloud, blob = first[:200], first[200:]
    assert cloud.max() < blob.min() or blob.max() < cloud.min(), (cloud, blob)


def test_dropped_rows_are_listed_by_id(outcomes):
    # The bad rows sit in three different blocks of 25 rows; without an id column they are
    # listed by 1-based row number (test_cli.py::test_bad_rows_can_be_dropped).
    run = outcomes["drop-csv-lists-ids"]
    assert_sane(run, 77)
    dropped = json.loads((run.workdir / "read" / "dropped.json").read_text())
    assert dropped == {"count": 3, "rows_or_ids": ["s3", "s30", "s57"]}
    # The kept rows are exactly the clean ones, in input order.
    assert np.array_equal(stored_rows(run.workdir),
                          run.notes["expected_rows"].astype(np.float32))


def test_zarr_chunk_absent_because_it_equals_the_fill_value(outcomes):
    run = outcomes["zarr-chunk-absent-as-fill-value"]
    assert run.notes["chunk_absent"]  # the case really has no chunk file for rows 41-60
    assert_sane(run, 100)
    assert np.array_equal(stored_rows(run.workdir), run.notes["expected_rows"].astype(np.float32))


def test_zarr_chunk_lost_is_reported(outcomes):
    run = outcomes["zarr-chunk-lost"]
    assert run.code == 0 and run.notes["rows_read"] is not None
    assert np.all(run.notes["rows_read"][40:60] == 0.0)  # what zarr hands over
    # one warning line names the store and the rows (the 20 zero rows also trip the
    # duplicate-rows quality warning, a second, separate line)
    [line] = [ln for ln in run.err.splitlines() if "lost.zarr" in ln]
    for word in ("lost.zarr", "41", "60", "fill value"):
        assert word in line, (word, line)


SANE_QUIET = [n for n in SANE if n != "zarr-chunk-lost"]


@pytest.mark.parametrize("name", SANE_QUIET)
def test_quiet_success_prints_only_eigenstream_lines(outcomes, name):
    # With -q, stderr holds warnings only, each one line starting with "eigenstream: ".
    run = outcomes[name]
    assert run.code == 0, run.err
    for line in run.err.splitlines():
        assert not line.strip() or line.startswith("eigenstream: "), run.err


def test_two_far_clusters_warn_about_components(outcomes):
    run = outcomes["two-far-clusters"]
    assert_sane(run, 140)
    warnings = [ln for ln in run.err.splitlines() if "connected components" in ln]
    assert len(warnings) == 1 and warnings[0].startswith("eigenstream: "), run.err
    assert "2 connected components" in warnings[0]
    assert "[graph] neighbors" in warnings[0]  # the fix it suggests


# ------------------------------------------------------------------------------ tests: workdirs


def test_workdir_of_another_input_is_refused_then_fresh_discards_it(outcomes):
    base = outcomes.base
    refused = outcomes["other-input"]["refused"]
    assert_refused(refused, 4, ["another input", str(base.input), "--fresh",
                                "`[run] workdir`"], finished_before=True)
    # The refusal leaves the other input's finished run exactly as it was ...
    assert refused.status is not None and refused.status["complete"] is True
    assert refused.status["rows"] == BASE_ROWS
    assert np.array_equal(refused.notes["coords_after"], base.run.coords)
    # ... and --fresh says what it throws away, then maps the new input.
    fresh = outcomes["other-input"]["fresh"]
    assert fresh.code == 0, fresh.err
    said = [ln for ln in fresh.err.splitlines() if "--fresh" in ln]
    assert len(said) == 1, fresh.err
    for item in (*stage_names(), "run.json", "manifest.json", "map.png", "spectrum.png"):
        assert item in said[0], (item, said[0])
    assert_sane(fresh, 120)


def test_status_of_a_path_below_a_file(outcomes):
    code, _, err = outcomes["workdir-below-a-file"].notes["status_cli"]
    assert "Traceback" not in err and code == 4, err
    line = one_line(err)
    assert line.startswith("eigenstream: error: ") and "afile/sub" in line, line


def test_read_only_file_system_is_refused(outcomes):
    run = outcomes["workdir-read-only-mount"]
    assert_refused(run, 4, ["Read-only file system", "choose a writable `[run] workdir`"])


def test_finished_run_on_a_file_system_turned_read_only(outcomes):
    run = outcomes["previous-run-read-only"]
    assert_refused(run, 4, ["Read-only file system", "choose a writable `[run] workdir`"],
                   finished_before=True)
    assert run.status is not None and run.status["complete"] is True, run.status
    assert run.notes["unchanged"]
    assert np.array_equal(run.coords, outcomes.base.run.coords)


# ------------------------------------------------------------------------------ tests: full disk


def test_disk_full_mid_run_keeps_finished_stages_and_resumes(outcomes):
    disk = outcomes["full-disk"]
    failed = disk["mid"]
    assert_refused(failed, 4, ["Cannot write stage 'affinity'", "No space left on device",
                               "free space", "finished stages are kept"])
    assert failed.notes["states"]["read"] == failed.notes["states"]["neighbors"] == "done"
    assert failed.notes["states"]["affinity"] != "done"
    again = disk["again"]
    assert_sane(again, _DISK_ROWS)
    assert again.notes["kept"]  # read and neighbours were reused, not redone


def test_disk_full_inside_a_worker_task(outcomes):
    run = outcomes["full-disk"]["worker"]
    assert_refused(run, 4, ["Cannot write stage 'neighbors'", "free space"])
    assert run.notes["states"]["read"] == "done"


def test_disk_full_to_the_last_page(outcomes):
    run = outcomes["full-disk"]["last-page"]
    assert_refused(run, 4, ["No space left on device", "free space"])

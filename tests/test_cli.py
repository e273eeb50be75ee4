"""The command line as a user runs it: real subprocesses, real files, exit codes, messages."""

from __future__ import annotations

import json
import subprocess
import sys

import h5py
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest


def cli(*args, cwd=None):
    proc = subprocess.run(
        [sys.executable, "-m", "eigenstream", "-q", *map(str, args)],
        capture_output=True, text=True, cwd=cwd, timeout=600,
    )
    return proc.returncode, proc.stdout, proc.stderr


def write_config(folder, inp: str, extra: str = "") -> str:
    text = (
        f"[input]\n{inp}\n"
        "[graph]\nneighbors = 10\n"
        "[kernel]\nbandwidth_neighbor = 5\n"
        '[run]\nworkdir = "work"\nchunk_rows = 100\n'
        "[cluster]\nprocesses = false\nworkers = 1\n" + extra
    )
    path = folder / "cfg.toml"
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli")
    rng = np.random.default_rng(1)
    t = rng.uniform(0, 3 * np.pi, 300)
    X = np.c_[t * np.cos(t), 5 * rng.uniform(size=300), t * np.sin(t)]
    ids = np.array([f"r{i:04d}" for i in range(300)])
    pq.write_table(pa.table({"rid": ids, "x": X[:, 0], "y": X[:, 1], "z": X[:, 2]}),
                   folder / "rows.parquet")
    cfg = write_config(folder, 'path = "rows.parquet"\nid_column = "rid"')
    code, out, err = cli("run", cfg, "--set", "embedding.components=3")
    assert code == 0, err
    return folder, ids, out


def test_run_prints_where_results_are(finished):
    folder, _, out = finished
    assert "map.png" in out and "manifest.json" in out


def test_status_json_has_the_agreed_keys(finished):
    folder, _, _ = finished
    code, out, _ = cli("status", folder / "work", "--json")
    info = json.loads(out)
    assert code == 0 and info["complete"] is True
    assert info["rows"] == 300 and info["components"] == 3
    assert len(info["eigenvalues"]) == 3 and len(info["residuals"]) == 3
    assert info["eigenvalues"] == sorted(info["eigenvalues"], reverse=True)
    assert all(r < 1e-6 for r in info["residuals"])
    assert info["stages"]["solve"] == "done" and "timings" in info
    code, out, _ = cli("status", folder / "work")
    assert code == 0 and "complete" in out


@pytest.mark.parametrize("fmt", ["npy", "parquet", "csv"])
def test_export_in_input_order_with_ids(finished, fmt):
    folder, ids, _ = finished
    target = folder / f"coords.{fmt}"
    code, _, err = cli("export", folder / "work", "--output", target)
    assert code == 0, err
    import zarr

    coords = zarr.open_group(str(folder / "work" / "extend" / "data.zarr"), mode="r")["coordinates"][...]
    if fmt == "npy":
        assert np.array_equal(np.load(target), coords)
    elif fmt == "parquet":
        table = pq.read_table(target)
        assert table.column_names[0] == "rid"
        assert table.column("rid").to_pylist() == ids.tolist()
        assert np.allclose(np.c_[[table.column(i).to_numpy() for i in range(1, 4)]].T, coords)
    else:
        import csv

        rows = list(csv.reader(target.read_text().splitlines()))
        assert rows[0] == ["rid", "component_1", "component_2", "component_3"]
        assert [r[0] for r in rows[1:]] == ids.tolist()
        assert np.allclose(np.array([r[1:] for r in rows[1:]], dtype=float), coords)


def test_python_m_and_console_script_agree(finished):
    folder, _, _ = finished
    exe = __import__("pathlib").Path(sys.executable).parent / "eigenstream"
    proc = subprocess.run([str(exe), "status", str(folder / "work"), "--json"], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0 and json.loads(proc.stdout)["complete"] is True


def _assert_clean_failure(code, err, expected_code, *words):
    assert code == expected_code, err
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    for word in words:
        assert word in err, (word, err)


def test_bad_inputs_fail_cleanly(tmp_path):
    rng = np.random.default_rng(2)
    X = rng.standard_normal((60, 3))
    X[41, 2] = np.nan
    np.save(tmp_path / "nan.npy", X)
    np.save(tmp_path / "tiny.npy", rng.standard_normal((5, 3)))
    np.save(tmp_path / "flat.npy", rng.standard_normal(50))
    np.save(tmp_path / "empty.npy", np.zeros((0, 3)))
    (tmp_path / "text.csv").write_text("a,b\n1,2\n" * 1 + "".join(f"{i},x{i}\n" for i in range(30)))
    with h5py.File(tmp_path / "two.h5", "w") as fh:
        fh["alpha"] = rng.standard_normal((40, 3))
        fh["beta"] = rng.standard_normal((40, 3))
    cases = [
        ('path = "missing.npy"', 3, ["missing.npy", "not found"]),
        ('path = "rows.xyz"', 2, ["[input] format"]),
        ('path = "nan.npy"', 3, ["nan.npy", "row 42", "on_bad_rows"]),
        ('path = "tiny.npy"', 3, ["5 rows", "[graph] neighbors"]),
        ('path = "flat.npy"', 3, ["flat.npy", "2-D"]),
        ('path = "empty.npy"', 3, ["empty.npy"]),
        ('path = "text.csv"\ncolumns = ["a", "b"]', 3, ["text.csv", "b"]),
        ('path = "two.h5"\ndataset = "gamma"', 3, ["gamma", "alpha", "beta"]),
        ('path = "tiny.npy"', 2, ["[kernel] alpha"], "kernel.alpha=2"),
        ('path = "nan.npy"', 2, ["[graph] neighbors"], "graph.neighbors=0"),
        ('path = "tiny.npy"', 2, ["[embedding] components"],
         "graph.neighbors=2", "kernel.bandwidth_neighbor=1", "embedding.components=4"),
    ]
    for number, (inp, expected, words, *overrides) in enumerate(cases):
        cfg = write_config(tmp_path, inp)
        overrides = [f'run.workdir="work{number}"', *overrides]
        code, _, err = cli("run", cfg, *[a for o in overrides for a in ("--set", o)])
        _assert_clean_failure(code, err, expected, *words)
        code, out, _ = cli("status", tmp_path / f"work{number}", "--json")
        if code == 0:
            assert json.loads(out)["complete"] is False


def test_bad_rows_can_be_dropped(tmp_path):
    rng = np.random.default_rng(3)
    X = rng.standard_normal((80, 3))
    X[[4, 50], 1] = [np.inf, np.nan]
    np.save(tmp_path / "nan.npy", X)
    cfg = write_config(tmp_path, 'path = "nan.npy"', '[map]\n')
    code, _, err = cli("run", cfg, "--set", 'run.on_bad_rows="drop"')
    assert code == 0, err
    dropped = json.loads((tmp_path / "work" / "read" / "dropped.json").read_text())
    assert dropped["rows_or_ids"] == [5, 51]
    code, out, _ = cli("status", tmp_path / "work", "--json")
    assert json.loads(out)["rows"] == 78


@pytest.mark.parametrize(
    ("args", "code_expected", "words"),
    [
        (["run", "nope.toml"], 2, ["nope.toml", "not found"]),
        (["status", "no-such-dir"], 4, ["no-such-dir"]),
        (["frobnicate"], 2, ["invalid choice"]),
    ],
)
def test_usage_errors_are_one_line(tmp_path, args, code_expected, words):
    code, _, err = cli(*args, cwd=tmp_path)
    _assert_clean_failure(code, err, code_expected, *words)


def test_unknown_set_key_is_refused(tmp_path):
    np.save(tmp_path / "ok.npy", np.random.default_rng(0).standard_normal((40, 3)))
    cfg = write_config(tmp_path, 'path = "ok.npy"')
    code, _, err = cli("run", cfg, "--set", "graph.neighbours=5")
    _assert_clean_failure(code, err, 2, "neighbours", "Did you mean `neighbors`")
    assert not (tmp_path / "work").exists()


def test_demo_end_to_end_with_worker_processes(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "eigenstream", "-q", "demo", "--rows", "1500", "--workdir",
         str(tmp_path / "demo")],
        capture_output=True, text=True, timeout=600,
    )
    assert proc.returncode == 0, proc.stderr
    run_dir = tmp_path / "demo" / "run"
    for name in ("map.png", "map-season.png", "spectrum.png", "manifest.json"):
        assert (run_dir / name).stat().st_size > 0
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["rows"] == 1500
    assert max(manifest["residuals"]) < 1e-6


def test_fresh_never_follows_a_link_out_of_the_workdir(tmp_path):
    import shutil

    np.save(tmp_path / "ok.npy", np.random.default_rng(0).standard_normal((60, 3)))
    cfg = write_config(tmp_path, 'path = "ok.npy"')
    assert cli("run", cfg)[0] == 0
    work = tmp_path / "work"
    outside = tmp_path / "precious"
    outside.mkdir()
    (outside / "keep.txt").write_text("mine")
    shutil.rmtree(work / "quality")
    (work / "quality").symlink_to(outside, target_is_directory=True)
    (work / "map.png").unlink()
    (work / "map.png").symlink_to(outside / "keep.txt")
    code, _, err = cli("run", cfg, "--fresh")
    assert code == 0, err
    assert (outside / "keep.txt").read_text() == "mine"  # the links went, their targets stayed
    assert (work / "quality").is_dir() and not (work / "quality").is_symlink()


def test_values_finer_than_float32_are_reported(tmp_path):
    # float32 has a 24-bit significand (IEEE 754): near 100 its step is 7.6e-6, so a cloud of
    # spread 1e-6 centred at 100 collapses when stored as float32. The run says why (one
    # warning line naming the columns and the fix) before refusing the collapsed rows; with
    # float64 storage the same table maps.
    rng = np.random.default_rng(4)
    X = 100.0 + 1e-6 * rng.standard_normal((80, 3))
    X[:40] += 1.0
    np.save(tmp_path / "fine.npy", X)
    cfg = write_config(tmp_path, 'path = "fine.npy"')
    code, _, err = cli("run", cfg)
    assert code == 3 and "Traceback" not in err, err
    [line] = [ln for ln in err.splitlines() if "stored as float32" in ln]
    assert "fine.npy" in line and 'dtype = "float64"' in line and "78 rows" in line
    code, _, err = cli("run", cfg, "--set", 'run.dtype="float64"', "--fresh")
    assert code == 0 and "float32" not in err, err

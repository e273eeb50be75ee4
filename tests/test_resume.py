"""Resume after interruptions: real processes killed with SIGKILL, real files, real signals.

The oracle for every case is the uninterrupted run with the same seed: the resumed map must
equal it (max abs difference <= 1e-6 after the sign rule), and blocks finished before the kill
must not be recomputed (their markers, which carry the writer's pid and time, stay untouched).
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time

import numpy as np
import pytest
import zarr

from eigenstream.pipeline import status

N_ROWS = 600
CHUNK = 50  # 12 blocks in read, neighbours and extend


def make_rows(seed=0, n=N_ROWS):
    rng = np.random.default_rng(seed)
    t = rng.uniform(0, 3 * np.pi, n)
    return np.c_[t * np.cos(t), 4 * rng.uniform(size=n), t * np.sin(t), 0.1 * rng.standard_normal(n)]


def write_config(folder, workdir="work", data="rows.npy"):
    cfg = folder / "cfg.toml"
    cfg.write_text(
        f'[input]\npath = "{data}"\n[graph]\nneighbors = 10\n[kernel]\nbandwidth_neighbor = 5\n'
        f'[embedding]\ncomponents = 3\n[run]\nworkdir = "{workdir}"\nchunk_rows = {CHUNK}\n'
        "checkpoint_seconds = 0\n[cluster]\nprocesses = false\nworkers = 1\n"
    )
    return cfg


def run_cli(*args, kill_at=None, quiet=True):
    env = dict(os.environ)
    env.pop("EIGENSTREAM_KILL_AT", None)
    if kill_at:
        env["EIGENSTREAM_KILL_AT"] = kill_at
    cmd = [sys.executable, "-m", "eigenstream", *(["-q"] if quiet else []), *map(str, args)]
    return subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=600)


def coords(workdir):
    return zarr.open_group(str(workdir / "extend" / "data.zarr"), mode="r")["coordinates"][...]


def markers(workdir):
    out = {}
    for path in workdir.glob("*/markers/*.json"):
        out[str(path.relative_to(workdir))] = path.read_text()
    return out


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    folder = tmp_path_factory.mktemp("reference")
    np.save(folder / "rows.npy", make_rows())
    proc = run_cli("run", write_config(folder))
    assert proc.returncode == 0, proc.stderr
    return folder, coords(folder / "work")


def _kill_points(seed=20261202):
    """Ten kill moments spread over every stage that does work in full-graph mode: seeded
    block markers in the blockwise stages, Lanczos checkpoints, and the start of the stages
    computed in one piece."""
    rng = np.random.default_rng(seed)
    blockwise = [(stage, int(rng.integers(1, 12))) for stage in
                 ("read", "read", "neighbors", "neighbors", "extend")]
    return [*blockwise, ("solve", 1), ("solve", 3), ("affinity-start", 1),
            ("quality-start", 1), ("report-start", 1)]


@pytest.mark.parametrize(("stage", "k"), _kill_points())
def test_kill_and_resume_gives_the_same_map(reference, tmp_path, stage, k):
    folder, expected = reference
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    killed = run_cli("run", cfg, kill_at=f"{stage}:{k}")
    assert killed.returncode == -signal.SIGKILL
    before = markers(tmp_path / "work")
    state = status(tmp_path / "work")  # what `status --json` prints (checked via the CLI below)
    name = stage.removesuffix("-start")
    assert state["complete"] is False and state["stages"][name] == "partial"
    if name in ("read", "neighbors", "extend"):
        assert state["blocks"][name]["done"] == k
    resumed = run_cli("run", cfg, quiet=False)
    assert resumed.returncode == 0, resumed.stderr
    after = markers(tmp_path / "work")
    # markers written before the kill are untouched: no finished block was recomputed
    # (stages that finished meanwhile keep theirs too)
    for name, text in before.items():
        if name in after:
            assert after[name] == text, name
    assert np.max(np.abs(coords(tmp_path / "work") - expected)) <= 1e-6
    if stage == "solve":
        summary = json.loads((tmp_path / "work" / "solve" / "stage.json").read_text())["summary"]
        assert summary["resumed_from_restart"] >= 1
        assert "continuing from the checkpoint" in resumed.stderr


def _flip_byte(path):
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("which", ["newest", "older"])
def test_damaged_block_is_detected_and_recomputed(reference, tmp_path, which):
    _, expected = reference
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    assert run_cli("run", cfg, kill_at="neighbors:6").returncode == -signal.SIGKILL
    work = tmp_path / "work"
    done = sorted(int(p.stem) for p in (work / "neighbors" / "markers").glob("*.json"))
    block = done[-1] if which == "newest" else done[1]
    _flip_byte(work / "neighbors" / "data.zarr" / "distances" / "c" / str(block) / "0")
    args = ["run", cfg] + (["--verify"] if which == "older" else [])
    resumed = run_cli(*args, quiet=False)
    assert resumed.returncode == 0, resumed.stderr
    assert f"block {block}" in resumed.stderr and "damaged" in resumed.stderr
    assert np.max(np.abs(coords(work) - expected)) <= 1e-6


def _finished_at(work):
    return {
        name: json.loads((work / name / "stage.json").read_text())["finished_at"]
        for name in ("read", "neighbors", "affinity", "solve", "extend", "quality", "report")
    }


@pytest.mark.parametrize(
    ("override", "rerun"),
    [
        ("embedding.components=2", {"solve", "extend", "quality", "report"}),
        ("embedding.diffusion_time=0", {"extend", "quality", "report"}),
        ("kernel.alpha=0.5", {"affinity", "solve", "extend", "quality", "report"}),
        ("graph.neighbors=12", {"neighbors", "affinity", "solve", "extend", "quality", "report"}),
    ],
)
def test_changing_one_setting_reruns_exactly_the_dependent_stages(tmp_path, override, rerun):
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    assert run_cli("run", cfg).returncode == 0
    before = _finished_at(tmp_path / "work")
    proc = run_cli("run", cfg, "--set", override, quiet=False)
    assert proc.returncode == 0, proc.stderr
    after = _finished_at(tmp_path / "work")
    assert {name for name in before if after[name] != before[name]} == rerun
    key = override.split("=")[0].split(".")[1]
    assert f"] {key}`" in proc.stderr  # the reason names the changed setting


def test_replaced_input_file_is_detected_and_redone(tmp_path):
    np.save(tmp_path / "rows.npy", make_rows(seed=0))
    cfg = write_config(tmp_path)
    assert run_cli("run", cfg).returncode == 0
    first = coords(tmp_path / "work")
    np.save(tmp_path / "rows.npy", make_rows(seed=1))
    proc = run_cli("run", cfg, quiet=False)
    assert proc.returncode == 0
    assert "input file changed" in proc.stderr
    assert not np.allclose(coords(tmp_path / "work"), first)


def test_a_second_run_on_a_locked_workdir_refuses_and_a_stale_lock_is_taken_over(tmp_path):
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    work = tmp_path / "work"
    work.mkdir()
    lock = {"host": socket.gethostname(), "pid": os.getpid(), "since": time.time()}
    (work / "lock").write_text(json.dumps(lock))
    proc = run_cli("run", cfg)
    assert proc.returncode == 4
    assert f"in use by process {os.getpid()}" in proc.stderr and "Traceback" not in proc.stderr
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True)
    lock["pid"] = int(dead.stdout)
    (work / "lock").write_text(json.dumps(lock))
    assert run_cli("run", cfg).returncode == 0
    assert not (work / "lock").exists()


def test_two_concurrent_runs_the_second_refuses_naming_the_first(tmp_path):
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    env = dict(os.environ, EIGENSTREAM_PAUSE_AFTER_BLOCK="read:2")
    env.pop("EIGENSTREAM_KILL_AT", None)
    first = subprocess.Popen([sys.executable, "-m", "eigenstream", "-q", "run", str(cfg)], env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    paused = tmp_path / "work" / "read" / "paused"
    deadline = time.monotonic() + 120
    while not paused.exists() and first.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    try:
        second = run_cli("run", cfg)
        assert second.returncode == 4
        assert f"in use by process {first.pid}" in second.stderr
    finally:
        first.send_signal(signal.SIGINT)
        first.communicate(timeout=120)
    assert first.returncode == 130
    assert run_cli("run", cfg).returncode == 0


def test_sigterm_stops_after_the_current_block_and_says_how_to_resume(reference, tmp_path):
    _, expected = reference
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    env = dict(os.environ, EIGENSTREAM_PAUSE_AFTER_BLOCK="neighbors:3")
    env.pop("EIGENSTREAM_KILL_AT", None)
    proc = subprocess.Popen([sys.executable, "-m", "eigenstream", "run", str(cfg)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    marker = tmp_path / "work" / "neighbors" / "paused"
    deadline = time.monotonic() + 120
    while not marker.exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "run the same command again" in err.lower() and "Traceback" not in err
    state = json.loads(run_cli("status", tmp_path / "work", "--json").stdout)
    assert state["state"] == "interrupted" and state["blocks"]["neighbors"]["done"] == 3
    assert run_cli("run", cfg).returncode == 0
    assert np.max(np.abs(coords(tmp_path / "work") - expected)) <= 1e-6


def test_a_lock_from_another_host_is_taken_over_only_when_silent(tmp_path):
    # A killed batch job leaves a lock naming its node; the next driver runs elsewhere. The
    # holder refreshes the lock every 30 s; one silent for 2 minutes is stale (ours).
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    work = tmp_path / "work"
    work.mkdir()
    lock = work / "lock"
    lock.write_text(json.dumps({"host": "node-that-died", "pid": 4242, "since": time.time()}))
    proc = run_cli("run", cfg)
    assert proc.returncode == 4 and "node-that-died" in proc.stderr  # fresh: still held
    old = time.time() - 600
    os.utime(lock, (old, old))
    proc = run_cli("run", cfg, quiet=False)
    assert proc.returncode == 0, proc.stderr
    assert "stale lock" in proc.stderr and not lock.exists()


def test_kill_during_lobpcg_resumes_from_the_saved_round(reference, tmp_path):
    # The LOBPCG path (used by default from 50,000 rows) checkpoints its block after every
    # round; oracle: the uninterrupted LOBPCG run with the same settings.
    np.save(tmp_path / "rows.npy", make_rows())
    cfg = write_config(tmp_path)
    settings = ["--set", "solver.method=lobpcg", "--set", "solver.tol=1e-11"]
    whole = run_cli("run", cfg, "--set", "run.workdir=whole", *settings)
    assert whole.returncode == 0, whole.stderr
    killed = run_cli("run", cfg, *settings, kill_at="solve:1")
    assert killed.returncode == -signal.SIGKILL
    resumed = run_cli("run", cfg, *settings, quiet=False)
    assert resumed.returncode == 0, resumed.stderr
    assert "continuing from the checkpoint of lobpcg" in resumed.stderr
    summary = json.loads((tmp_path / "work" / "solve" / "stage.json").read_text())["summary"]
    assert summary["solver"] == "lobpcg" and summary["resumed_from_restart"] >= 1
    assert np.max(np.abs(coords(tmp_path / "work") - coords(tmp_path / "whole"))) <= 1e-6
    # and LOBPCG's map is the Lanczos map of the module's reference run (same operator)
    assert np.max(np.abs(coords(tmp_path / "work") - reference[1])) <= 1e-6

"""Report stage: the PNG map, the eigenvalue plot and ``manifest.json`` in the work directory."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np

from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext, peak_memory_bytes, status, versions
from eigenstream.plots import plot_map, plot_spectrum
from eigenstream.report_html import write_report
from eigenstream.workdir import Workdir, read_json, write_json_atomic

MAP_FILE = "map.png"
SPECTRUM_FILE = "spectrum.png"
MANIFEST_FILE = "manifest.json"
REPORT_FILE = "report.html"


def _run(ctx: StageContext) -> dict[str, Any]:
    config, wd = ctx.config, ctx.workdir
    coords = ctx.input_store("extend")["coordinates"]
    solved = ctx.input_store("solve")
    read_group = ctx.input_store("read")
    eigenvalues = np.asarray(solved["eigenvalues"][...])
    residuals = np.asarray(solved["residuals"][...])
    color = store.read_labels(read_group["color"]) if "color" in read_group else None
    n, c = coords.shape
    solve_summary = ctx.upstream.get("solve", {})
    with ctx.progress(3, "files") as bar:
        if c >= 2:
            plot_map(coords, wd.path / MAP_FILE, color=color, color_label=config.map.color_column,
                     title=f"{n:,} rows", seed=config.run.seed)
        bar.update(1)
        plot_spectrum(eigenvalues, wd.path / SPECTRUM_FILE, residuals=residuals)
        bar.update(1)
        manifest = {
            "config": config.to_dict(),
            "versions": versions(),
            "seed": config.run.seed,
            "rows": n,
            "components": c,
            "eigenvalues": eigenvalues.tolist(),
            "residuals": residuals.tolist(),
            "eigenvectors_kept": solve_summary.get("eigenvectors_kept"),
            "candidate_harmonic_residuals": solve_summary.get("candidate_harmonic_residuals"),
            "stages": ctx.upstream,
            "timings": {name: s.get("seconds") for name, s in _stage_states(wd).items()},
            "peak_memory": peak_memory_bytes(),
            "written": time.time(),
            "files": {"map": MAP_FILE if c >= 2 else None, "spectrum": SPECTRUM_FILE},
        }
        write_json_atomic(wd.path / MANIFEST_FILE, manifest)
        write_run_report(wd.path, final=True)
        bar.update(1)
    return {"map": MAP_FILE if c >= 2 else None, "spectrum": SPECTRUM_FILE,
            "manifest": MANIFEST_FILE, "report": REPORT_FILE}


def write_run_report(workdir: Path, output: Path | None = None, *, final: bool = False) -> Path:
    """Write the self-contained HTML report of the run in ``workdir``.

    ``final=True`` is used by the report stage itself: every other stage is done, so the run
    is described as complete.
    """
    wd = Workdir(workdir)
    info = status(wd.path)
    record = wd.read_run() or {}
    states = _stage_states(wd)
    info["timings"] = {name: st.get("seconds") for name, st in states.items()}
    if final:
        info["complete"], info["state"] = True, "complete"
        info["stages"]["report"] = "done"
    read_summary = states.get("read", {}).get("summary", {})
    info.update(
        config=record.get("config"),
        versions=record.get("versions"),
        seed=record.get("seed"),
        fingerprints={name: st.get("fingerprint") for name, st in states.items()},
        peak_memory=record.get("peak_memory") or peak_memory_bytes(),
        cluster=record.get("cluster"),
        columns=read_summary.get("columns"),
        started=record.get("started"),
        finished=record.get("finished"),
    )
    images = {
        "map": wd.path / MAP_FILE,
        "map-season": wd.path / "map-season.png",
        "spectrum": wd.path / SPECTRUM_FILE,
        "bandwidths": wd.path / "quality" / "bandwidths.png",
        "tune-curve": wd.path / "tune" / "curve.png",
        "tune-maps": wd.path / "tune" / "small-multiples.png",
    }
    images = {name: path for name, path in images.items() if path.is_file()}
    tune = read_json(wd.path / "tune" / "tune.json")
    return write_report(output or wd.path / REPORT_FILE, info, images=images, tune=tune)


def _stage_states(wd) -> dict[str, dict[str, Any]]:
    out = {}
    from eigenstream.pipeline import stages

    for name in (stage.name for stage in stages() if stage.name != "report"):
        state = wd.stage_state(name)
        if state:
            out[name] = state
    return out


STAGE = Stage(
    name="report",
    version=1,
    config_keys=("map.color_column",),
    inputs=("extend", "quality", "read"),
    run=_run,
)

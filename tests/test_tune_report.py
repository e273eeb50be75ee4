"""`eigenstream tune` and `eigenstream report` through the real command line."""

from __future__ import annotations

import json
import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
from sklearn.datasets import load_digits


def cli(*args):
    proc = subprocess.run([sys.executable, "-m", "eigenstream", "-q", *map(str, args)],
                          capture_output=True, text=True, timeout=600)
    return proc.returncode, proc.stdout, proc.stderr


def config(folder, data):
    path = folder / "cfg.toml"
    path.write_text(f'[input]\npath = "{data}"\n[run]\nworkdir = "work"\n'
                    "[cluster]\nprocesses = false\nworkers = 1\n")
    return path


def test_tune_on_a_flat_sheet_finds_dimension_two_without_touching_the_run(tmp_path, rng):
    # A uniform 2-D square mapped isometrically into 10-D: Levina & Bickel (2004) estimate
    # about 2 (methods.md 9.9 measures 1.96-1.98 for the 2-cube at n = 2000-10000).
    basis, _ = np.linalg.qr(rng.standard_normal((10, 2)))
    X = rng.uniform(size=(3000, 2)) @ basis.T
    np.save(tmp_path / "sheet.npy", X)
    code, out, err = cli("tune", config(tmp_path, "sheet.npy"), "--sample", "2000", "--json")
    assert code == 0, err
    result = json.loads(out)
    assert abs(result["intrinsic_dimension"] - 2) < 0.2
    low, high = result["bandwidth_range"]
    assert 0 < low < high
    assert set(result["recommended"]) == {"graph", "kernel"}
    assert result["sample_rows"] == 2000 and result["input_rows"] == 3000
    work = tmp_path / "work"
    for name in ("tune.json", "curve.png", "small-multiples.png"):
        assert (work / "tune" / name).stat().st_size > 0
    assert not (work / "run.json").exists()  # the main run is untouched


class _Collector(HTMLParser):
    def __init__(self):
        super().__init__()
        self.ids, self.sources = set(), []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "id" in attrs:
            self.ids.add(attrs["id"])
        if tag == "img":
            self.sources.append(attrs.get("src", ""))


def test_digits_tune_then_run_then_report(tmp_path):
    # scikit-learn's bundled digits: Levina-Bickel inverse average 7.09 (methods.md 9.9).
    X = load_digits().data
    np.save(tmp_path / "digits.npy", X)
    cfg = config(tmp_path, "digits.npy")
    code, out, err = cli("tune", cfg, "--json")
    assert code == 0, err
    assert abs(json.loads(out)["intrinsic_dimension"] - 7.09) < 0.7
    code, out, err = cli("run", cfg)
    assert code == 0, err
    report = tmp_path / "work" / "report.html"
    first = report.stat().st_mtime_ns
    code, out, err = cli("report", tmp_path / "work")
    assert code == 0 and report.stat().st_mtime_ns >= first
    page = _Collector()
    page.feed(report.read_text())
    assert {"summary", "maps", "spectrum", "diagnostics", "tune", "config", "provenance"} <= page.ids
    assert page.sources and all(s.startswith("data:image/png;base64,") for s in page.sources)
    status = json.loads(cli("status", tmp_path / "work", "--json")[1])
    assert status["quality"]["trustworthiness"] > 0.85  # methods.md 9.6: ours 0.919-0.946 at 2-D

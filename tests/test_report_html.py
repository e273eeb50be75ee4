"""Tests of the self-contained HTML run report.

The page is read back with Python's own html.parser (the outside reference for what a
browser's tokenizer sees), embedded pictures are decoded with base64 and
matplotlib.image.imread, the TOML blocks are parsed with the standard library's tomllib,
and, where a Chromium browser is available, the page is rendered headless to a PNG.
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
import re
import shutil
import stat
import subprocess
import time
import tomllib
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from eigenstream.core.tuning import recommend
from eigenstream.errors import ConfigError, InputError
from eigenstream.plots import plot_map, plot_spectrum
from eigenstream.report_html import SECTION_IDS, build_report, write_report

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2
EVIL = "<script>alert(1)</script>"
EVIL_ATTR = '"><img src=x onerror=alert(2)>'
DASHBOARD = "http://127.0.0.1:8787/status"
# HTML Living Standard, "void elements": they have no end tag.
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}
CHROMIUM = "/usr/bin/chromium"


# ----------------------------------------------------------------------------- helpers


class Page(HTMLParser):
    """Collects tags, attributes, ids, text and nesting errors of an HTML document."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.starts: list[tuple[str, dict[str, str | None]]] = []
        self.ids: list[str] = []
        self.text: list[str] = []
        self.styles: list[str] = []
        self.nesting_errors: list[str] = []
        self.decl: list[str] = []
        self._stack: list[str] = []
        self._tag_text: dict[str, list[str]] = {}
        self.feed(text)
        self.close()
        if self._stack:
            self.nesting_errors.append(f"unclosed: {self._stack}")

    def handle_decl(self, decl):
        self.decl.append(decl)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.starts.append((tag, a))
        if "id" in a:
            self.ids.append(a["id"])
        if a.get("style"):
            self.styles.append(a["style"])
        if tag not in VOID:
            self._stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)
        if tag not in VOID:
            self._stack.pop()

    def handle_endtag(self, tag):
        if tag in VOID:
            self.nesting_errors.append(f"end tag of void element {tag}")
        elif not self._stack or self._stack[-1] != tag:
            self.nesting_errors.append(f"</{tag}> closes {self._stack[-1:] or 'nothing'}")
        else:
            self._stack.pop()

    def handle_data(self, data):
        self.text.append(data)
        if self._stack:
            self._tag_text.setdefault(self._stack[-1], []).append(data)
            if self._stack[-1] == "style":
                self.styles.append(data)

    def tags(self, name: str) -> list[dict[str, str | None]]:
        return [a for t, a in self.starts if t == name]

    def texts_of(self, name: str) -> list[str]:
        return self._tag_text.get(name, [])

    def all_text(self) -> str:
        return " ".join(" ".join(self.text).split())


def _png_from_uri(uri: str) -> bytes:
    prefix = "data:image/png;base64,"
    assert uri.startswith(prefix), uri[:40]
    data = base64.b64decode(uri[len(prefix):], validate=True)
    assert data[:8] == PNG_SIGNATURE
    return data


def _section_text(text: str, sid: str) -> str:
    """Visible text of the <section id=sid> of ``text`` (sections do not nest)."""
    match = re.search(rf'<section id="{sid}">(.*?)</section>', text, flags=re.S)
    assert match, f"no section {sid}"
    return Page(match.group(1)).all_text()


# ----------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def pictures(tmp_path_factory) -> dict[str, Path]:
    """Real pictures drawn by the package's own plot functions, plus a tuning curve."""
    folder = tmp_path_factory.mktemp("pictures")
    rng = np.random.default_rng(11)
    angle = rng.uniform(0, 2 * np.pi, 600)
    coords = np.column_stack([np.cos(angle), np.sin(angle), np.cos(2 * angle)])
    coords += rng.normal(0, 0.05, coords.shape)
    label = np.where(angle < np.pi, "north", "south")
    out = {
        "map": plot_map(coords, folder / "map.png", title="600 rows"),
        "map-half": plot_map(coords, folder / "map-half.png", color=label,
                             color_label="half", components=(1, 3)),
        "spectrum": plot_spectrum([0.99, 0.97, 0.6, 0.55], folder / "spectrum.png",
                                  residuals=[1e-12, 3e-11, 2e-9, 5e-9]),
    }
    fig = Figure(figsize=(5, 3.5), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    eps = np.geomspace(0.01, 100, 40)
    ax.plot(np.log(eps), np.log1p(eps), "o-")
    ax.set_xlabel("log bandwidth")
    fig.savefig(folder / "tune-curve.png", format="png", dpi=100)
    out["tune-curve"] = folder / "tune-curve.png"
    return out


@pytest.fixture(scope="module")
def tune() -> dict:
    """Real tuning output of the package for a Gaussian sample (keys as recommend() gives)."""
    sample = np.random.default_rng(5).normal(size=(300, 3))
    return recommend(sample, seed=0)


def _info() -> dict:
    """A finished run as status() reports it, extended as the report expects, with hostile text."""
    return {
        "workdir": "/data/runs/meters",
        "complete": True,
        "state": "complete",
        "error": None,
        "stages": {"read": "done", "neighbors": "done", "affinity": "done", "solve": "done",
                   "extend": "done", "report": "done"},
        "timings": {"read": 1.5, "neighbors": 62.25, "affinity": 3.0, "solve": 10.0,
                    "extend": 2.0, "report": 0.5},
        "started": 1_700_000_000.0,
        "finished": 1_700_000_090.0,
        "peak_memory": {"driver": 368_443_392, "largest_child": 343_834_624},
        "rows": 2000,
        "columns": ["kw_0000", "kw_0015", EVIL],
        "components": 4,
        "eigenvalues": [0.999, 0.99, 0.95, 0.7],
        "residuals": [1e-15, 2e-14, 3e-12, 1.6e-10],
        "matvecs": 297,
        "graph": {"nnz": 41096, "connected_components": 1},
        "config": {
            "input": {"path": "/data/meters.parquet", "id_column": EVIL,
                      "exclude_columns": ["household", EVIL_ATTR]},
            "graph": {"neighbors": 15, "metric": "euclidean"},
            "kernel": {"bandwidth": "adaptive", "alpha": 1.0},
            "embedding": {"components": 4, "diffusion_time": 1.0},
            "run": {"seed": 7, "workdir": "/data/runs/meters", "dtype": "float32"},
            "map": {"color_column": None},
            "solver": {"tol": 1e-8, "extend": True},
            "cluster": {"kind": "local", "workers": 0},
            "notes": {EVIL: 'quote " and backslash \\ and tab \t'},
        },
        "versions": {"eigenstream": "0.1.0", "numpy": "2.4.6", EVIL: "1.0"},
        "seed": 7,
        "fingerprints": {"read": "a9c34239db4b6276b9a220ad", "solve": "5fe1f8e6d20af2a408eaca2a"},
        "cluster": {"kind": "local", "dashboard": DASHBOARD},
        "quality": {
            "connected_components": 1,
            "component_sizes": [2000],
            "knn_recall": 0.41,
            "trustworthiness": 0.93,
            "continuity": 0.91,
            "eigengap": [2, 0.25],
            "max_residual": 1.6e-10,
            "duplicate_rows": 0,
            "bandwidth_quantiles": [1.34, 2.40, 18.4],
            "checks": [
                {"name": "trustworthiness", "value": 0.93, "threshold": 0.85, "direction": "min",
                 "status": "pass", "meaning": "few false neighbours in the map"},
                {"name": "knn_recall", "value": 0.41, "threshold": 0.9, "direction": "min",
                 "status": "warn", "meaning": EVIL},
                {"name": EVIL_ATTR, "value": 1e-10, "threshold": 1e-6, "status": "pass",
                 "meaning": "eigenpairs converged"},
            ],
        },
    }


# ----------------------------------------------------------------------------- structure


def test_report_parses_with_balanced_nesting(pictures, tune):
    text = build_report(_info(), images=pictures, tune=tune)
    page = Page(text)
    assert page.decl == ["DOCTYPE html"]
    assert page.nesting_errors == []
    for tag in ("html", "head", "body", "title", "main"):
        assert len(page.tags(tag)) == 1, tag
    assert page.tags("meta")[0] == {"charset": "utf-8"}
    assert len(page.ids) == len(set(page.ids)), "duplicate element ids"


def test_every_section_is_present(pictures, tune):
    with_tune = Page(build_report(_info(), images=pictures, tune=tune))
    assert set(SECTION_IDS) <= set(with_tune.ids)
    assert [i for i in with_tune.ids if i in SECTION_IDS] == list(SECTION_IDS)  # page order
    without = Page(build_report(_info(), images=pictures))
    assert set(SECTION_IDS) - {"tune"} <= set(without.ids)
    assert "tune" not in without.ids
    # the table of contents points at sections that exist
    targets = [a["href"][1:] for a in without.tags("a")]
    assert targets and set(targets) <= set(without.ids)


def test_images_are_embedded_png_data(pictures, tune):
    page = Page(build_report(_info(), images=pictures, tune=tune))
    imgs = page.tags("img")
    assert len(imgs) == len(pictures)
    by_alt = {}
    for img in imgs:
        data = _png_from_uri(img["src"])
        pixels = mpimg.imread(io.BytesIO(data), format="png")
        assert pixels.ndim == 3 and min(pixels.shape[:2]) > 100
        by_alt[img["alt"].split(":")[0]] = data
    # each picture arrives byte for byte
    assert set(by_alt) == set(pictures)
    for name, path in pictures.items():
        assert by_alt[name] == Path(path).read_bytes()


def test_page_loads_nothing_from_elsewhere(pictures, tune):
    text = build_report(_info(), images=pictures, tune=tune)
    page = Page(text)
    refs = [v for _, a in page.starts for k, v in a.items() if k in ("src", "href") and v]
    refs += [m for css in page.styles for m in re.findall(r"url\(([^)]*)\)", css)]
    assert refs
    for ref in refs:
        assert ref.startswith(("data:image/png;base64,", "#")), ref[:60]
        assert "http://" not in ref and "https://" not in ref
        assert not ref.strip("'\" ").startswith("//")
    assert not re.search(r"url\(\s*['\"]?\s*(https?:)?//", text)
    for tag in ("script", "link", "iframe", "object", "embed", "base", "form"):
        assert page.tags(tag) == [], tag
    # the live dashboard address of the run is not repeated in a page meant to outlive it
    assert DASHBOARD not in text


# ----------------------------------------------------------------------------- content


def test_untrusted_strings_are_escaped(pictures, tune):
    text = build_report(_info(), images=pictures, tune=tune)
    page = Page(text)
    assert "<script" not in text.lower()
    assert page.tags("script") == []
    # the only images are ours: nothing injected through an attribute
    assert all(set(a) == {"src", "alt"} for a in page.tags("img"))
    assert not any(k.startswith("on") for _, a in page.starts for k in a)
    assert html.escape(EVIL) in text
    # the parser gives the original strings back as plain text
    assert EVIL in page.all_text()
    assert EVIL_ATTR in page.all_text()


def test_hostile_image_name_is_escaped(pictures):
    images = {"map": pictures["map"], EVIL_ATTR: pictures["spectrum"]}
    page = Page(build_report(_info(), images=images))
    assert len(page.tags("img")) == 2
    assert all(set(a) == {"src", "alt"} for a in page.tags("img"))
    assert EVIL_ATTR in page.all_text()


def test_missing_keys_are_tolerated():
    text = build_report({}, images={})
    page = Page(text)
    assert page.nesting_errors == []
    assert set(SECTION_IDS) - {"tune"} <= set(page.ids)
    assert page.tags("img") == []
    for sid in ("summary", "maps", "spectrum", "diagnostics", "config", "provenance"):
        assert "not computed" in _section_text(text, sid), sid
    # odd shapes are shown, not fatal
    odd = {"timings": {"read": None}, "quality": {"checks": [{"name": "x"}, "bare"]},
           "eigenvalues": [0.9, None], "residuals": [], "peak_memory": 5, "cluster": "remote",
           "versions": {}, "columns": 12}
    page = Page(build_report(odd, images={}, tune={}))
    assert page.nesting_errors == []
    assert "tune" in page.ids
    assert "UNKNOWN" in page.all_text()


def test_unfinished_run_is_flagged():
    info = {"state": "failed", "complete": False, "error": EVIL,
            "stages": {"read": "done", "neighbors": "partial", "solve": "pending"}}
    text = build_report(info, images={})
    summary = _section_text(text, "summary")
    assert "not complete" in summary and EVIL in summary
    assert "<script" not in text.lower()


def test_summary_figures(pictures):
    text = build_report(_info(), images=pictures)
    summary = _section_text(text, "summary")
    assert "2,000" in summary  # rows
    assert re.search(r"columns 3\b", summary)
    # 368,443,392 B / 2**20 = 351.37 MiB; 343,834,624 B / 2**20 = 327.91 MiB
    assert "351.4 MiB" in summary and "327.9 MiB" in summary
    assert "1 min 19 s" in summary  # 1.5 + 62.25 + 3 + 10 + 2 + 0.5 = 79.25 s over the stages
    assert "1 min 30 s" in summary  # finished - started = 90 s
    assert "local" in summary
    assert "3 checks" in summary


def test_eigenvalue_table_and_largest_gap(pictures):
    info = _info()
    text = build_report(info, images=pictures)
    match = re.search(r'<section id="spectrum">.*?<tbody>(.*?)</tbody>', text, flags=re.S)
    rows = re.findall(r"<tr(?: class=\"gap\")?>(.*?)</tr>", match.group(1), flags=re.S)
    lam = np.array(info["eigenvalues"])
    assert len(rows) == lam.size
    cells = [[Page(c).all_text() for c in re.findall(r"<td[^>]*>(.*?)</td>", r, flags=re.S)]
             for r in rows]
    np.testing.assert_allclose([float(c[1]) for c in cells], lam, rtol=1e-8)
    np.testing.assert_allclose([float(c[2]) for c in cells], 1 - lam, rtol=1e-3)
    np.testing.assert_allclose([float(c[4]) for c in cells], info["residuals"], rtol=1e-2)
    # the marked row is the one before the largest drop, found here with numpy
    marked = [i for i, c in enumerate(cells) if "largest gap" in c[5]]
    assert marked == [int(np.argmax(-np.diff(lam)))] == [2]


def test_checks_carry_word_and_colour(pictures):
    text = build_report(_info(), images=pictures)
    page = Page(text)
    badges = [a["class"] for a in page.tags("span") if "badge" in (a.get("class") or "")]
    # summary tally shows one pass and one warn badge, the table one per check
    assert badges.count("badge pass") == 1 + 2 and badges.count("badge warn") == 1 + 1
    diagnostics = _section_text(text, "diagnostics")
    assert diagnostics.count("PASS") == 2 and diagnostics.count("WARN") == 1
    assert "0.93 ≥ 0.85" in diagnostics  # value and threshold side by side, with the direction
    assert "1e-10 1e-06" in diagnostics  # no direction given: the bare threshold
    styles = " ".join(page.texts_of("style"))
    colours = {m for m in re.findall(r"--(?:ok|warn)-bg:\s*(#[0-9a-f]{6})", styles)}
    assert len(colours) == 2  # two distinct background colours besides the words


def test_quality_stage_layout():
    # diagnostics as the quality stage stores them: "components", a dict eigengap, quantiles
    quality = {
        "components": 2, "knn_recall": 1.0, "duplicate_fraction": 0.0, "bandwidth_spread": 13.8,
        "eigengap": {"after_component": 3, "gap": 0.0128},
        "bandwidth_quantiles": {"max": 18.4, "median": 2.4, "min": 1.3},  # sorted by name
        "bridges": [[0, 1500, 3.2]], "spare": [], "sample_rows": 1000, "neighbor_method": "exact",
        "checks": [{"name": "components", "value": 2, "threshold": 1, "direction": "max",
                    "status": "warn", "meaning": "the graph had to be bridged"}],
    }
    text = build_report({"quality": quality}, images={})
    diagnostics = _section_text(text, "diagnostics")
    assert "Connected components of the graph 2" in diagnostics
    assert "0.0128 (after component 3)" in diagnostics
    assert "min: 1.3; median: 2.4; max: 18.4" in diagnostics
    assert "Largest / smallest bandwidth 13.8" in diagnostics
    assert "2 ≤ 1" in diagnostics and diagnostics.count("WARN") == 1
    measures = diagnostics.split("Measures", 1)[1]
    assert measures.count("components") == 1  # "components" is not listed a second time
    assert "Edges added to connect the graph [0, 1500, 3.2]" in measures
    assert "spare none" in measures  # an empty list is "none", not "not computed"


def test_config_block_is_valid_toml(pictures):
    info = _info()
    page = Page(build_report(info, images=pictures))
    pre = page.texts_of("pre")
    assert len(pre) == 1
    parsed = tomllib.loads(pre[0])  # stdlib parser as the reference
    expected = {k: {kk: vv for kk, vv in v.items() if vv is not None}
                for k, v in info["config"].items()}
    assert parsed == expected
    assert "# color_column = (not set)" in pre[0]


def test_tune_section(pictures, tune):
    text = build_report(_info(), images=pictures, tune=tune)
    page = Page(text)
    pres = page.texts_of("pre")
    assert len(pres) == 2
    assert tomllib.loads(pres[0]) == tune["recommended"]
    section = _section_text(text, "tune")
    assert f"{tune['intrinsic_dimension']:.4g}" in section
    low, high = tune["bandwidth_range"]
    assert f"{low:.4g} to {high:.4g}" in section
    assert "tune-curve" in section
    # a ready TOML string is shown as given
    given = dict(tune, toml='[graph]\nneighbors = 10\n# "quoted" <b>')
    page = Page(build_report(_info(), images={}, tune=given))
    assert page.texts_of("pre")[0] == given["toml"]


def test_provenance(pictures):
    text = build_report(_info(), images=pictures)
    section = _section_text(text, "provenance")
    for value in ("0.1.0", "2.4.6", "a9c34239db4b6276b9a220ad", "5fe1f8e6d20af2a408eaca2a"):
        assert value in section
    assert re.search(r"seed 7\b", section)
    # 1_700_000_000 s after the epoch is 2023-11-14 22:13:20 UTC (date(1), from memory)
    assert "2023-11-14 22:13:20 UTC" in section


# ----------------------------------------------------------------------------- files


def test_write_report_atomic(tmp_path, pictures):
    out = write_report(tmp_path / "report.html", _info(), images=pictures)
    assert out == tmp_path / "report.html"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]  # no temporary left
    assert stat.S_IMODE(out.stat().st_mode) == 0o644
    assert out.read_text(encoding="utf-8") == build_report(_info(), images=pictures)
    with pytest.raises(ConfigError, match="does not exist"):
        write_report(tmp_path / "nowhere" / "report.html", _info(), images={})


def test_bad_images_are_refused(tmp_path, pictures):
    with pytest.raises(InputError, match="map"):
        build_report(_info(), images={"map": tmp_path / "missing.png"})
    fake = tmp_path / "fake.png"
    fake.write_bytes(b"GIF89a not a png")
    with pytest.raises(InputError, match="not a PNG"):
        build_report(_info(), images={"map": fake})
    with pytest.raises(InputError, match="dict"):
        build_report(["not", "a", "dict"], images={})
    # a failed build leaves an existing report untouched
    good = write_report(tmp_path / "r.html", _info(), images=pictures)
    before = good.read_bytes()
    with pytest.raises(InputError):
        write_report(good, _info(), images={"map": fake})
    assert good.read_bytes() == before
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]


# ----------------------------------------------------------------------------- browser


@pytest.fixture(scope="session")
def chromium() -> str:
    """Path of a Chromium binary; Debian's package is installed with apt-get in CI (CI=true,
    as root) or when asked with EIGENSTREAM_INSTALL_BROWSER=1; elsewhere the test skips."""
    if os.path.exists(CHROMIUM):
        return CHROMIUM
    wants = (
        os.environ.get("EIGENSTREAM_INSTALL_BROWSER") == "1"
        or os.environ.get("CI", "").lower() == "true"
    )
    if not (wants and os.geteuid() == 0 and shutil.which("apt-get")):
        pytest.skip(
            f"{CHROMIUM} not found; to render the report, install chromium or run as root "
            "with EIGENSTREAM_INSTALL_BROWSER=1 (uses apt-get)"
        )
    env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
    t0 = time.monotonic()
    for cmd in (["apt-get", "update", "-qq"], ["apt-get", "install", "-y", "-qq", "chromium"]):
        done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=1800)
        if done.returncode != 0:
            pytest.fail(f"{' '.join(cmd)} failed ({done.returncode}): {done.stderr[-800:]}")
    print(f"chromium installed in {time.monotonic() - t0:.0f} s")
    if not os.path.exists(CHROMIUM):
        pytest.fail(f"apt-get installed chromium but {CHROMIUM} is missing")
    return CHROMIUM


def test_browser_renders_report(tmp_path, pictures, tune, chromium):
    page = write_report(tmp_path / "report.html", _info(), images=pictures, tune=tune)
    shot = tmp_path / "shot.png"
    cmd = [
        chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}",
        "--window-size=1200,3000", page.resolve().as_uri(),
    ]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert shot.exists(), f"no screenshot (exit {done.returncode}): {done.stderr[-800:]}"
    data = shot.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    pixels = mpimg.imread(io.BytesIO(data), format="png")[..., :3]
    assert pixels.shape[:2] == (3000, 1200)
    assert pixels.var() > 1e-3  # not a blank page
    ink = (pixels.min(axis=2) < 0.9).mean()
    assert 0.01 < ink < 0.9 and not math.isnan(ink)  # text and pictures on a light page

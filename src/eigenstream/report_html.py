"""A self-contained HTML report of one run: summary, maps, spectrum, diagnostics, provenance.

The page needs nothing but itself: pictures are embedded as base64 PNG data URIs, the
style sheet sits in the page, there are no scripts, fonts or links to other addresses,
so it can be mailed, archived or printed as one file. Every string that comes from the
run (config values, column names, messages) is HTML-escaped before it is written.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import math
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from eigenstream.errors import ConfigError, InputError
from eigenstream.io.atomic import atomic_path

__all__ = ["build_report", "write_report", "SECTION_IDS"]

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

# Element ids of the sections, in page order ("tune" only when tune results are given).
SECTION_IDS: tuple[str, ...] = (
    "summary", "caution", "maps", "spectrum", "diagnostics", "tune", "config", "provenance",
)

_NOT_COMPUTED = '<span class="na">not computed</span>'

# Known picture names and what their captions say; any other name is shown under "Other figures".
_CAPTIONS = {
    "map": "The first two embedding components, one point (or hexagon of points) per row.",
    "map-season": "Further embedding components, coloured by a column of the input.",
    "spectrum": "Eigenvalues (trivial one excluded), their distance from 1 and the residuals.",
    "bandwidths": "Distribution of the kernel bandwidths over the rows.",
    "tune-curve": "Log kernel sum against log bandwidth; the linear part bounds useful bandwidths.",
}

# Diagnostics shown in the measures table, in this order, with readable names. Each entry
# lists the keys it may be stored under (the quality stage writes "components").
_MEASURES: tuple[tuple[tuple[str, ...], str], ...] = (
    (("connected_components", "components"), "Connected components of the graph"),
    (("component_sizes",), "Rows per component"),
    (("knn_recall",), "kNN recall of the neighbour search"),
    (("trustworthiness",), "Trustworthiness"),
    (("continuity",), "Continuity"),
    (("eigengap",), "Largest eigengap"),
    (("max_residual",), "Largest relative residual"),
    (("duplicate_rows",), "Duplicate rows"),
    (("bandwidth_quantiles",), "Bandwidth quantiles"),
)
# Names of further diagnostics, when present; any other key is shown under its own name.
_EXTRA_LABELS = {
    "duplicate_fraction": "Fraction of rows with an exact duplicate",
    "bandwidth_spread": "Largest / smallest bandwidth",
    "harmonic_residual": "Smallest harmonic residual of a map coordinate",
    "harmonic_residuals": "Harmonic residual of each map coordinate",
    "bridges": "Edges added to connect the graph",
    "sample_rows": "Rows sampled for the measures",
    "quality_neighbors": "Neighbours used by the measures",
    "neighbor_method": "Neighbour search",
}
# Comparison a check's direction stands for: "min" means the value must be >= threshold.
_DIRECTIONS = {"min": "≥", "max": "≤"}


_STYLE = """
:root { --ink:#1f2328; --muted:#59636e; --rule:#d0d7de; --panel:#f6f8fa; --accent:#2d5f9a;
        --ok-bg:#dcf3e3; --ok-ink:#135c2e; --warn-bg:#fdebc8; --warn-ink:#7a4100;
        --other-bg:#e6e8eb; --other-ink:#3b4148; }
* { box-sizing: border-box; }
html { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
body { margin: 0; color: var(--ink); background: #fff; line-height: 1.45;
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial,
             sans-serif; }
main { max-width: 62rem; margin: 0 auto; padding: 1.5rem 1.5rem 3rem; }
header { border-bottom: 3px solid var(--accent); padding-bottom: .6rem; margin-bottom: 1rem; }
h1 { font-size: 1.7rem; margin: 0 0 .2rem; }
h2 { font-size: 1.25rem; margin: 2rem 0 .6rem; padding-bottom: .25rem;
     border-bottom: 1px solid var(--rule); }
h3 { font-size: 1.02rem; margin: 1.2rem 0 .4rem; }
.sub { color: var(--muted); margin: 0; overflow-wrap: anywhere; }
nav ol { display: flex; flex-wrap: wrap; gap: .3rem 1.2rem; list-style: none; padding: 0;
         margin: .6rem 0 0; font-size: .9rem; }
nav a { color: var(--accent); text-decoration: none; }
table { border-collapse: collapse; margin: .4rem 0 .8rem; font-size: .92rem; }
th, td { text-align: left; vertical-align: top; padding: .28rem .7rem .28rem 0;
         border-bottom: 1px solid var(--rule); }
thead th { border-bottom: 2px solid var(--rule); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; padding-right: 1rem;
                  white-space: nowrap; }
table.kv th { font-weight: 600; width: 18rem; color: var(--muted); }
table.wide { width: 100%; }
code, pre, .mono { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas,
                   "Liberation Mono", monospace; font-size: .86rem; }
pre { background: var(--panel); border: 1px solid var(--rule); border-radius: 4px;
      padding: .7rem .9rem; overflow-x: auto; white-space: pre-wrap; overflow-wrap: anywhere; }
.na { color: var(--muted); font-style: italic; }
.caution { background: #fff8e5; border-left: 4px solid #c98a00; padding: .6rem .9rem;
           margin: 1rem 0; }
.notice { background: #fdecea; border-left: 4px solid #b3261e; padding: .6rem .9rem;
          margin: 1rem 0; }
.badge { display: inline-block; min-width: 4.2rem; text-align: center; font-weight: 700;
         font-size: .8rem; letter-spacing: .03em; padding: .08rem .45rem; border-radius: 3px;
         border: 1px solid currentColor; white-space: nowrap; }
.badge.pass { background: var(--ok-bg); color: var(--ok-ink); }
.badge.warn { background: var(--warn-bg); color: var(--warn-ink); }
.badge.other { background: var(--other-bg); color: var(--other-ink); }
.tally { margin: .2rem 0 .8rem; }
.bar { display: inline-block; height: .7rem; background: var(--accent); border-radius: 2px;
       vertical-align: middle; }
figure { margin: .6rem 0 1.4rem; max-width: 100%; }
figure img { display: block; width: 100%; max-width: 46rem; height: auto;
             border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: .86rem; margin-top: .3rem; }
tr.gap td { background: #fdf3e7; }
footer { margin-top: 2.5rem; color: var(--muted); font-size: .82rem; }
@media print {
  body { font-size: 11pt; }
  main { max-width: none; padding: 0; }
  nav { display: none; }
  h2 { break-after: avoid; }
  figure, table, pre, .caution { break-inside: avoid; }
  figure img { max-width: 16cm; }
}
"""


# ----------------------------------------------------------------------------- formatting


def _esc(value: Any) -> str:
    """``value`` as text, HTML-escaped (quotes too, so it is also safe inside attributes)."""
    return html.escape(str(value), quote=True)


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _num(value: float, digits: int = 4, *, group: bool = True) -> str:
    """A float with ``digits`` significant digits; whole numbers in full, grouped by thousands
    unless ``group`` is False (inside comma-separated lists, where "1,500" would be ambiguous)."""
    if isinstance(value, float):
        if math.isnan(value):
            return "NaN"
        if math.isinf(value):
            return "∞" if value > 0 else "−∞"
        if value != int(value) or abs(value) >= 1e15:
            return f"{value:.{digits}g}"
        value = int(value)
    return f"{value:,}" if group else str(value)


def _fmt(value: Any, *, limit: int = 8, nested: bool = False) -> str:
    """Escaped HTML for any JSON-like value; None reads "not computed", an empty container "none".

    Inside a container (``nested``), numbers are not grouped and inner lists are bracketed.
    """
    if value is None:
        return _NOT_COMPUTED
    if hasattr(value, "tolist") and not isinstance(value, str):  # numpy scalars and arrays
        value = value.tolist()
    if isinstance(value, bool):
        return "yes" if value else "no"
    if _is_number(value):
        return _esc(_num(value, group=not nested))
    if isinstance(value, Mapping):
        if not value:
            return "{}" if nested else "none"
        inner = "; ".join(
            f"{_esc(k)}: {_fmt(v, limit=limit, nested=True)}" for k, v in value.items()
        )
        return f"{{{inner}}}" if nested else inner
    if isinstance(value, list | tuple):
        if not value:
            return "[]" if nested else "none"
        shown = ", ".join(_fmt(v, limit=limit, nested=True) for v in value[:limit])
        if len(value) > limit:
            shown += f", … ({len(value):,} values)"
        return f"[{shown}]" if nested else shown
    return _esc(value)


def _seconds(value: Any) -> str:
    """Wall time as escaped text: "0.97 s", "2 min 05 s", "1 h 02 min"."""
    if not _is_number(value) or not math.isfinite(value):
        return _fmt(value)
    s = float(value)
    if s < 60:
        return f"{s:.2f} s" if s < 10 else f"{s:.1f} s"
    if s < 3600:
        return f"{int(s // 60)} min {int(s % 60):02d} s"
    return f"{int(s // 3600)} h {int(s % 3600 // 60):02d} min"


def _bytes(value: Any) -> str:
    """A byte count as escaped text in binary units."""
    if not _is_number(value) or not math.isfinite(value) or value < 0:
        return _fmt(value)
    size = float(value)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if size < 1024 or unit == "TiB":
            return f"{size:,.0f} {unit}" if unit == "B" else f"{size:,.1f} {unit}"
        size /= 1024
    return ""  # unreachable


def _time(value: Any) -> str:
    """A POSIX time stamp as UTC date and time."""
    if not _is_number(value) or not math.isfinite(value):
        return _fmt(value)
    try:
        stamp = _dt.datetime.fromtimestamp(float(value), tz=_dt.UTC)
    except (OverflowError, OSError, ValueError):
        return _fmt(value)
    return stamp.strftime("%Y-%m-%d %H:%M:%S UTC")


def _get(mapping: Any, *keys: str) -> Any:
    """``mapping[k1][k2]...`` or None when any level is missing or not a mapping."""
    for key in keys:
        if not isinstance(mapping, Mapping):
            return None
        mapping = mapping.get(key)
    return mapping


def _float_list(value: Any) -> list[float | None]:
    """Numbers of a list as floats (None where an entry is not a number)."""
    if hasattr(value, "tolist"):
        value = value.tolist()
    if not isinstance(value, list | tuple):
        return []
    return [float(v) if _is_number(v) else None for v in value]


# ----------------------------------------------------------------------------- TOML text


_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _toml_key(key: Any) -> str:
    key = str(key)
    return key if _BARE_KEY.match(key) else json.dumps(key, ensure_ascii=False)


def _toml_value(value: Any) -> str:
    if hasattr(value, "tolist") and not isinstance(value, str):
        value = value.tolist()
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        inner = ", ".join(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in value.items())
        return "{" + inner + "}" if inner else "{}"
    if isinstance(value, os.PathLike):
        value = os.fspath(value)
    # JSON string escapes (\" \\ \n \uXXXX) are valid in TOML basic strings.
    return json.dumps(str(value), ensure_ascii=False)


def _toml_text(table: Mapping[str, Any], prefix: str = "") -> str:
    """Plain (unescaped) TOML-like text of a nested dict: scalars first, then [tables].

    Keys whose value is None have no TOML form; they are written as comments.
    """
    lines: list[str] = []
    tables = []
    for key, value in table.items():
        if isinstance(value, Mapping):
            tables.append((key, value))
        elif value is None:
            lines.append(f"# {_toml_key(key)} = (not set)")
        else:
            lines.append(f"{_toml_key(key)} = {_toml_value(value)}")
    for key, value in tables:
        name = f"{prefix}.{_toml_key(key)}" if prefix else _toml_key(key)
        if lines:
            lines.append("")
        lines.append(f"[{name}]")
        body = _toml_text(value, name)
        if body:
            lines.append(body)
    return "\n".join(lines)


# ----------------------------------------------------------------------------- pictures


def _data_uri(name: str, path: str | os.PathLike) -> str:
    """The PNG at ``path`` as a data URI; InputError if it is missing or not a PNG."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(
            f"report image {name!r}: cannot read {path} ({exc.strerror or exc}); "
            "pass an existing PNG file or leave the image out"
        ) from None
    if not data.startswith(PNG_SIGNATURE):
        raise InputError(f"report image {name!r}: {path} is not a PNG file; save the figure as PNG")
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _figure(name: str, uri: str) -> str:
    caption = _CAPTIONS.get(name, "")
    label = f"<strong>{_esc(name)}</strong>" + (f" — {_esc(caption)}" if caption else "")
    return (
        f'<figure><img src="{uri}" alt="{_esc(name + ": " + caption if caption else name)}">'
        f"<figcaption>{label}</figcaption></figure>"
    )


def _figures(names: list[str], uris: dict[str, str]) -> str:
    return '<div class="figures">' + "".join(_figure(n, uris[n]) for n in names) + "</div>"


# ----------------------------------------------------------------------------- tables


def _kv_table(rows: list[tuple[str, str]]) -> str:
    """Two-column table; labels are our own text (escaped anyway), values are ready HTML."""
    body = "".join(f"<tr><th>{_esc(k)}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<table class="kv"><tbody>{body}</tbody></table>'


def _badge(status: Any) -> str:
    word = "unknown" if status is None else str(status).strip().lower()
    if word == "pass":
        return '<span class="badge pass">✓ PASS</span>'
    if word == "warn":
        return '<span class="badge warn">⚠ WARN</span>'
    return f'<span class="badge other">{_esc(word.upper())}</span>'


# ----------------------------------------------------------------------------- sections


def _section(sid: str, title: str, body: str) -> str:
    return f'<section id="{sid}"><h2>{_esc(title)}</h2>{body}</section>'


def _columns(info: Mapping[str, Any]) -> str:
    cols = info.get("columns", info.get("n_columns"))
    if isinstance(cols, list | tuple):
        return _esc(f"{len(cols):,}")
    return _fmt(cols)


def _cluster(info: Mapping[str, Any]) -> str:
    cluster = info.get("cluster")
    if cluster is None:
        cluster = _get(info, "config", "cluster")
    if isinstance(cluster, Mapping):
        # Dashboard addresses are dead once the run ends and would be links out of the page.
        parts = [
            f"{_esc(k)} {_fmt(v)}" for k, v in cluster.items()
            if k not in ("kind", "dashboard") and not (isinstance(v, str) and "://" in v)
        ]
        kind = _fmt(cluster.get("kind"))
        return kind + (f" ({', '.join(parts)})" if parts else "")
    return _fmt(cluster)


def _peak_memory(value: Any) -> str:
    if isinstance(value, Mapping):
        names = {"driver": "driver process", "largest_child": "largest child process"}
        parts = [f"{_esc(names.get(k, k))}: {_bytes(v)}" for k, v in value.items()]
        return "; ".join(parts) if parts else _NOT_COMPUTED
    return _bytes(value) if _is_number(value) else _fmt(value)


def _timings_table(info: Mapping[str, Any]) -> str:
    timings = info.get("timings") if isinstance(info.get("timings"), Mapping) else {}
    states = info.get("stages") if isinstance(info.get("stages"), Mapping) else {}
    names = list(states) + [n for n in timings if n not in states]
    if not names:
        return f"<p>Wall time per stage: {_NOT_COMPUTED}</p>"
    numbers = [t for t in timings.values() if _is_number(t) and math.isfinite(t)]
    longest = max(numbers, default=0.0)
    rows = []
    for name in names:
        t = timings.get(name)
        width = 0.0
        if _is_number(t) and math.isfinite(t) and longest > 0:
            width = max(0.5, 100.0 * t / longest)
        bar = f'<span class="bar" style="width:{width:.1f}%"></span>' if width else ""
        nb = info.get("neighbors") if name == "neighbors" else None
        label = _esc(name) + (f" (compile {_seconds(nb.get('compile_seconds'))}, search "
                              f"{_seconds(nb.get('search_seconds'))})"
                              if isinstance(nb, Mapping) and "compile_seconds" in nb else "")
        rows.append(
            f"<tr><td>{label}</td><td>{_fmt(states.get(name))}</td>"
            f'<td class="num">{_seconds(t)}</td><td style="width:40%">{bar}</td></tr>'
        )
    total = _seconds(math.fsum(numbers)) if numbers else _NOT_COMPUTED
    rows.append(
        f'<tr><th>total of stages</th><td></td><th class="num">{total}</th><td></td></tr>'
    )
    return (
        '<table class="wide"><thead><tr><th>stage</th><th>state</th>'
        '<th class="num">wall time</th><th>share</th></tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def _check_tally(info: Mapping[str, Any]) -> str:
    checks = _get(info, "quality", "checks")
    if not isinstance(checks, list | tuple) or not checks:
        return f"diagnostic checks {_NOT_COMPUTED}"
    words = [str(c.get("status", "")).lower() if isinstance(c, Mapping) else "" for c in checks]
    n_pass, n_warn = words.count("pass"), words.count("warn")
    text = f"{len(checks)} checks: {_badge('pass')} {n_pass} &nbsp; {_badge('warn')} {n_warn}"
    other = len(checks) - n_pass - n_warn
    return text + (f" &nbsp; other: {other}" if other else "")


def _summary(info: Mapping[str, Any]) -> str:
    config = info.get("config") if isinstance(info.get("config"), Mapping) else {}
    components = info.get("components", _get(config, "embedding", "components"))
    graph = info.get("graph") if isinstance(info.get("graph"), Mapping) else {}
    rows = [
        ("state", _fmt(info.get("state"))),
        ("input", _fmt(_get(config, "input", "path"))),
        ("rows", _fmt(info.get("rows"))),
        ("columns", _columns(info)),
        ("components", _fmt(components)),
        ("graph edges (stored entries)", _fmt(graph.get("nnz"))),
        ("operator applications", _fmt(info.get("matvecs"))),
        ("peak memory", _peak_memory(info.get("peak_memory"))),
        ("cluster used", _cluster(info)),
    ]
    started, finished = info.get("started"), info.get("finished")
    if _is_number(started) and _is_number(finished):
        rows.append(("total wall time (run)", _seconds(finished - started)))
    body = f'<p class="tally">{_check_tally(info)}</p>' + _kv_table(rows)
    notice = ""
    if info.get("complete") is False or info.get("error"):
        detail = f": {_esc(info['error'])}" if info.get("error") else ""
        notice = (
            f'<p class="notice"><strong>This run is not complete</strong> '
            f"(state {_fmt(info.get('state'))}){detail}. Results below may be missing or stale.</p>"
        )
    body = notice + body + "<h3>Wall time per stage</h3>" + _timings_table(info)
    return _section("summary", "Job summary", body)


def _caution() -> str:
    text = (
        "These maps are exploratory. A spectral map keeps the local neighbourhoods of the "
        "rows; distances between groups that lie far apart, and any clusters that seem to "
        "appear, need confirming in the original space before they are relied upon. When "
        "the rows describe people, treat the data, the map and this report with the care "
        "their owners require."
    )
    return _section("caution", "Reading this report", f'<p class="caution">{text}</p>')


def _maps(names: list[str], uris: dict[str, str]) -> str:
    body = _figures(names, uris) if names else f"<p>Map: {_NOT_COMPUTED}</p>"
    return _section("maps", "Map", body)


def _number_cell(value: float | None, spec: str) -> str:
    """A right-aligned monospace table cell; "not computed" for None."""
    text = _esc(format(value, spec)) if value is not None else _NOT_COMPUTED
    return f'<td class="num mono">{text}</td>'


def _spectrum(info: Mapping[str, Any], uris: dict[str, str]) -> str:
    lam = _float_list(info.get("eigenvalues"))
    res = _float_list(info.get("residuals"))
    if "spectrum" in uris:
        body = _figures(["spectrum"], uris)
    else:
        body = f"<p>Spectrum plot: {_NOT_COMPUTED}</p>"
    if not lam:
        return _section("spectrum", "Eigenvalues", body + f"<p>Eigenvalues: {_NOT_COMPUTED}</p>")
    gaps = [
        a - b if a is not None and b is not None else None
        for a, b in zip(lam[:-1], lam[1:], strict=True)
    ]
    finite = [g for g in gaps if g is not None and math.isfinite(g)]
    largest = gaps.index(max(finite)) if finite else None
    kept = info.get("eigenvectors_kept") or list(range(1, len(lam) + 1))
    rows = []
    for j, value in enumerate(lam):
        gap = gaps[j] if j < len(gaps) else None
        one_minus = None if value is None else 1.0 - value
        cells = (
            f'<td class="num">{_esc(str(kept[j] if j < len(kept) else j + 1))}</td>'
            + _number_cell(value, ".8f")
            + _number_cell(one_minus, ".3e")
            + (_number_cell(gap, ".3e") if gap is not None else "<td></td>")
            + _number_cell(res[j] if j < len(res) else None, ".2e")
            + ("<td>← largest gap</td>" if j == largest else "<td></td>")
        )
        rows.append(f'<tr class="gap">{cells}</tr>' if j == largest else f"<tr>{cells}</tr>")
    table = (
        '<table><thead><tr><th class="num">j</th><th class="num">eigenvalue λ<sub>j</sub></th>'
        '<th class="num">1 − λ<sub>j</sub></th>'
        '<th class="num">gap λ<sub>j</sub> − λ<sub>j+1</sub></th>'
        '<th class="num">relative residual</th><th></th></tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table>"
        "<p class=\"sub\">The trivial eigenvalue 1 is excluded. Relative residual: "
        "‖A u − λ u‖ / |λ| of each computed pair.</p>"
        + _choice_note(info)
    )
    return _section("spectrum", "Eigenvalues", body + table)


def _choice_note(info: Mapping[str, Any]) -> str:
    """How the kept eigenvectors were chosen, when they are not simply the leading ones."""
    r = _float_list(info.get("candidate_harmonic_residuals"))
    if not r:
        return ""
    listed = ", ".join(f"{j + 1}: {v:.2f}" for j, v in enumerate(r) if v is not None)
    return (
        f'<p class="sub">Kept eigenvectors {_esc(str(info.get("eigenvectors_kept")))} of the '
        f"leading {len(r)}: those least explained, by local linear regression, by the "
        "eigenvectors before them (a low residual marks a harmonic of earlier ones, not a new "
        f"direction). Residuals: {_esc(listed)}.</p>"
    )


def _threshold(check: Mapping[str, Any]) -> str:
    """A check's threshold, with "≥" or "≤" in front when its direction is known."""
    sign = _DIRECTIONS.get(str(check.get("direction", "")).lower())
    value = _fmt(check.get("threshold"))
    return f"{sign} {value}" if sign and check.get("threshold") is not None else value


def _by_value(value: Any) -> Any:
    """A dict of numbers in increasing order of value (JSON files store keys sorted by name)."""
    if isinstance(value, Mapping) and all(_is_number(v) for v in value.values()):
        return dict(sorted(value.items(), key=lambda item: item[1]))
    return value


def _eigengap(value: Any) -> str:
    """The largest eigengap, spelled out when stored as {"after_component", "gap"}."""
    if isinstance(value, Mapping) and set(value) == {"after_component", "gap"}:
        if value["gap"] is None:
            return _NOT_COMPUTED
        return f"{_fmt(value['gap'])} (after component {_fmt(value['after_component'])})"
    return _fmt(value)


def _diagnostics(info: Mapping[str, Any], uris: dict[str, str]) -> str:
    quality = info.get("quality") if isinstance(info.get("quality"), Mapping) else {}
    checks = quality.get("checks")
    if isinstance(checks, list | tuple) and checks:
        rows = []
        for check in checks:
            c = check if isinstance(check, Mapping) else {"name": check}
            rows.append(
                f"<tr><td>{_fmt(c.get('name'))}</td><td class=\"num\">{_fmt(c.get('value'))}</td>"
                f"<td class=\"num\">{_threshold(c)}</td>"
                f"<td>{_badge(c.get('status'))}</td>"
                f"<td>{_fmt(c.get('meaning'))}</td></tr>"
            )
        check_html = (
            '<table class="wide"><thead><tr><th>check</th><th class="num">value</th>'
            '<th class="num">threshold</th><th>result</th><th>what a warning means</th></tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table>"
        )
    else:
        check_html = f"<p>Checks: {_NOT_COMPUTED}</p>"

    graph = info.get("graph") if isinstance(info.get("graph"), Mapping) else {}
    fallback = {"connected_components": graph.get("connected_components")}
    res = [r for r in _float_list(info.get("residuals")) if r is not None]
    if res:
        fallback["max_residual"] = max(res)
    rows = []
    for keys, label in _MEASURES:
        value = next((quality[k] for k in keys if k in quality), fallback.get(keys[0]))
        if keys[0] == "eigengap":
            rows.append((label, _eigengap(value)))
        elif keys[0] == "bandwidth_quantiles":
            rows.append((label, _fmt(_by_value(value))))
        else:
            rows.append((label, _fmt(value)))
    known = {k for keys, _ in _MEASURES for k in keys} | {"checks"}
    rows += [
        (_EXTRA_LABELS.get(str(k), str(k)), _fmt(v)) for k, v in quality.items() if k not in known
    ]
    body = "<h3>Checks against thresholds</h3>" + check_html
    body += "<h3>Measures</h3>" + _kv_table(rows)
    if "bandwidths" in uris:
        body += _figures(["bandwidths"], uris)
    return _section("diagnostics", "Diagnostics", body)


def _tune(tune: Mapping[str, Any], uris: dict[str, str]) -> str:
    text = tune.get("toml")
    if not isinstance(text, str):
        recommended = tune.get("recommended")
        text = _toml_text(recommended) if isinstance(recommended, Mapping) and recommended else None
    block = f"<pre>{_esc(text)}</pre>" if text else f"<p>{_NOT_COMPUTED}</p>"
    rng = tune.get("bandwidth_range")
    rows = [
        ("intrinsic dimension", _fmt(tune.get("intrinsic_dimension"))),
        ("dimension per neighbour count", _fmt(tune.get("dimension_per_k"))),
        ("dimension from the kernel-sum slope", _fmt(tune.get("slope_dimension"))),
        (
            "useful bandwidth range",
            f"{_fmt(rng[0])} to {_fmt(rng[1])}"
            if isinstance(rng, list | tuple) and len(rng) == 2 else _fmt(rng),
        ),
        ("best bandwidth on the curve", _fmt(tune.get("bandwidth_best"))),
        ("graph components per neighbour count", _fmt(tune.get("components"))),
        ("rows used", _fmt(tune.get("rows_used"))),
    ]
    body = "<h3>Recommended settings</h3>" + block + _kv_table(rows)
    reasons = tune.get("reasons")
    if isinstance(reasons, Mapping) and reasons:
        items = "".join(f"<li><code>{_esc(k)}</code>: {_fmt(v)}</li>" for k, v in reasons.items())
        body += f"<h3>Why</h3><ul>{items}</ul>"
    curves = [n for n in uris if n.startswith("tune")]
    if curves:
        body += _figures(curves, uris)
    return _section("tune", "Tuning", body)


def _config(info: Mapping[str, Any]) -> str:
    config = info.get("config")
    if isinstance(config, Mapping) and config:
        body = f"<pre>{_esc(_toml_text(config))}</pre>"
    else:
        body = f"<p>Config: {_NOT_COMPUTED}</p>"
    return _section("config", "Configuration", body)


def _provenance(info: Mapping[str, Any]) -> str:
    rows = [
        ("work directory", _fmt(info.get("workdir"))),
        ("seed", _fmt(info.get("seed", _get(info, "config", "run", "seed")))),
    ]
    if "host" in info:
        rows.append(("host", _fmt(info.get("host"))))
    for key, label in (("started", "started"), ("finished", "finished")):
        if key in info:
            rows.append((label, _time(info.get(key))))
    body = _kv_table(rows)
    for key, title in (("versions", "Versions"), ("fingerprints", "Stage fingerprints")):
        table = info.get(key)
        body += f"<h3>{title}</h3>"
        if isinstance(table, Mapping) and table:
            body += _kv_table(
                [(str(k), f'<span class="mono">{_fmt(v)}</span>') for k, v in table.items()]
            )
        else:
            body += f"<p>{_NOT_COMPUTED}</p>"
    return _section("provenance", "Provenance", body)


# ----------------------------------------------------------------------------- public


def build_report(
    info: dict, *, images: dict[str, str | Path], tune: dict | None = None
) -> str:
    """The HTML text of a self-contained run report.

    Parameters
    ----------
    info : dict
        What :func:`eigenstream.pipeline.status` returns, optionally extended with
        ``config``, ``versions``, ``seed``, ``fingerprints``, ``quality`` (diagnostics,
        with ``checks``: a list of {"name", "value", "threshold", "status", "meaning"}),
        ``peak_memory``, ``cluster``, ``columns``, ``started`` and ``finished``. Missing
        keys are shown as "not computed".
    images : dict of str to path
        PNG pictures by name ("map", "map-<colour>", "spectrum", "bandwidths",
        "tune-curve", ...), embedded as data URIs. A value of None leaves the picture out.
    tune : dict, optional
        Tuning results (as :func:`eigenstream.core.tuning.recommend` returns, optionally
        with a ready ``toml`` string); adds the tuning section.

    Returns
    -------
    str
        A complete HTML document without scripts or references to other files.

    Raises
    ------
    InputError
        If ``info`` is not a dict or an image is missing or not a PNG file.
    """
    if not isinstance(info, Mapping):
        raise InputError(
            f"report info must be a dict (as status() returns); got {type(info).__name__}"
        )
    if images is None:
        images = {}
    if not isinstance(images, Mapping):
        raise InputError(
            f"report images must be a dict of name to PNG path; got {type(images).__name__}"
        )
    uris = {
        str(name): _data_uri(str(name), path) for name, path in images.items() if path is not None
    }
    if tune is not None and not isinstance(tune, Mapping):
        raise InputError(f"report tune results must be a dict; got {type(tune).__name__}")

    map_names = [n for n in uris if n == "map"]
    map_names += sorted(n for n in uris if n.startswith("map") and n != "map")
    placed = set(map_names) | {"spectrum", "bandwidths"}
    if tune is not None:
        placed |= {n for n in uris if n.startswith("tune")}
    others = [n for n in uris if n not in placed]

    workdir = info.get("workdir")
    name = Path(str(workdir)).name if workdir else ""
    title = "eigenstream run report" + (f" — {name}" if name else "")
    sections = [
        _summary(info),
        _caution(),
        _maps(map_names, uris),
        _spectrum(info, uris),
        _diagnostics(info, uris),
    ]
    nav = [("summary", "Summary"), ("maps", "Map"), ("spectrum", "Eigenvalues"),
           ("diagnostics", "Diagnostics")]
    if tune is not None:
        sections.append(_tune(tune, uris))
        nav.append(("tune", "Tuning"))
    if others:
        sections.append(_section("figures", "Other figures", _figures(others, uris)))
        nav.append(("figures", "Other figures"))
    sections += [_config(info), _provenance(info)]
    nav += [("config", "Configuration"), ("provenance", "Provenance")]
    links = "".join(f'<li><a href="#{sid}">{_esc(label)}</a></li>' for sid, label in nav)
    subtitle = _fmt(workdir) if workdir else _NOT_COMPUTED
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_esc(title)}</title><style>{_STYLE}</style></head><body><main>"
        f'<header><h1>{_esc(title)}</h1><p class="sub">work directory: {subtitle}</p>'
        f'<nav aria-label="sections"><ol>{links}</ol></nav></header>'
        + "".join(sections)
        + "<footer>Written by eigenstream. This file is self-contained: pictures are embedded "
        "and it loads nothing from elsewhere.</footer></main></body></html>\n"
    )


def write_report(
    path: str | os.PathLike,
    info: dict,
    *,
    images: dict[str, str | Path],
    tune: dict | None = None,
) -> Path:
    """Write the HTML report (see :func:`build_report`) to ``path`` atomically.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    ConfigError
        If the directory of ``path`` does not exist.
    """
    path = Path(path)
    if not path.parent.is_dir():
        raise ConfigError(
            f"report path {path}: directory {path.parent} does not exist; create it first"
        )
    text = build_report(info, images=images, tune=tune)
    with atomic_path(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    return path

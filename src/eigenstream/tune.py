"""``eigenstream tune``: choose the kernel bandwidth and neighbour count from a sample.

Works on a seeded random sample of the input (default 20,000 rows), never on the main run's
outputs. Writes ``WORKDIR/tune/``: ``tune.json`` (the recommendation and the curves),
``curve.png`` (log kernel sum and its slope against log eps) and ``small-multiples.png``
(the sample's 2-D map at four settings side by side).
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np

from eigenstream.budget import resolve_chunk_rows
from eigenstream.config import Config
from eigenstream.core.moments import standardizer
from eigenstream.core.tuning import recommend
from eigenstream.errors import InputError
from eigenstream.estimator import SpectralMap
from eigenstream.io.readers import bad_value_mask, open_source
from eigenstream.workdir import Workdir, write_json_atomic

log = logging.getLogger(__name__)

MAP_ROWS = 3000


def sample_rows(config: Config, size: int, seed: int) -> tuple[np.ndarray, int]:
    """A seeded uniform sample of ``size`` input rows (rows with NaN/inf skipped) and n."""
    with open_source(config.input) as src:
        n = src.n_rows
        pick = np.sort(np.random.default_rng(seed).choice(n, size=min(size, n), replace=False))
        parts = []
        for block in src.blocks(resolve_chunk_rows(config, n, len(src.columns))):
            lo = np.searchsorted(pick, block.start)
            hi = np.searchsorted(pick, block.start + len(block.values))
            if hi > lo:
                parts.append(np.asarray(block.values[pick[lo:hi] - block.start], dtype=np.float64))
    rows = np.concatenate(parts) if parts else np.zeros((0, 0))
    rows = rows[~bad_value_mask(rows)] if rows.size else rows
    if config.prep.standardize and rows.size:
        shift, scale = standardizer(rows.mean(axis=0), rows.std(axis=0))
        rows = (rows - shift) / scale
    return rows, n


def run_tune(config: Config, *, sample: int = 20_000) -> dict[str, Any]:
    """Recommend ``[graph]``/``[kernel]`` settings from a sample; write results to the workdir."""
    seed = config.run.seed
    rows, n = sample_rows(config, sample, seed)
    if rows.shape[0] < 40:
        raise InputError(f"{config.input.path} gives {rows.shape[0]} usable rows; tune needs 40.")
    result = recommend(rows, seed=seed, n_rows=n)
    result["sample_rows"] = int(rows.shape[0])
    result["input_rows"] = int(n)
    folder = Workdir(config.run.workdir).path / "tune"
    folder.mkdir(parents=True, exist_ok=True)
    _curve_plot(result, folder / "curve.png")
    result["small_multiples"] = _small_multiples(rows, result, folder / "small-multiples.png", seed)
    result["toml"] = recommended_toml(result)
    write_json_atomic(folder / "tune.json", result)
    return result


def recommended_toml(result: dict[str, Any]) -> str:
    """The recommended settings as a TOML block, each line with its one-line reason."""
    rec, why = result["recommended"], result["reasons"]
    bandwidth = rec["kernel"]["bandwidth"]
    bw_text = f'"{bandwidth}"' if isinstance(bandwidth, str) else f"{bandwidth:.6g}"
    return "\n".join([
        "[graph]",
        f"neighbors = {rec['graph']['neighbors']}  # {why['neighbors']}",
        "",
        "[kernel]",
        f"bandwidth = {bw_text}  # {why['bandwidth']}",
        f"bandwidth_neighbor = {rec['kernel']['bandwidth_neighbor']}  # {why['bandwidth_neighbor']}",
        f"alpha = {rec['kernel']['alpha']}  # {why['alpha']}",
    ])


def _settings(result: dict[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    k = int(result["recommended"]["graph"]["neighbors"])
    best = float(result["bandwidth_best"])
    low, high = result["bandwidth_range"]
    return [
        (f"recommended: k={k}, {result['recommended']['kernel']['bandwidth']}",
         {"n_neighbors": k, "bandwidth": result["recommended"]["kernel"]["bandwidth"]}),
        (f"k={max(5, k // 2)}, adaptive", {"n_neighbors": max(5, k // 2), "bandwidth": "adaptive"}),
        (f"k={2 * k}, global sigma={best:.3g}", {"n_neighbors": 2 * k, "bandwidth": best}),
        (f"k={k}, global sigma={float(low):.3g} (low end)", {"n_neighbors": k, "bandwidth": float(low)}),
    ]


def _small_multiples(rows: np.ndarray, result: dict[str, Any], path: Path, seed: int) -> list:
    from matplotlib.figure import Figure

    rng = np.random.default_rng(seed)
    sub = rows if rows.shape[0] <= MAP_ROWS else rows[rng.choice(rows.shape[0], MAP_ROWS, replace=False)]
    fig = Figure(figsize=(10, 9), dpi=100)
    shown, reference = [], None
    for i, (label, params) in enumerate(_settings(result)):
        ax = fig.add_subplot(2, 2, i + 1)
        bw_neighbor = min(7, params["n_neighbors"])
        try:
            Y = SpectralMap(n_components=2, bandwidth_neighbor=bw_neighbor, random_state=seed,
                            **params).fit_transform(sub)
        except Exception as exc:  # one failing setting must not hide the others
            ax.text(0.5, 0.5, f"failed: {exc}", ha="center", va="center", wrap=True)
            shown.append({"label": label, "error": str(exc)})
            continue
        reference = Y[:, 0] if reference is None else reference
        ax.scatter(Y[:, 0], Y[:, 1], c=reference, s=3, cmap="viridis", linewidths=0)
        ax.set_title(label, fontsize=9)
        ax.set_xlabel("component 1")
        ax.set_ylabel("component 2")
        shown.append({"label": label, **params})
    fig.suptitle("The same sample at four settings (colour: component 1 of the recommended map)")
    fig.tight_layout()
    fig.savefig(path)
    return shown


def _curve_plot(result: dict[str, Any], path: Path) -> None:
    from matplotlib.figure import Figure

    curve = result["curve"]
    eps = np.asarray(curve["eps"])
    fig = Figure(figsize=(9, 3.6), dpi=100)
    left, right = fig.add_subplot(1, 2, 1), fig.add_subplot(1, 2, 2)
    left.plot(np.log10(eps), np.asarray(curve["log_sum"]), color="#3b6ea8")
    left.set_xlabel("log10 eps (kernel exp(-d^2/eps))")
    left.set_ylabel("log sum of kernel")
    right.plot(np.log10(eps), np.asarray(curve["slope"]), color="#a83b6e")
    right.set_xlabel("log10 eps")
    right.set_ylabel("slope d log S / d log eps")
    low, high = (float(b) ** 2 for b in result["bandwidth_range"])
    for ax in (left, right):
        ax.axvspan(np.log10(low), np.log10(high), color="#dddddd", zorder=0, label="usable range")
    right.legend(loc="upper right", fontsize=8)
    right.set_title(f"max slope ~ d/2; d estimate {result['intrinsic_dimension']:.2f}", fontsize=9)
    fig.tight_layout()
    fig.savefig(path)

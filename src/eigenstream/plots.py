"""Static pictures of a spectral map and of its eigenvalue spectrum (PNG, PDF, SVG).

Figures are drawn with matplotlib's Agg canvas directly (no pyplot state), so plotting
is safe in worker threads and never opens a window. Coordinates may be any array-like
with ``shape`` and row slicing (numpy, zarr, h5py); large ones are read in row blocks,
two columns at a time, so a map of a table larger than memory can be drawn.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LinearSegmentedColormap, to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator

from eigenstream.errors import ConfigError, InputError
from eigenstream.io.atomic import atomic_path

__all__ = ["plot_map", "plot_spectrum"]

# Our own qualitative palette: twelve hues picked to stay distinguishable on white
# and for the common colour-vision deficiencies when only a few are in use.
CATEGORY_COLOURS: tuple[str, ...] = (
    "#2d5f9a",  # slate blue
    "#e07b24",  # pumpkin
    "#3a8f5c",  # fern
    "#b8345a",  # raspberry
    "#7456a8",  # heather
    "#8b6b3d",  # walnut
    "#d46fae",  # orchid
    "#4f5d68",  # graphite
    "#b39b1c",  # mustard
    "#2a9ea3",  # teal
    "#a3432c",  # brick
    "#7c9c36",  # moss
)
_OTHER_COLOUR = "#b5b5b5"
_PLAIN_COLOUR = "#2d5f9a"
_NUMERIC_CMAP = "viridis"
_DENSITY_CMAP = "cividis"
# Grey ramp without white, so single rows stay visible under coloured points.
_DENSITY_UNDERLAY_CMAP = LinearSegmentedColormap.from_list("eigenstream_greys", ["#e3e3e3", "#5c5c5c"])
# Integer colour values with at most this many distinct values are treated as categories.
_MAX_CATEGORIES = len(CATEGORY_COLOURS)
# Up to this many rows (without a colour) a plain scatter reads better than shading.
_SCATTER_LIMIT = 20_000
_BLOCK_ROWS = 262_144
_HEX_COLUMNS = 120
_DPI = 150


# ----------------------------------------------------------------------------- helpers


def _save(fig: Figure, path: str | os.PathLike) -> Path:
    """Render ``fig`` to ``path`` atomically (temporary file + rename) and return the path."""
    path = Path(path)
    parent = path.parent
    if not parent.is_dir():
        raise ConfigError(f"plot path {path}: directory {parent} does not exist; create it first")
    fmt = path.suffix.lstrip(".").lower() or "png"
    with atomic_path(path) as tmp:
        FigureCanvasAgg(fig)
        fig.savefig(tmp, format=fmt, dpi=_DPI)
    return path


def _check_coords(coords: Any) -> Any:
    """Return an object with ``shape`` and row slicing; raise InputError if it is not (n, >=2)."""
    if not (hasattr(coords, "shape") and hasattr(coords, "__getitem__")):
        coords = np.asarray(coords, dtype=np.float64)
    shape = tuple(coords.shape)
    if len(shape) != 2 or shape[1] < 2 or shape[0] < 1:
        raise InputError(
            f"coords has shape {shape}; plot_map needs an (n, k) array with n >= 1 and k >= 2"
        )
    return coords


class _ColumnPair:
    """Two chosen columns of a row-sliceable (n, k) array, shown as an (n, 2) array."""

    def __init__(self, coords: Any, columns: tuple[int, int]):
        self._coords, self._columns = coords, columns
        self.shape = (coords.shape[0], 2)

    def __getitem__(self, key):
        rows = key[0] if isinstance(key, tuple) else key
        block = np.asarray(self._coords[rows], dtype=np.float64)
        return block[:, list(self._columns)]


def _read_rows(coords: Any, start: int, stop: int) -> np.ndarray:
    """Rows start..stop-1 of the first two columns as float64."""
    return np.asarray(coords[start:stop, :2], dtype=np.float64)


def _row_blocks(coords: Any, block_rows: int):
    """Yield (start, block) over the first two columns, ``block_rows`` rows at a time."""
    n = coords.shape[0]
    for start in range(0, n, block_rows):
        yield start, _read_rows(coords, start, min(start + block_rows, n))


@dataclass
class _Scan:
    """What one pass over the coordinates learns."""

    extent: tuple[float, float, float, float] | None  # xmin, xmax, ymin, ymax of finite rows
    n_finite: int
    sample_rows: np.ndarray  # indices of the sampled rows (finite ones only)
    sample_xy: np.ndarray  # their coordinates


def _scan(coords: Any, sample: np.ndarray, block_rows: int) -> _Scan:
    """Find the extent of the finite rows and pick out the rows listed in sorted ``sample``."""
    lo = np.full(2, np.inf)
    hi = np.full(2, -np.inf)
    n_finite = 0
    rows, xy = [], []
    for start, block in _row_blocks(coords, block_rows):
        ok = np.isfinite(block).all(axis=1)
        n_finite += int(ok.sum())
        if ok.any():
            lo = np.minimum(lo, block[ok].min(axis=0))
            hi = np.maximum(hi, block[ok].max(axis=0))
        a, b = np.searchsorted(sample, [start, start + block.shape[0]])
        local = sample[a:b] - start
        keep = local[ok[local]]
        rows.append(keep + start)
        xy.append(block[keep])
    extent = None
    if n_finite:
        extent = (lo[0], hi[0], lo[1], hi[1])
    return _Scan(extent, n_finite, np.concatenate(rows), np.concatenate(xy))


def _padded(extent: tuple[float, float, float, float]) -> tuple[float, float, float, float]:
    """Extent widened by 2 % per side (and made non-degenerate) so edge points show fully."""
    out = []
    for lo, hi in (extent[:2], extent[2:]):
        span = hi - lo
        pad = 0.02 * span if span > 0 else max(0.5, 0.02 * abs(lo))
        out += [lo - pad, hi + pad]
    return tuple(out)


def _hex_shape(n_columns: int) -> tuple[int, int]:
    """Hexagon lattice size (columns, rows) for a roughly square plotting area."""
    return n_columns, max(1, int(n_columns / math.sqrt(3)))


def _hex_counts(
    coords: Any,
    extent: tuple[float, float, float, float],
    shape: tuple[int, int],
    *,
    block_rows: int = _BLOCK_ROWS,
) -> tuple[np.ndarray, np.ndarray]:
    """Count finite rows per hexagonal cell, block by block.

    Cells are centred on two interleaved rectangular lattices, (i, j) and
    (i + 1/2, j + 1/2) in units of the cell spacing; a point belongs to the nearer
    centre, with the vertical offset weighted by 3 so cells are regular hexagons.

    Returns
    -------
    centres : ndarray, shape (m, 2)
        Centres of the non-empty cells.
    counts : ndarray, shape (m,)
        Rows in each of them.
    """
    xmin, xmax, ymin, ymax = extent
    nx, ny = shape
    sx, sy = (xmax - xmin) / nx, (ymax - ymin) / ny
    counts_a = np.zeros((nx + 1) * (ny + 1), dtype=np.int64)
    counts_b = np.zeros(nx * ny, dtype=np.int64)
    for _, block in _row_blocks(coords, block_rows):
        block = block[np.isfinite(block).all(axis=1)]
        u = (block[:, 0] - xmin) / sx
        v = (block[:, 1] - ymin) / sy
        ia, ja = np.round(u), np.round(v)
        ib = np.clip(np.floor(u), 0, nx - 1)
        jb = np.clip(np.floor(v), 0, ny - 1)
        in_a = (u - ia) ** 2 + 3.0 * (v - ja) ** 2 < (u - ib - 0.5) ** 2 + 3.0 * (v - jb - 0.5) ** 2
        ia = np.clip(ia, 0, nx).astype(np.int64)
        ja = np.clip(ja, 0, ny).astype(np.int64)
        counts_a += np.bincount(ia[in_a] * (ny + 1) + ja[in_a], minlength=counts_a.size)
        counts_b += np.bincount(
            ib[~in_a].astype(np.int64) * ny + jb[~in_a].astype(np.int64), minlength=counts_b.size
        )
    ia, ja = np.divmod(np.flatnonzero(counts_a), ny + 1)
    ib, jb = np.divmod(np.flatnonzero(counts_b), ny)
    centres = np.concatenate(
        [
            np.column_stack([xmin + ia * sx, ymin + ja * sy]),
            np.column_stack([xmin + (ib + 0.5) * sx, ymin + (jb + 0.5) * sy]),
        ]
    )
    counts = np.concatenate([counts_a[counts_a > 0], counts_b[counts_b > 0]])
    return centres, counts


def _is_categorical(values: np.ndarray) -> bool:
    """True for strings, booleans, objects and integers with few distinct values."""
    if values.dtype.kind in "bUSOT":
        return True
    if values.dtype.kind in "iu":
        return np.unique(values).size <= _MAX_CATEGORIES
    return False


def _category_colours(values: np.ndarray) -> tuple[np.ndarray, list[tuple[str, str]]]:
    """Per-point RGBA colours and (label, colour) legend entries for categorical values.

    The most frequent categories keep their own colour; if there are more than the
    palette holds, the rest share one grey "other" entry.
    """
    labels = values.astype(str) if values.dtype.kind != "b" else np.where(values, "True", "False")
    names, inverse, sizes = np.unique(labels, return_inverse=True, return_counts=True)
    if names.size > _MAX_CATEGORIES:
        kept = np.sort(np.argsort(-sizes, kind="stable")[: _MAX_CATEGORIES - 1])
    else:
        kept = np.arange(names.size)
    palette = np.tile(np.array(to_rgba(_OTHER_COLOUR)), (names.size, 1))
    entries = []
    for rank, k in enumerate(kept):
        palette[k] = to_rgba(CATEGORY_COLOURS[rank])
        entries.append((str(names[k]), CATEGORY_COLOURS[rank]))
    if kept.size < names.size:
        entries.append((f"other ({names.size - kept.size} values)", _OTHER_COLOUR))
    return palette[inverse], entries


def _marker_size(n_points: int) -> float:
    """Marker area in points^2: larger for sparse maps, about a pixel for dense ones."""
    return float(np.clip(12_000.0 / max(n_points, 1), 1.0, 25.0))


# ----------------------------------------------------------------------------- maps


def _draw_map(
    coords: Any,
    *,
    color: Any = None,
    color_label: str | None = None,
    title: str | None = None,
    max_points: int = 200_000,
    seed: int = 0,
    block_rows: int = _BLOCK_ROWS,
    labels: tuple[str, str] = ("component 1", "component 2"),
) -> Figure:
    """Build the map figure (see :func:`plot_map`)."""
    coords = _check_coords(coords)
    n = int(coords.shape[0])
    if isinstance(max_points, bool) or not isinstance(max_points, int | np.integer) or max_points < 1:
        raise ConfigError(f"option max_points={max_points!r} must be an integer >= 1")
    values = None
    if color is not None:
        values = np.asarray(color)
        if values.ndim != 1 or values.shape[0] != n:
            raise InputError(
                f"color has shape {values.shape} but coords has {n} rows; pass one value per row"
            )

    rng = np.random.default_rng(seed)
    dense = n > _SCATTER_LIMIT or (values is not None and n > max_points)
    if not dense:
        sample = np.arange(n)
    elif values is not None:
        sample = np.sort(rng.choice(n, size=min(n, max_points), replace=False))
    else:
        sample = np.zeros(0, dtype=np.int64)
    scan = _scan(coords, sample, block_rows)
    if scan.extent is None:
        raise InputError(f"coords: none of the {n} rows has finite values in columns 0 and 1")
    extent = _padded(scan.extent)

    fig = Figure(figsize=(7.2, 6.2), layout="constrained")
    ax = fig.add_subplot()
    notes = [f"{n:,} rows"]
    if dense:
        shape = _hex_shape(_HEX_COLUMNS)
        centres, counts = _hex_counts(coords, extent, shape, block_rows=block_rows)
        shading = ax.hexbin(
            centres[:, 0],
            centres[:, 1],
            C=counts,
            gridsize=shape,
            extent=extent,
            reduce_C_function=np.sum,
            bins="log",
            mincnt=1,
            cmap=_DENSITY_CMAP if values is None else _DENSITY_UNDERLAY_CMAP,
            linewidths=0.0,
            zorder=1,
        )
        notes.append("shading: rows per hexagon (log scale)")
        if values is None:
            fig.colorbar(shading, ax=ax, label="rows per hexagon", shrink=0.85)
        else:
            notes.append(f"points: random sample of {scan.sample_rows.size:,}")

    if not dense or values is not None:
        # Random drawing order, so no category or value range systematically hides another.
        order = rng.permutation(scan.sample_rows.size)
        xy = scan.sample_xy[order]
        size = _marker_size(xy.shape[0])
        common = {"s": size, "linewidths": 0.0, "rasterized": True, "zorder": 2}
        if values is None:
            ax.scatter(xy[:, 0], xy[:, 1], color=_PLAIN_COLOUR, alpha=0.7, **common)
        else:
            picked = values[scan.sample_rows[order]]
            if _is_categorical(values):
                rgba, entries = _category_colours(picked)
                ax.scatter(xy[:, 0], xy[:, 1], c=rgba, **common)
                handles = [
                    Line2D([], [], linestyle="", marker="o", markersize=7, color=colour, label=name)
                    for name, colour in entries
                ]
                fig.legend(
                    handles=handles,
                    title=color_label,
                    loc="outside right upper",
                    frameon=False,
                )
            else:
                points = ax.scatter(
                    xy[:, 0], xy[:, 1], c=picked.astype(np.float64), cmap=_NUMERIC_CMAP, **common
                )
                fig.colorbar(points, ax=ax, label=color_label or "value", shrink=0.85)

    dropped = n - scan.n_finite
    if dropped:
        notes.append(f"{dropped:,} rows with non-finite coordinates not shown")
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_xlabel(labels[0])
    ax.set_ylabel(labels[1])
    if title:
        ax.set_title(title)
    # Notes go under the axes, clear of the data.
    ax.annotate(
        "\n".join(notes), xy=(0.0, 0.0), xycoords="axes fraction", xytext=(0, -26),
        textcoords="offset points", fontsize=7, color="#555555", ha="left", va="top",
    )
    return fig


def plot_map(
    coords: Any,
    path: str | os.PathLike,
    *,
    color: Any = None,
    color_label: str | None = None,
    title: str | None = None,
    max_points: int = 200_000,
    seed: int = 0,
    components: tuple[int, int] = (1, 2),
) -> Path:
    """Draw two embedding coordinates (the first two by default) as a picture file.

    Parameters
    ----------
    coords : array-like, shape (n, k), k >= 2
        Embedding coordinates (numpy, zarr, h5py, ...). Only columns 0 and 1 are
        read, in row blocks.
    path : str or path-like
        Output file; the format follows the suffix (PNG if none). Written atomically.
    color : array-like, shape (n,), optional
        One value per row. Numbers are shown with a colour bar; strings, booleans
        and integers with at most 12 distinct values with a legend.
    color_label : str, optional
        Title of the colour bar or legend.
    title : str, optional
        Title above the map.
    max_points : int, default 200_000
        When there are more rows than this and a colour is given, a random sample
        of this many rows is drawn on top of the density of all rows.
    seed : int, default 0
        Seed of that sample and of the drawing order.
    components : (int, int), default (1, 2)
        Which coordinates to draw, counted from 1 as on the axis labels.

    Returns
    -------
    Path
        The written file.

    Notes
    -----
    Up to 20 000 rows, every row is drawn as a point. Beyond that, the map shows the
    count of rows per hexagonal cell on a log scale, computed from all rows.
    """
    coords = _check_coords(coords)
    if tuple(components) != (1, 2):
        if max(components) > coords.shape[1] or min(components) < 1:
            raise InputError(
                f"components {tuple(components)} not available: the map has {coords.shape[1]}"
            )
        coords = _ColumnPair(coords, (components[0] - 1, components[1] - 1))
    fig = _draw_map(
        coords,
        labels=(f"component {components[0]}", f"component {components[1]}"),
        color=color,
        color_label=color_label,
        title=title,
        max_points=max_points,
        seed=seed,
    )
    return _save(fig, path)


# ----------------------------------------------------------------------------- spectrum


def _check_spectrum(eigenvalues: Any, residuals: Any) -> tuple[np.ndarray, np.ndarray | None]:
    """Validate and convert; raise InputError naming what is wrong."""
    lam = np.asarray(eigenvalues, dtype=np.float64)
    if lam.ndim != 1 or lam.size == 0:
        raise InputError(f"eigenvalues has shape {lam.shape}; pass a non-empty 1-D array")
    if not np.isfinite(lam).all():
        raise InputError("eigenvalues contains NaN or infinite values; check the solver output")
    rises = np.flatnonzero(np.diff(lam) > 1e-12 * np.maximum(1.0, np.abs(lam[1:])))
    if rises.size:
        j = int(rises[0])
        raise InputError(
            f"eigenvalues must be in descending order; value {j + 2} ({lam[j + 1]:.6g}) "
            f"exceeds value {j + 1} ({lam[j]:.6g})"
        )
    res = None
    if residuals is not None:
        res = np.asarray(residuals, dtype=np.float64)
        if res.shape != lam.shape:
            raise InputError(
                f"residuals has shape {res.shape} but eigenvalues has {lam.shape}; "
                "pass one residual per eigenvalue"
            )
    return lam, res


def _log_y(ax: Any, values: np.ndarray) -> None:
    """Switch ``ax`` to a log y axis, with fixed limits when fewer than two values show."""
    if values.size <= 1:  # a log axis cannot size itself from a single value
        centre = float(values[0]) if values.size else 0.1
        ax.set_ylim(centre / 10.0, centre * 10.0)
    ax.set_yscale("log")


def _draw_spectrum(
    eigenvalues: Any, *, residuals: Any = None, title: str | None = None
) -> Figure:
    """Build the spectrum figure (see :func:`plot_spectrum`)."""
    lam, res = _check_spectrum(eigenvalues, residuals)
    index = np.arange(1, lam.size + 1)
    rows = 3 if res is not None else 2
    fig = Figure(figsize=(6.8, 7.4 if res is not None else 6.0), layout="constrained")
    axes = fig.subplots(
        rows, 1, sharex=True, height_ratios=[3, 3, 1.6][:rows], squeeze=True
    )
    top, bottom = axes[0], axes[1]

    top.plot(index, lam, "o-", color=CATEGORY_COLOURS[0], markersize=4, linewidth=1.2)
    top.set_ylabel("eigenvalue $\\lambda_j$")

    gap_after = None
    if lam.size >= 2:
        gaps = lam[:-1] - lam[1:]
        gap_after = int(np.argmax(gaps))  # the gap lies between j = gap_after+1 and +2
        j = gap_after + 1
        for ax in axes[:2]:
            ax.axvspan(j, j + 1, color=CATEGORY_COLOURS[1], alpha=0.15, linewidth=0)
        top.annotate(
            "",
            xy=(j + 0.5, lam[j]),
            xytext=(j + 0.5, lam[j - 1]),
            arrowprops={"arrowstyle": "<->", "color": CATEGORY_COLOURS[1], "linewidth": 1.2},
        )
        on_left = j <= lam.size / 2  # write the label towards the emptier side
        top.annotate(
            f"largest gap: $\\lambda_{{{j}}} - \\lambda_{{{j + 1}}}$ = {gaps[gap_after]:.3g}",
            xy=(j + 0.5, 0.5 * (lam[j - 1] + lam[j])),
            xytext=(8, 0) if on_left else (-8, 0),
            textcoords="offset points",
            va="center",
            ha="left" if on_left else "right",
            fontsize=8,
            color="#333333",
        )

    distance = 1.0 - lam
    shown = distance > 0
    bottom.plot(
        index[shown], distance[shown], "o-", color=CATEGORY_COLOURS[2], markersize=4, linewidth=1.2
    )
    _log_y(bottom, distance[shown])
    bottom.set_ylabel("$1 - \\lambda_j$ (log scale)")
    if not shown.all():
        bottom.text(
            0.01, 0.02, f"values with $\\lambda_j \\geq 1$ not shown: {int((~shown).sum())}",
            transform=bottom.transAxes, fontsize=7, color="#555555",
        )

    if res is not None:
        low = axes[2]
        positive = res > 0
        low.plot(index[positive], res[positive], "s", color=CATEGORY_COLOURS[3], markersize=3.5)
        _log_y(low, res[positive])
        low.set_ylabel("residual")
        if not positive.all():
            low.text(
                0.01, 0.05, f"zero residuals not shown: {int((~positive).sum())}",
                transform=low.transAxes, fontsize=7, color="#555555",
            )
    axes[-1].set_xlabel("index $j$ (trivial eigenvalue excluded)")
    axes[-1].xaxis.set_major_locator(MaxNLocator(integer=True))
    for ax in axes:
        ax.grid(True, color="#e4e4e4", linewidth=0.6)
        ax.set_axisbelow(True)
    if title:
        fig.suptitle(title)
    return fig


def plot_spectrum(
    eigenvalues: Any,
    path: str | os.PathLike,
    *,
    residuals: Any = None,
    title: str | None = None,
) -> Path:
    """Draw an eigenvalue spectrum as a picture file.

    Parameters
    ----------
    eigenvalues : array-like, shape (k,)
        Eigenvalues in descending order, the trivial one (equal to 1) excluded.
    path : str or path-like
        Output file; the format follows the suffix (PNG if none). Written atomically.
    residuals : array-like, shape (k,), optional
        Residual norm of each eigenpair, shown in a third, smaller panel.
    title : str, optional
        Title above the panels.

    Returns
    -------
    Path
        The written file.

    Notes
    -----
    The top panel shows the eigenvalues against their index with the largest
    difference between neighbours marked; the second shows ``1 - eigenvalue`` on a
    log axis, where eigenvalues close to 1 are told apart.
    """
    return _save(_draw_spectrum(eigenvalues, residuals=residuals, title=title), path)

"""Tests of the map and spectrum pictures.

Pictures are checked by decoding them with matplotlib.image.imread (valid PNG, not a
blank canvas) and by inspecting the figure objects; the block-wise hexagon counts are
checked against matplotlib's own Axes.hexbin on the same points as the outside
reference.
"""

from __future__ import annotations

import matplotlib.image as mpimg
import numpy as np
import pytest
import zarr
from matplotlib.collections import PathCollection, PolyCollection
from matplotlib.figure import Figure

from eigenstream.errors import ConfigError, InputError
from eigenstream.plots import (
    CATEGORY_COLOURS,
    _draw_map,
    _draw_spectrum,
    _hex_counts,
    _hex_shape,
    _padded,
    plot_map,
    plot_spectrum,
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _ring(n: int, seed: int = 0) -> np.ndarray:
    """Noisy circle in the first two columns plus a third column that must be ignored."""
    rng = np.random.default_rng(seed)
    angle = rng.uniform(0.0, 2.0 * np.pi, n)
    xy = np.column_stack([np.cos(angle), 0.5 * np.sin(angle)]) + rng.normal(0.0, 0.05, (n, 2))
    return np.column_stack([xy, rng.normal(size=n)])


def _assert_picture(path) -> np.ndarray:
    with open(path, "rb") as handle:
        assert handle.read(8) == PNG_SIGNATURE
    pixels = mpimg.imread(path)
    assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 100
    assert pixels[..., :3].var() > 0  # not a blank canvas
    return pixels


def _no_temp_files(directory) -> bool:
    return not [p for p in directory.iterdir() if p.name.endswith(".tmp")]


def _hexbin(fig: Figure) -> PolyCollection:
    (ax,) = [a for a in fig.axes if a.get_xlabel() == "component 1"]
    (poly,) = [c for c in ax.collections if isinstance(c, PolyCollection)]
    return poly


def _points(fig: Figure) -> PathCollection:
    (ax,) = [a for a in fig.axes if a.get_xlabel() == "component 1"]
    (points,) = [c for c in ax.collections if isinstance(c, PathCollection)]
    return points


# ----------------------------------------------------------------------------- small maps


def test_small_map_without_colour(tmp_path):
    coords = _ring(800)
    path = plot_map(coords, tmp_path / "ring.png", title="ring")
    assert path == tmp_path / "ring.png"
    _assert_picture(path)
    assert _no_temp_files(tmp_path)

    fig = _draw_map(coords)
    assert _points(fig).get_offsets().shape == (800, 2)
    ax = fig.axes[0]
    assert (ax.get_xlabel(), ax.get_ylabel()) == ("component 1", "component 2")


def test_small_map_numeric_colour_gets_a_colour_bar(tmp_path):
    coords = _ring(800)
    value = coords[:, 0] * 10.0
    _assert_picture(plot_map(coords, tmp_path / "num.png", color=value, color_label="x times 10"))
    fig = _draw_map(coords, color=value, color_label="x times 10")
    assert len(fig.axes) == 2  # map + colour bar
    assert fig.axes[1].get_ylabel() == "x times 10"
    assert _points(fig).get_cmap().name == "viridis"
    assert not fig.legends


@pytest.mark.parametrize(
    ("make_labels", "expected"),
    [
        (lambda n: np.array(["plain", "solar", "ev"])[np.arange(n) % 3], ["ev", "plain", "solar"]),
        (lambda n: np.arange(n) % 2 == 0, ["False", "True"]),
        (lambda n: np.arange(n) % 4, ["0", "1", "2", "3"]),  # few integers are categories
    ],
)
def test_small_map_categories_get_a_legend(tmp_path, make_labels, expected):
    coords = _ring(600)
    labels = make_labels(600)
    _assert_picture(plot_map(coords, tmp_path / "cat.png", color=labels, color_label="kind"))
    fig = _draw_map(coords, color=labels, color_label="kind")
    (legend,) = fig.legends
    assert [t.get_text() for t in legend.get_texts()] == expected
    assert legend.get_title().get_text() == "kind"
    assert len(fig.axes) == 1  # no colour bar
    # Every point is painted in one of the palette colours, one colour per category.
    faces = np.unique(np.round(_points(fig).get_facecolors()[:, :3], 6), axis=0)
    assert len(faces) == len(expected)


def test_many_integer_values_are_numeric_and_many_strings_share_other():
    coords = _ring(500)
    fig = _draw_map(coords, color=np.arange(500) % 50)
    assert len(fig.axes) == 2 and not fig.legends  # 50 distinct integers: colour bar

    names = np.array([f"home {k:02d}" for k in range(20)])[np.arange(500) % 20]
    fig = _draw_map(coords, color=names)
    texts = [t.get_text() for t in fig.legends[0].get_texts()]
    assert len(texts) == len(CATEGORY_COLOURS)
    assert texts[-1] == f"other ({20 - (len(CATEGORY_COLOURS) - 1)} values)"


# ----------------------------------------------------------------------------- large maps


def test_hexagon_counts_match_matplotlib_hexbin():
    # Outside reference: matplotlib's Axes.hexbin on all points at once; ours is
    # accumulated over 7 row blocks and must give the same cells and counts.
    points = _ring(30_000)[:, :2] * [3.0, 1.0]
    lo, hi = points.min(axis=0), points.max(axis=0)
    extent = _padded((lo[0], hi[0], lo[1], hi[1]))
    shape = _hex_shape(120)
    centres, counts = _hex_counts(points, extent, shape, block_rows=4_500)
    assert counts.sum() == 30_000

    reference = Figure().add_subplot().hexbin(
        points[:, 0], points[:, 1], gridsize=shape, extent=extent, mincnt=1
    )
    cells = zip(reference.get_offsets(), reference.get_array(), strict=True)
    ref = {tuple(np.round(c, 6)): v for c, v in cells}
    ours = {tuple(np.round(c, 6)): v for c, v in zip(centres, counts, strict=True)}
    assert ours == ref


def test_large_map_without_colour_is_density_of_all_rows(tmp_path):
    coords = _ring(45_000, seed=1)
    _assert_picture(plot_map(coords, tmp_path / "dense.png"))
    fig = _draw_map(coords)
    poly = _hexbin(fig)
    assert np.nansum(poly.get_array()) == 45_000  # every row counted once
    assert poly.get_cmap().name == "cividis"
    assert not [c for c in fig.axes[0].collections if isinstance(c, PathCollection)]
    assert fig.axes[1].get_ylabel() == "rows per hexagon"


def test_large_map_with_colour_overlays_a_seeded_sample(tmp_path):
    coords = _ring(25_000, seed=2)
    groups = np.where(coords[:, 0] > 0, "east", "west")
    path = plot_map(coords, tmp_path / "dense_cat.png", color=groups, max_points=3_000)
    _assert_picture(path)

    fig = _draw_map(coords, color=groups, max_points=3_000, seed=5)
    assert np.nansum(_hexbin(fig).get_array()) == 25_000
    sample = _points(fig).get_offsets()
    assert sample.shape == (3_000, 2)
    # The sample is made of real rows, and the seed decides which.
    rows = {tuple(r) for r in coords[:, :2]}
    assert all(tuple(r) in rows for r in np.asarray(sample))
    again = _points(_draw_map(coords, color=groups, max_points=3_000, seed=5)).get_offsets()
    other = _points(_draw_map(coords, color=groups, max_points=3_000, seed=6)).get_offsets()
    np.testing.assert_array_equal(np.asarray(sample), np.asarray(again))
    assert not np.array_equal(np.sort(np.asarray(sample), axis=0), np.sort(np.asarray(other), axis=0))

    numeric = _draw_map(coords, color=coords[:, 1], max_points=3_000)
    assert len(numeric.axes) == 2  # colour bar for the numeric sample


def test_zarr_coords_give_the_same_picture_as_numpy(tmp_path):
    coords = _ring(24_000, seed=3).astype(np.float32)
    store = zarr.create_array(
        store=str(tmp_path / "coords.zarr"), shape=coords.shape, chunks=(5_000, 3), dtype="float32"
    )
    store[:] = coords
    colour = coords[:, 2]
    from_zarr = plot_map(store, tmp_path / "zarr.png", color=colour, max_points=2_000)
    from_numpy = plot_map(coords, tmp_path / "numpy.png", color=colour, max_points=2_000)
    np.testing.assert_array_equal(_assert_picture(from_zarr), _assert_picture(from_numpy))


def test_non_finite_rows_are_left_out_and_counted():
    coords = _ring(1_000)
    coords[:10, 0] = np.nan
    coords[10:15, 1] = np.inf
    fig = _draw_map(coords)
    assert _points(fig).get_offsets().shape == (985, 2)
    notes = " ".join(t.get_text() for t in fig.axes[0].texts)
    assert "15 rows with non-finite coordinates not shown" in notes

    with pytest.raises(InputError, match="finite"):
        _draw_map(np.full((20, 2), np.nan))


@pytest.mark.parametrize(
    ("coords", "kwargs", "error", "match"),
    [
        (np.zeros((10, 1)), {}, InputError, "shape"),
        (np.zeros(10), {}, InputError, "shape"),
        (np.zeros((10, 2)), {"color": np.zeros(9)}, InputError, "color"),
        (np.zeros((10, 2)), {"max_points": 0}, ConfigError, "max_points"),
    ],
)
def test_bad_map_inputs(tmp_path, coords, kwargs, error, match):
    with pytest.raises(error, match=match):
        plot_map(coords, tmp_path / "bad.png", **kwargs)
    assert not list(tmp_path.iterdir())


def test_missing_directory_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        plot_map(_ring(50), tmp_path / "nowhere" / "map.png")


def test_failed_write_keeps_the_old_file(tmp_path):
    path = tmp_path / "map.png"
    plot_map(_ring(300), path)
    before = path.read_bytes()
    with pytest.raises(ValueError):  # matplotlib does not know this format
        plot_map(_ring(300, seed=9), tmp_path / "map.unknownformat")
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["map.png"]


# ----------------------------------------------------------------------------- spectrum


EIGENVALUES = np.array([0.995, 0.99, 0.984, 0.97, 0.81, 0.78, 0.75, 0.70, 0.64, 0.60])


def test_spectrum_picture_and_largest_gap(tmp_path):
    path = plot_spectrum(EIGENVALUES, tmp_path / "spectrum.png", title="demo")
    _assert_picture(path)
    assert _no_temp_files(tmp_path)

    fig = _draw_spectrum(EIGENVALUES)
    assert len(fig.axes) == 2
    top, bottom = fig.axes
    assert bottom.get_yscale() == "log"
    np.testing.assert_allclose(bottom.lines[0].get_ydata(), 1.0 - EIGENVALUES)
    j = int(np.argmax(-np.diff(EIGENVALUES))) + 1  # 1-based index before the largest drop
    label = " ".join(t.get_text() for t in top.texts)
    assert f"\\lambda_{{{j}}} - \\lambda_{{{j + 1}}}" in label
    assert f"{EIGENVALUES[j - 1] - EIGENVALUES[j]:.3g}" in label


def test_spectrum_with_residuals_has_a_third_panel(tmp_path):
    residuals = np.logspace(-10, -6, EIGENVALUES.size)
    _assert_picture(plot_spectrum(EIGENVALUES, tmp_path / "s.png", residuals=residuals))
    fig = _draw_spectrum(EIGENVALUES, residuals=residuals)
    assert len(fig.axes) == 3
    assert fig.axes[2].get_yscale() == "log"
    np.testing.assert_allclose(fig.axes[2].lines[0].get_ydata(), residuals)


def test_spectrum_with_one_value_and_values_at_one(tmp_path):
    _assert_picture(plot_spectrum([0.5], tmp_path / "one.png"))
    fig = _draw_spectrum([1.0, 1.0, 0.9])  # e.g. disconnected graph: repeated eigenvalue 1
    notes = " ".join(t.get_text() for t in fig.axes[1].texts)
    assert "not shown: 2" in notes


@pytest.mark.parametrize(
    ("values", "kwargs", "match"),
    [
        ([], {}, "non-empty"),
        ([0.9, 0.95, 0.5], {}, "descending"),
        ([0.9, np.nan], {}, "NaN"),
        ([0.9, 0.8], {"residuals": [1e-8]}, "residuals"),
    ],
)
def test_bad_spectrum_inputs(tmp_path, values, kwargs, match):
    with pytest.raises(InputError, match=match):
        plot_spectrum(values, tmp_path / "bad.png", **kwargs)
    assert not list(tmp_path.iterdir())

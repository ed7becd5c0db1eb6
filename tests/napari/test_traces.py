"""Region masks, region means, ΔF/F, CSV export, regions files and layers (no Qt needed)."""

from __future__ import annotations

import csv

import dask.array as da
import numpy as np
import pytest
from dask.array.utils import assert_eq

from volrecon.errors import ConfigError, DataError, InputFileError, ShapeError
from volrecon.napari.region_shapes import (
    RegionShape,
    SpatialGrid,
    read_regions_csv,
    write_regions_csv,
)
from volrecon.napari.regions import (
    labels_layer_data,
    layer_regions,
    layer_shapes,
    shapes_layer_data,
)
from volrecon.napari.traces import (
    ball_region,
    delta_f_over_f,
    ellipse_vertices,
    polygon_region,
    region_means,
    write_traces_csv,
)


def _full_mask(region, shape):
    mask = np.zeros(shape, bool)
    mask[region.box] = region.mask
    return mask


def test_ball_matches_scikit_image_ball():
    from skimage.morphology import ball

    shape, radius = (15, 17, 19), 4
    region = ball_region((7, 8, 9), float(radius), shape, (1.0, 1.0, 1.0))
    # Reference: skimage.morphology.ball(r), voxels with Euclidean distance <= r of the centre.
    expected = np.zeros(shape, bool)
    expected[3:12, 4:13, 5:14] = ball(radius).astype(bool)
    np.testing.assert_array_equal(_full_mask(region, shape), expected)


def test_ball_with_anisotropic_voxels_matches_scikit_image_ellipsoid():
    from skimage.draw import ellipsoid

    shape = (12, 30, 30)
    # 4 µm radius on 2 µm planes and 0.5 µm pixels: semi-axes 2, 8, 8 voxels.
    region = ball_region((6, 15, 15), 4.0, shape, (2.0, 0.5, 0.5))
    # Reference: skimage.draw.ellipsoid(a, b, c), (z/a)² + (y/b)² + (x/c)² <= 1, padded by one
    # voxel on each side: shape (2a + 3, 2b + 3, 2c + 3) centred on the middle voxel.
    reference = ellipsoid(2, 8, 8)[1:-1, 1:-1, 1:-1]
    expected = np.zeros(shape, bool)
    expected[4:9, 7:24, 7:24] = reference
    np.testing.assert_array_equal(_full_mask(region, shape), expected)


def test_ball_at_the_edge_is_clipped_and_never_empty():
    region = ball_region((0.2, 0.0, 19.4), 0.1, (3, 10, 20), (2.0, 1.0, 1.0))
    assert region.n_voxels == 1  # smaller than a voxel: the nearest voxel alone
    assert _full_mask(region, (3, 10, 20))[0, 0, 19]


def test_rectangle_covers_exactly_the_pixel_centres_inside():
    shape = (4, 30, 40)
    corners = [(9.5, 19.5), (9.5, 29.5), (19.5, 29.5), (19.5, 19.5)]
    region = polygon_region(corners, shape, planes=(1, 3))
    # Reference: numpy slicing of rows 10..19 and columns 20..29 in planes 1 and 2.
    expected = np.zeros(shape, bool)
    expected[1:3, 10:20, 20:30] = True
    np.testing.assert_array_equal(_full_mask(region, shape), expected)


def test_triangle_matches_matplotlib_path(rng):
    from matplotlib.path import Path

    shape = (40, 50)
    vertices = np.array([(3.3, 4.1), (35.2, 12.7), (17.9, 46.4)])
    region = polygon_region(vertices, shape)
    yy, xx = np.mgrid[:40, :50]
    # Reference: matplotlib.path.Path.contains_points on the pixel centres.
    expected = Path(vertices).contains_points(np.c_[yy.ravel(), xx.ravel()]).reshape(shape)
    np.testing.assert_array_equal(_full_mask(region, shape), expected)


def test_ellipse_area_matches_pi_a_b():
    # Rectangle of half-sides 12 and 7 pixels, rotated by 30°.
    angle = np.deg2rad(30.0)
    u = np.array([np.sin(angle), np.cos(angle)]) * 12
    v = np.array([np.cos(angle), -np.sin(angle)]) * 7
    centre = np.array([40.0, 50.0])
    corners = [centre - u - v, centre + u - v, centre + u + v, centre - u + v]
    region = polygon_region(ellipse_vertices(corners, n_vertices=256), (80, 100))
    # Reference: ellipse area π a b = π · 12 · 7 ≈ 263.9 pixels; counting pixel centres
    # deviates by about the perimeter's worth of half-pixels at most (~2 %).
    assert region.n_voxels == pytest.approx(np.pi * 12 * 7, rel=0.03)


def test_region_means_equal_numpy_mean_over_the_mask(rng):
    volumes = rng.random((6, 4, 20, 24), dtype=np.float32)
    volumes[5] = np.nan  # a frame not reconstructed yet
    regions = [ball_region((2, 10, 12), 3.0, (4, 20, 24), (2.0, 1.0, 1.0), name="a"),
               polygon_region([(2, 2), (2, 9), (8, 9)], (4, 20, 24), planes=(0, 2), name="b")]
    means = region_means(volumes, regions)
    # Reference: numpy mean of the voxels selected by each full-size boolean mask.
    for r, region in enumerate(regions):
        expected = volumes[:, _full_mask(region, (4, 20, 24))].astype(np.float64).mean(axis=1)
        np.testing.assert_allclose(means[:, r], expected, rtol=1e-12)
    assert np.isnan(means[5]).all()
    lazy = region_means(da.from_array(volumes, chunks=(1, 4, 20, 24)), regions)
    assert isinstance(lazy, da.Array)
    assert_eq(lazy, means)


def test_region_means_on_2d_frames(rng):
    frames = rng.random((5, 16, 16))
    region = polygon_region([(1.5, 1.5), (1.5, 5.5), (5.5, 5.5), (5.5, 1.5)], (16, 16))
    # Reference: the mean of a numpy slice (rows and columns 2..5).
    np.testing.assert_allclose(region_means(frames, [region])[:, 0],
                               frames[:, 2:6, 2:6].mean(axis=(1, 2)))


def test_delta_f_over_f_follows_its_formula(rng):
    traces = 5.0 + rng.random((50, 3))
    traces[10] = np.nan
    result = delta_f_over_f(traces, baseline_percentile=20.0)
    # Reference: textbook ΔF/F = (F − F0) / F0 with F0 = numpy's 20th percentile (NaN skipped).
    f0 = np.nanpercentile(traces, 20.0, axis=0)
    np.testing.assert_allclose(result, (traces - f0) / f0)
    assert np.isnan(result[10]).all()


def test_delta_f_over_f_refuses_a_non_positive_baseline():
    traces = np.array([[1.0, 0.0], [2.0, 0.0]])
    with pytest.raises(DataError, match="region 1: baseline F0 = 0 is not positive"):
        delta_f_over_f(traces)
    with pytest.raises(ConfigError, match="baseline_percentile"):
        delta_f_over_f(traces, baseline_percentile=120.0)
    with pytest.raises(ShapeError, match=r"shape \(T, R\)"):
        delta_f_over_f(np.ones(4))


def test_csv_round_trip(tmp_path, rng):
    traces = rng.random((4, 2))
    traces[3, 1] = np.nan
    path = write_traces_csv(tmp_path / "traces.csv", traces, names=["point 0", "rect 1"],
                            time_s=np.arange(4) * 0.05, value="dF/F")
    with path.open(newline="") as handle:
        rows = list(csv.reader(handle))
    assert rows[0] == ["frame", "time_s", "point 0 dF/F", "rect 1 dF/F"]
    # Reference: Python's float() parses back exactly what repr() wrote.
    values = np.array([[float(v) for v in row] for row in rows[1:]])
    np.testing.assert_array_equal(values[:, 0], np.arange(4))
    np.testing.assert_array_equal(values[:, 1], np.arange(4) * 0.05)
    np.testing.assert_array_equal(values[:, 2:], traces)
    with pytest.raises(ShapeError, match="do not match"):
        write_traces_csv(tmp_path / "bad.csv", traces, names=["one"], time_s=np.arange(4))


def test_bad_regions_are_refused_with_their_name():
    with pytest.raises(ConfigError, match=r"point 3: centre .* is outside the volume"):
        ball_region((5, 50, 5), 1.0, (4, 20, 20), (1, 1, 1), name="point 3")
    with pytest.raises(ConfigError, match="radius must be a positive"):
        ball_region((1, 1, 1), 0.0, (4, 20, 20), (1, 1, 1))
    with pytest.raises(ShapeError, match="one value per axis"):
        ball_region((1, 1), 1.0, (4, 20, 20), (1, 1, 1))
    with pytest.raises(ConfigError, match="at least 3"):
        polygon_region([(1, 1), (2, 2)], (20, 20))
    with pytest.raises(ConfigError, match="covers no pixel centre"):
        polygon_region([(1.1, 1.1), (1.2, 1.1), (1.2, 1.2)], (20, 20))
    with pytest.raises(ConfigError, match="depth planes 3:9"):
        polygon_region([(1, 1), (1, 8), (8, 8)], (4, 20, 20), planes=(3, 9))
    with pytest.raises(ConfigError, match="4 bounding corners"):
        ellipse_vertices([(0, 0), (1, 1)])
    with pytest.raises(ConfigError, match="no regions"):
        region_means(np.ones((2, 3, 3)), [])
    region = polygon_region([(0, 0), (0, 2), (2, 2)], (3, 3))
    with pytest.raises(ShapeError, match=r"\(T, Y, X\)"):
        region_means(np.ones((2, 2, 3, 3)), [region])


# ------------------------------------------------------------------ regions files and layers
GRID = SpatialGrid(shape=(3, 20, 24), voxel_um=(2.0, 0.65, 0.65), origin_um=(5.0, 0.0, 0.0))


def _shapes():
    return [
        RegionShape("bead 1", "ball", center_um=np.array([7.0, 6.1, 7.9]), radius_um=1.3),
        RegionShape("cell, left", "polygon", z_um=9.0, half_thickness_planes=1,
                    vertices_yx_um=np.array([[2.3, 3.6], [2.3, 8.8], [6.2, 8.8], [6.0, 3.1]])),
        RegionShape("band", "polygon", vertices_yx_um=np.array([[9.0, 1.0], [9.0, 14.0],
                                                               [11.0, 7.0]])),
    ]


def _same_voxels(a, b):
    assert a.name == b.name and a.box == b.box
    np.testing.assert_array_equal(a.mask, b.mask)


def test_regions_csv_round_trip_and_schema(tmp_path):
    import json
    from pathlib import Path

    import jsonschema

    shapes = _shapes()
    path = write_regions_csv(tmp_path / "regions.csv", shapes)
    schema = json.loads((Path(__file__).parents[2] / "schemas" / "regions.schema.json")
                        .read_text())
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    # Reference: the JSON Schema of one row (jsonschema's validator).
    for row in rows + schema["examples"]:
        jsonschema.validate(row, schema)
    back = read_regions_csv(path)
    assert [s.name for s in back] == ["bead 1", "cell, left", "band"]
    for before, after in zip(shapes, back, strict=True):
        assert (after.kind, after.radius_um, after.z_um, after.half_thickness_planes) == (
            before.kind, before.radius_um, before.z_um, before.half_thickness_planes)
        for field in ("center_um", "vertices_yx_um"):
            if getattr(before, field) is not None:
                np.testing.assert_array_equal(getattr(after, field), getattr(before, field))
        _same_voxels(before.region(GRID), after.region(GRID))


def test_regions_in_pixels_cover_the_voxels_a_hand_made_mask_does(tmp_path):
    path = tmp_path / "px.csv"
    path.write_text("name,kind,units,z,y,x,radius_um,half_thickness_planes,vertices_yx\n"
                    "box,polygon,px,1,,,,,3.5 5.5;3.5 13.5;9.5 13.5;9.5 5.5\n"
                    "bead,ball,px,2,10,12,1.0,,\n", encoding="utf-8")
    box, bead = (s.region(GRID) for s in read_regions_csv(path, grid=GRID))
    # Reference: pixel centres inside the rectangle on plane 1, written out by hand.
    expected = np.zeros(GRID.shape, bool)
    expected[1, 4:10, 6:14] = True
    np.testing.assert_array_equal(_full_mask(box, GRID.shape), expected)
    # Reference: voxels whose centres lie within 1 µm of voxel (2, 10, 12), numpy indices.
    zz, yy, xx = np.indices(GRID.shape)
    ball = ((zz - 2) * 2.0) ** 2 + ((yy - 10) * 0.65) ** 2 + ((xx - 12) * 0.65) ** 2 <= 1.0
    np.testing.assert_array_equal(_full_mask(bead, GRID.shape), ball)
    # The same regions given in micrometres (z = 5 + 2 µm per plane) cover the same voxels.
    um = tmp_path / "um.csv"
    um.write_text("name,kind,units,z,y,x,radius_um,half_thickness_planes,vertices_yx\n"
                  "box,polygon,um,7.0,,,,,2.275 3.575;2.275 8.775;6.175 8.775;6.175 3.575\n"
                  "bead,ball,um,9.0,6.5,7.8,1.0,,\n", encoding="utf-8")
    for a, b in zip((box, bead), (s.region(GRID) for s in read_regions_csv(um)), strict=True):
        _same_voxels(a, b)


HEADER = "name,kind,units,z,y,x,radius_um,half_thickness_planes,vertices_yx\n"


@pytest.mark.parametrize(("text", "message"), [
    (HEADER + "a,circle,um,1,2,3,1,,\n", r"line 2: kind 'circle' is not"),
    (HEADER + "a,ball,um,1,2,3,,,\n", r"line 2: a ball needs y, x and radius_um"),
    (HEADER + "a,ball,um,1,2,3,1,,\nb,ball,um,1,two,3,1,,\n", r"line 3: column 'y' is 'two'"),
    (HEADER + "a,polygon,um,,,,,,1 2;3 4\n", r"line 2: vertices_yx needs 3 or more"),
    (HEADER + "a,polygon,um,,,,,,1 2;3 x;5 6\n", r"line 2: vertices_yx '1 2;3 x;5 6' is not"),
    (HEADER + "a,polygon,um,,,,,-1,1 2;3 4;5 6\n", r"half_thickness_planes must be"),
    (HEADER + "a,ball,inch,1,2,3,1,,\n", r"line 2: units 'inch'"),
    (HEADER + "a,ball,px,1,2,3,1,,\n", r"line 2: units 'px' need the store's grid"),
    (HEADER + ",ball,um,1,2,3,1,,\n", r"line 2: column 'name' is empty"),
    (HEADER + "a,ball,um,1,2,3,nan,,\n", r"line 2: column 'radius_um' is 'nan'"),
    (HEADER + "a,ball,um,1,2,3,1,,\na,ball,um,1,2,3,1,,\n", r"names a appear more than once"),
    ("label,x,y\n1,2,3\n", r"no column name, kind, units"),
    (HEADER, r"no regions"),
])
def test_bad_regions_csv_rows_are_named(tmp_path, text, message):
    path = tmp_path / "regions.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError, match=message):
        read_regions_csv(path)


def test_a_missing_regions_file_is_named(tmp_path):
    with pytest.raises(InputFileError, match=r"nothing.csv: cannot read the regions file"):
        read_regions_csv(tmp_path / "nothing.csv")


def test_a_region_off_the_volume_is_refused_with_its_name():
    off = RegionShape("far", "polygon", z_um=99.0, vertices_yx_um=np.array([[1, 1], [1, 5],
                                                                             [5, 5]]))
    with pytest.raises(ConfigError, match=r"far: depth 99 µm \(plane 47\) is outside"):
        off.region(GRID)
    flat = RegionShape("flat", "ball", center_um=np.array([1.0, 2.0]), radius_um=1.0)
    with pytest.raises(ConfigError, match="flat: ball centre has 2 coordinates"):
        flat.region(GRID)


def _image_layer():
    from napari.layers import Image

    return Image(np.zeros((4, *GRID.shape), np.float32), scale=(0.5, *GRID.voxel_um),
                 translate=(0.0, *GRID.origin_um), name="volumes")


def test_regions_through_a_shapes_layer_and_back_cover_the_same_voxels():
    from napari.layers import Layer

    image = _image_layer()
    shapes = _shapes()
    layer = Layer.create(*shapes_layer_data(shapes, GRID))
    assert list(layer.shape_type) == ["ellipse", "polygon", "polygon"]
    back = layer_shapes(image, layer, radius_um=99.0, half_thickness_planes=0)
    assert [s.kind for s in back] == ["ball", "polygon", "polygon"]
    for before, after in zip(shapes, layer_regions(image, layer), strict=True):
        _same_voxels(before.region(GRID), after)
    assert back[2].z_um is None  # the band still spans every plane


def test_regions_through_a_labels_layer_and_back_cover_the_same_voxels():
    from napari.layers import Layer

    image = _image_layer()
    regions = [s.region(GRID) for s in _shapes()[::2]]  # the ball and the band: apart
    assert not (_full_mask(regions[0], GRID.shape) & _full_mask(regions[1], GRID.shape)).any()
    layer = Layer.create(*labels_layer_data(regions, GRID))
    assert layer.data.max() == 2
    for before, after in zip(regions, layer_regions(image, layer), strict=True):
        np.testing.assert_array_equal(_full_mask(after, GRID.shape),
                                      _full_mask(before, GRID.shape))


def test_trace_noise_is_the_robust_sigma_of_the_first_difference(rng):
    from scipy.stats import median_abs_deviation

    from volrecon.napari.traces_widget import trace_noise

    t = np.arange(4000)
    traces = np.stack([0.01 * t + rng.normal(0, 0.5, t.size),
                       np.sin(t / 300.0) + rng.normal(0, 2.0, t.size)], axis=1)
    traces[10, 0] = np.nan  # a frame not reconstructed yet
    traces[2000:, 1] += 50.0  # one jump the median ignores
    got = trace_noise(traces)
    # Reference: scipy.stats.median_abs_deviation(scale="normal") of the first difference,
    # over √2 (the difference of two independent samples).
    first = np.diff(traces[np.isfinite(traces[:, 0]), 0])
    assert got[0] == pytest.approx(median_abs_deviation(first, scale="normal") / np.sqrt(2))
    # Known synthetic truth: white noise of σ = 0.5 and 2 (±5 %: 4000 samples, MAD efficiency
    # 37 % -> ~2 % standard error).
    np.testing.assert_allclose(got, [0.5, 2.0], rtol=0.05)
    assert np.isnan(trace_noise(np.array([[1.0], [np.nan], [2.0]]))[0])

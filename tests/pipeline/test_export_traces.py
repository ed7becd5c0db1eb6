"""`volrecon export --traces`: the same traces as the napari widget, from a regions CSV."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest

from volrecon.cli import main
from volrecon.pipeline.store import STATUS_DONE, FrameRecords, JobStore

SHAPE_ZYX = (3, 20, 24)
N_FRAMES = 6
FINISHED = 4  # frames 0..3 done, 4..5 pending (NaN)
SCALE_TZYX = (0.5, 2.0, 0.65, 0.65)
DEPTH_START_UM = 5.0
WAIT_MS = 20_000  # generous: a loaded CI machine; the work itself takes well under a second


def _make_store(path: Path, rng: np.random.Generator) -> np.ndarray:
    """A store with a depth offset, its first FINISHED frames written; returns all volumes."""
    store = JobStore.create(path, shape_zyx=SHAPE_ZYX, n_frames=N_FRAMES, scale_tzyx=SCALE_TZYX,
                            depth_start_um=DEPTH_START_UM, projections=False,
                            metadata={"video": {"n_frames": N_FRAMES}, "runs": []})
    volumes = np.full((N_FRAMES, *SHAPE_ZYX), np.nan, np.float32)
    volumes[:FINISHED] = rng.random((FINISHED, *SHAPE_ZYX), dtype=np.float32) + np.arange(
        FINISHED, dtype=np.float32)[:, None, None, None]
    store.image[:FINISHED] = volumes[:FINISHED]
    n = FINISHED
    store.record(FrameRecords(start=0, stop=n, iterations=np.full(n, 5, np.int32),
                              objective=np.ones(n), residual=np.full(n, 0.1),
                              converged=np.ones(n, bool), seconds=np.ones(n, np.float32),
                              status=np.full(n, STATUS_DONE, np.uint8)))
    return volumes


@pytest.fixture
def store(tmp_path, rng):
    path = tmp_path / "out.zarr"
    return path, _make_store(path, rng)


def _read_traces(path: Path) -> tuple[list[str], np.ndarray]:
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    return rows[0], np.array([[float(v) for v in row] for row in rows[1:]])


def _widget_traces(viewer, qtbot, widget, regions_name):
    widget._regions.value = regions_name
    assert widget.start() is not None, widget._message.value
    qtbot.waitUntil(lambda: not widget.job.busy and widget.traces is not None
                    and widget.traces.regions_name == regions_name, timeout=WAIT_MS)
    return widget.traces


def test_cli_traces_equal_the_widget_traces_and_numpy(make_napari_viewer, qtbot, store,
                                                      tmp_path, capsys):
    from napari.layers import Layer

    from volrecon.napari.stores import output_store_layers
    from volrecon.napari.traces_widget import TimeTracesWidget

    path, volumes = store
    viewer = make_napari_viewer(show=False)
    viewer.add_layer(Layer.create(*output_store_layers(path)[0]))
    dz, py, px = SCALE_TZYX[1:]
    z1 = DEPTH_START_UM + 1 * dz
    # A rectangle on plane 1 over rows 4..9 and columns 6..13, an ellipse on plane 2 and a
    # triangle, in world coordinates (t, z, y, x) as napari stores what is drawn in 4-D.
    rectangle = [(0, z1, 3.5 * py, 5.5 * px), (0, z1, 3.5 * py, 13.5 * px),
                 (0, z1, 9.5 * py, 13.5 * px), (0, z1, 9.5 * py, 5.5 * px)]
    z2 = DEPTH_START_UM + 2 * dz
    ellipse = [(0, z2, 10.2, 2.1), (0, z2, 10.2, 9.3), (0, z2, 12.1, 9.3), (0, z2, 12.1, 2.1)]
    triangle = [(0, z1, 1.0, 10.0), (0, z1, 8.0, 14.0), (0, z1, 4.0, 5.0)]
    viewer.add_shapes([np.array(s) for s in (rectangle, ellipse, triangle)],
                      shape_type=["rectangle", "ellipse", "polygon"], name="shapes", ndim=4)
    viewer.add_points([[0.0, DEPTH_START_UM + 2 * dz, 10 * py, 12 * px]], name="beads",
                      ndim=4)
    widget = TimeTracesWidget(viewer)
    viewer.window.add_dock_widget(widget)
    widget._image.value = "out"  # the image layer is named after the store
    widget._radius.value = 1.0
    widget._thickness.value = 0
    for layer_name, expected_names in (("shapes", ["rectangle 0", "ellipse 1", "polygon 2"]),
                                       ("beads", ["point 0"])):
        traces = _widget_traces(viewer, qtbot, widget, layer_name)
        assert traces.names == expected_names
        regions_csv = tmp_path / f"{layer_name}.csv"
        widget._regions_file.value = regions_csv
        assert widget.save_regions() == regions_csv, widget._message.value
        widget._csv.value = tmp_path / f"{layer_name}-widget.csv"
        widget_csv = widget.export()
        cli_csv = tmp_path / f"{layer_name}-cli.csv"
        assert main(["export", str(path), "--traces", str(regions_csv), "--out",
                     str(cli_csv)]) == 0
        assert capsys.readouterr().out.splitlines()[-1] == str(cli_csv)
        # The CLI averages the same voxels in the same order: the files are identical.
        assert cli_csv.read_text() == widget_csv.read_text()
        header, values = _read_traces(cli_csv)
        assert header == ["frame", "time_s", *(f"{n} mean" for n in expected_names)]
        np.testing.assert_array_equal(values[:, 2:], traces.means_tr)
        assert np.isnan(values[FINISHED:, 2:]).all()  # pending frames
        if layer_name == "shapes":
            # Reference: numpy mean over the rectangle's pixels, sliced by hand.
            expected = volumes[:, 1, 4:10, 6:14].astype(np.float64).mean(axis=(1, 2))
        else:
            zz, yy, xx = np.indices(SHAPE_ZYX)
            # Reference: numpy mean over voxels whose centres are within 1 µm of the point.
            ball = ((zz - 2) * dz) ** 2 + ((yy - 10) * py) ** 2 + ((xx - 12) * px) ** 2 <= 1.0
            expected = volumes[:, ball].astype(np.float64).mean(axis=1)
        np.testing.assert_allclose(values[:, 2], expected, rtol=1e-12)
        np.testing.assert_allclose(values[:, 1], np.arange(N_FRAMES) * SCALE_TZYX[0])

    # Loading the saved shapes gives a Shapes layer with the same regions and traces.
    widget._regions_file.value = tmp_path / "shapes.csv"
    loaded = widget.load_regions()
    assert loaded is not None, widget._message.value
    first = _widget_traces(viewer, qtbot, widget, "shapes").means_tr
    again = _widget_traces(viewer, qtbot, widget, loaded.name)
    assert again.names == ["rectangle 0", "ellipse 1", "polygon 2"]
    np.testing.assert_array_equal(again.means_tr, first)


def test_cli_traces_of_a_frame_range_in_pixels(store, tmp_path):
    path, volumes = store
    regions = tmp_path / "regions.csv"
    regions.write_text("name,kind,units,z,y,x,radius_um,half_thickness_planes,vertices_yx\n"
                       "box,polygon,px,1,,,,1,3.5 5.5;3.5 13.5;9.5 13.5;9.5 5.5\n",
                       encoding="utf-8")
    out = tmp_path / "traces.csv"
    assert main(["export", str(path), "--traces", str(regions), "--out", str(out),
                 "--frames", "1:3"]) == 0
    header, values = _read_traces(out)
    assert header == ["frame", "time_s", "box mean"]
    np.testing.assert_array_equal(values[:, 0], [1, 2])
    # Reference: numpy mean over planes 0..2 (plane 1 ± 1), rows 4..9, columns 6..13.
    expected = volumes[1:3, 0:3, 4:10, 6:14].astype(np.float64).mean(axis=(1, 2, 3))
    np.testing.assert_allclose(values[:, 2], expected, rtol=1e-12)


@pytest.mark.parametrize(("row", "names"), [
    ("a,ball,um,7,2,3,,,", "line 2: a ball needs y, x and radius_um"),
    ("a,square,um,7,2,3,1,,", "line 2: kind 'square'"),
    ("a,ball,um,99,2,3,1,,", "a: centre (47.0, 3.08, 4.62) (voxels) is outside the volume"),
])
def test_bad_regions_rows_are_one_line_exit_2(store, tmp_path, capsys, row, names):
    path, _ = store
    regions = tmp_path / "regions.csv"
    regions.write_text("name,kind,units,z,y,x,radius_um,half_thickness_planes,vertices_yx\n"
                       f"{row}\n", encoding="utf-8")
    out = tmp_path / "traces.csv"
    assert main(["export", str(path), "--traces", str(regions), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and names in err and str(regions) in err
    assert not out.exists()


def test_traces_options_are_checked(store, tmp_path, capsys):
    path, _ = store
    assert main(["export", str(path), "--traces", str(tmp_path / "r.csv")]) == 2
    assert "--traces REGIONS.csv and --out TRACES.csv go together" in capsys.readouterr().err
    assert main(["export", str(path), "--traces", str(tmp_path / "missing.csv"), "--out",
                 str(tmp_path / "t.csv")]) == 2
    assert "missing.csv: cannot read the regions file" in capsys.readouterr().err
    regions = tmp_path / "r.csv"
    regions.write_text("name,kind,units,z,y,x,radius_um,half_thickness_planes,vertices_yx\n"
                       "a,ball,um,7,2,3,1,,\n", encoding="utf-8")
    assert main(["export", str(path), "--traces", str(regions), "--out", str(tmp_path)]) == 2
    assert "is a folder" in capsys.readouterr().err
    assert main(["export", str(path), "--traces", str(regions), "--out",
                 str(tmp_path / "no" / "t.csv")]) == 2
    assert "cannot write the file" in capsys.readouterr().err

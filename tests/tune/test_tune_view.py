"""The sweep as napari layers (``volrecon tune --view``), on napari's display-free model."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.napari.sweep import add_sweep_layers, sweep_layers
from volrecon.tune import TuneResult

napari = pytest.importorskip("napari")


def test_layers_hold_every_cell_at_its_slider_position(dim_tuned: TuneResult):
    layers = sweep_layers(dim_tuned)
    sweep, kwargs, kind = layers[0]
    tvs = kwargs["metadata"]["tv_units"]
    l1s = kwargs["metadata"]["l1_units"]
    assert kind == "image" and sweep.shape == (len(tvs), len(l1s), 8, 64, 64)
    site = len(dim_tuned.sites) // 2
    for cell in dim_tuned.cells:
        np.testing.assert_array_equal(
            sweep[tvs.index(cell.tv_units), l1s.index(cell.l1_units)], cell.volumes[site])
    assert kwargs["axis_labels"] == ["tv", "l1", "z", "y", "x"]
    g = dim_tuned.geometry
    assert kwargs["scale"][2:] == [g.depth_step_um, g.pixel_size_um, g.pixel_size_um]
    assert [name for _, k, _ in layers for name in [k["name"]]][1].startswith("tuned: tv")


def test_viewer_opens_on_the_chosen_setting(dim_tuned: TuneResult):
    viewer = napari.components.ViewerModel()
    added = add_sweep_layers(viewer, dim_tuned)
    assert len(viewer.layers) == len(added) == 4
    step = added[0].metadata["chosen_step"]
    assert tuple(viewer.dims.current_step[:2]) == tuple(step)
    metadata = added[0].metadata
    assert metadata["tv"][step[0]] == pytest.approx(dim_tuned.chosen.tv)
    assert metadata["l1"][step[1]] == pytest.approx(dim_tuned.chosen.l1)


def test_temporal_sweep_is_a_layer_of_every_weight(temporal_tuned: TuneResult):
    sweep = temporal_tuned.temporal
    assert sweep is not None
    *_, (volumes, kwargs, kind) = sweep_layers(temporal_tuned)
    assert kind == "image" and not kwargs["visible"]
    assert kwargs["axis_labels"] == ["temporal_weight", "frame", "z", "y", "x"]
    run = len(sweep.run_frames) // 2
    assert volumes.shape == (len(sweep.cells), *sweep.cells[0].volumes[run].shape)
    for k, cell in enumerate(sweep.cells):
        np.testing.assert_array_equal(volumes[k], cell.volumes[run])
    metadata = kwargs["metadata"]
    assert metadata["temporal_weight"][metadata["chosen_step"][0]] == sweep.chosen.weight
    assert len(metadata["video_frames"]) == volumes.shape[1]
    viewer = napari.components.ViewerModel()
    assert len(add_sweep_layers(viewer, temporal_tuned)) == 5

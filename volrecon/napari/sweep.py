"""Show a tuning sweep (``volrecon tune --view``) as napari layers.

:func:`sweep_layers` needs neither napari nor Qt: it turns a
:class:`volrecon.tune.TuneResult` into layer data tuples. The sweep becomes one 5-D image
``(tv, l1, z, y, x)`` of the middle tuning frame, so the viewer's first two sliders step
through the weights (a setting the sweep did not try shows as an empty volume); the chosen
volume and the unregularised one at the chosen iteration count follow as their own layers,
then the corrected camera frame. With a temporal sweep (``temporal_window > 1``) a last,
hidden layer ``(temporal_weight, frame, z, y, x)`` holds the kept frames of the middle run
for every temporal weight tried (turn it on and step its first two sliders).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import ConfigError
from volrecon.napari.stores import VOLUME_COLORMAP

if TYPE_CHECKING:
    import napari

    from volrecon.napari.stores import LayerData
    from volrecon.tune.tune import TuneResult

__all__ = ["add_sweep_layers", "sweep_layers", "view_sweep"]

_UNITS3 = ["micrometer", "micrometer", "micrometer"]


def sweep_layers(result: TuneResult) -> list[LayerData]:
    """Layer data of a tuning run (see the module notes).

    Parameters
    ----------
    result : TuneResult

    Returns
    -------
    list of (data, kwargs, "image")
        The sweep ``(tv, l1, Z, Y, X)``, the chosen and the unregularised volume
        ``(Z, Y, X)``, the corrected frame ``(1, Y, X)``, and with a temporal sweep its
        ``(weights, frames, Z, Y, X)`` (hidden); depth, rows and columns in
        micrometres. The sweep layer's ``metadata`` lists the weights of each slider step
        (``tv``, ``l1``, in job-file units and in units of ``u``).
    """
    cells = list(result.cells)
    tvs = sorted({c.tv_units for c in cells})
    l1s = sorted({c.l1_units for c in cells})
    site = len(result.sites) // 2
    shape = cells[0].volumes.shape[1:]
    sweep = np.zeros((len(tvs), len(l1s), *shape), dtype=np.float32)
    for cell in cells:
        sweep[tvs.index(cell.tv_units), l1s.index(cell.l1_units)] = cell.volumes[site]
    g = result.geometry
    scale = [g.depth_step_um, g.pixel_size_um, g.pixel_size_um]
    translate = [g.depth_start_um, 0.0, 0.0]
    high = float(np.percentile(result.chosen.volumes[site], 99.9)) or 1.0
    chosen = result.chosen
    frame = result.sites[site].frame
    unit = result.weight_unit
    chosen_step = [tvs.index(chosen.tv_units), l1s.index(chosen.l1_units)]
    common = {"scale": scale, "translate": translate, "units": _UNITS3,
              "axis_labels": ["z", "y", "x"], "colormap": VOLUME_COLORMAP,
              "contrast_limits": (0.0, high)}
    layers: list[LayerData] = [
        (sweep, {**common, "name": f"tune sweep, frame {frame} (tv, l1)",
                 "scale": [1.0, 1.0, *scale], "translate": [0.0, 0.0, *translate],
                 "units": ["", "", *_UNITS3], "axis_labels": ["tv", "l1", "z", "y", "x"],
                 "metadata": {"tv": [t * unit for t in tvs], "l1": [w * unit for w in l1s],
                              "tv_units": tvs, "l1_units": l1s, "weight_unit": unit,
                              "chosen_step": chosen_step}}, "image"),
        (result.chosen_check.volumes[site], {
            **common, "name": f"tuned: tv {result.tv:g}, l1 {result.l1:g} "
            f"({result.iteration_count} iterations)", "visible": False}, "image"),
        (result.baseline_check.volumes[site], {
            **common, "name": f"tv = l1 = 0 ({result.iteration_count} iterations)",
            "visible": False}, "image"),
        (result.sites[site].frames_3yx[1:2], {
            "name": f"corrected frame {frame}", "scale": scale, "translate": translate,
            "units": _UNITS3, "axis_labels": ["z", "y", "x"], "visible": False}, "image"),
    ]
    if result.temporal is not None:
        layers.append(_temporal_layer(result, common, scale, translate))
    return layers


def _temporal_layer(result: TuneResult, common: dict[str, Any], scale: list[float],
                    translate: list[float]) -> LayerData:
    """The temporal sweep: the middle run's kept (even) frames for every weight tried."""
    sweep = result.temporal
    assert sweep is not None
    run = len(sweep.run_frames) // 2
    volumes = np.stack([cell.volumes[run] for cell in sweep.cells]).astype(np.float32)
    first = sweep.run_frames[run]
    return (volumes, {
        **common, "name": f"tune temporal sweep, video frames {first}-"
        f"{first + sweep.run_length - 1} (temporal_weight, kept frame)", "visible": False,
        "scale": [1.0, 1.0, *scale], "translate": [0.0, 0.0, *translate],
        "units": ["", "", *_UNITS3],
        "axis_labels": ["temporal_weight", "frame", "z", "y", "x"],
        "metadata": {"temporal_weight": [c.weight for c in sweep.cells],
                     "temporal_weight_units": [c.weight_units for c in sweep.cells],
                     "video_frames": list(range(first, first + sweep.run_length, 2)),
                     "chosen_step": [sweep.index, 0]}}, "image")


def add_sweep_layers(viewer: napari.Viewer | napari.components.ViewerModel,
                     result: TuneResult) -> list[napari.layers.Layer]:
    """Add :func:`sweep_layers` to `viewer` and move its sliders to the chosen setting.

    Returns
    -------
    list of napari layers
        The layers added, in order.
    """
    added = []
    for data, kwargs, _ in sweep_layers(result):
        added.append(viewer.add_image(data, **kwargs))
    step = added[0].metadata["chosen_step"]
    viewer.dims.set_current_step(0, step[0])
    viewer.dims.set_current_step(1, step[1])
    return added


def view_sweep(result: TuneResult) -> int:
    """Open the sweep in a new napari viewer and run its event loop; returns 0.

    Raises
    ------
    ConfigError
        If napari is not installed.
    """
    try:
        import napari
    except ImportError as exc:
        raise ConfigError(f"--view needs napari ({exc}); install it with "
                          "pip install 'volrecon[napari]'") from exc
    viewer = napari.Viewer(title=f"volrecon tune: {result.job.source}")
    add_sweep_layers(viewer, result)
    napari.run()
    return 0

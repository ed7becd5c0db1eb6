"""The time-traces dock widget: mean intensity over time in drawn regions, ΔF/F, CSV; the
regions themselves saved to and loaded from a regions CSV."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from magicgui.types import FileDialogMode
from magicgui.widgets import (
    CheckBox,
    ComboBox,
    Container,
    FileEdit,
    FloatSpinBox,
    Label,
    PushButton,
    SpinBox,
)
from magicgui.widgets.bases import Widget

from volrecon.errors import ConfigError, VolreconError
from volrecon.napari._plot import PlotCanvas
from volrecon.napari._widget_tools import BackgroundJob, chosen_path
from volrecon.napari.region_shapes import read_regions_csv, write_regions_csv
from volrecon.napari.regions import (
    frame_times_s,
    image_grid,
    layer_regions,
    layer_shapes,
    shapes_layer_data,
)
from volrecon.napari.traces import delta_f_over_f, region_means, write_traces_csv

if TYPE_CHECKING:
    import napari

__all__ = ["REGIONS_HINT", "TimeTracesWidget", "Traces", "trace_noise"]

#: The hint shown while the viewer has no layer to take regions from.
REGIONS_HINT = ("Regions come from a Points, Shapes or Labels layer: add one with the "
                "layer-list buttons (New points / New shapes / New labels) and draw on the "
                "image, or use \"Load regions\" below.")

#: 1 / Φ⁻¹(3/4): turns a median absolute deviation into a Gaussian standard deviation.
MAD_TO_SIGMA = 1.482602218505602


def trace_noise(values_tr: np.ndarray) -> np.ndarray:
    """Frame-to-frame noise of each trace: ``1.4826 · MAD(x_t − x_{t−1}) / √2``.

    For a trace ``x_t = s_t + n_t`` whose signal changes little between frames, the first
    difference is ``n_t − n_{t−1}`` (standard deviation ``√2 σ``), and the median absolute
    deviation ignores the few frames where the signal jumps. Frames not reconstructed yet
    (NaN) are skipped.

    Parameters
    ----------
    values_tr : ndarray of shape (T, R)
        Traces, one per column.

    Returns
    -------
    ndarray of shape (R,), float64
        ``σ`` per trace, in the traces' units; NaN with fewer than 3 finite frames.
    """
    values = np.asarray(values_tr, dtype=np.float64)
    out = np.full(values.shape[1], np.nan)
    for r in range(values.shape[1]):
        column = values[:, r]
        steps = np.diff(column[np.isfinite(column)])
        if steps.size >= 2:
            deviation = np.median(np.abs(steps - np.median(steps)))
            out[r] = MAD_TO_SIGMA * float(deviation) / np.sqrt(2.0)
    return out


@dataclass(frozen=True, eq=False)
class Traces:
    """Mean intensity per frame of each region, as last computed.

    Attributes
    ----------
    names : list of str
        Region labels (``"point 0"``, ``"rectangle 1"``, …).
    time_s : ndarray of shape (T,)
        Frame times, seconds.
    means_tr : ndarray of shape (T, R)
        Mean intensity; NaN for frames not reconstructed yet.
    image_name, regions_name : str
        The layers they came from.
    """

    names: list[str]
    time_s: np.ndarray
    means_tr: np.ndarray
    image_name: str
    regions_name: str


def _compute(data: Any, regions: list[Any], names: list[str], times: np.ndarray,
             image_name: str, regions_name: str) -> Traces:
    """Runs in the worker thread; reads only the chunks the regions touch."""
    means = region_means(data, regions)
    values = means.compute() if hasattr(means, "compute") else means
    return Traces(names=names, time_s=times, means_tr=np.asarray(values), image_name=image_name,
                  regions_name=regions_name)


class TimeTracesWidget(Container[Widget]):
    """Plot mean intensity over time in regions drawn on a 4-D (or 3-D) image layer.

    Points become balls of the chosen radius; rectangles, polygons and ellipses of a Shapes
    layer become prisms through the plane they were drawn on; a Labels layer gives one region
    per label. ΔF/F divides by a low percentile of each trace. "Export CSV" writes what the
    plot shows. "Save regions" writes the chosen layer's regions to a regions CSV
    (micrometres; ``volrecon export --traces`` reads it); "Load regions" adds one as a Shapes
    layer.

    Parameters
    ----------
    napari_viewer : napari.viewer.Viewer
        The viewer whose layers are offered.
    """

    def __init__(self, napari_viewer: napari.viewer.Viewer) -> None:
        self._viewer = napari_viewer
        self._image = ComboBox(label="image", choices=self._image_choices)
        self._regions = ComboBox(label="regions", choices=self._region_choices)
        self._radius = FloatSpinBox(label="point radius (µm)", min=0.01, max=1e4, value=2.0,
                                    step=0.5)
        self._thickness = SpinBox(label="shape ± planes", min=0, max=10_000, value=0)
        self._dff = CheckBox(text="ΔF/F", value=False)
        self._percentile = FloatSpinBox(label="F0 percentile", min=0.0, max=100.0, value=10.0)
        self._plot_button = PushButton(text="Plot traces")
        self._csv = FileEdit(label="CSV file", mode=FileDialogMode.OPTIONAL_FILE,
                             filter="CSV (*.csv)")
        self._export_button = PushButton(text="Export CSV")
        self._regions_file = FileEdit(label="regions file", mode=FileDialogMode.OPTIONAL_FILE,
                                      filter="CSV (*.csv)")
        self._save_regions_button = PushButton(text="Save regions")
        self._load_regions_button = PushButton(text="Load regions")
        self._message = Label(value="")
        #: Shown while the viewer has no layer to take regions from: how to add one.
        self.hint = Label(value="")
        super().__init__(widgets=[self.hint, self._image, self._regions, self._radius,
                                  self._thickness,
                                  self._dff, self._percentile, self._plot_button, self._csv,
                                  self._export_button, self._regions_file,
                                  self._save_regions_button, self._load_regions_button,
                                  self._message])
        self._plot = PlotCanvas(rows=1, height_in=2.2)
        self.native.layout().addWidget(self._plot.widget)
        self._plot_button.changed.connect(self.start)
        self._export_button.changed.connect(self.export)
        self._save_regions_button.changed.connect(self.save_regions)
        self._load_regions_button.changed.connect(self.load_regions)
        self._dff.changed.connect(self._redraw)
        self._percentile.changed.connect(self._redraw)
        for event in (self._viewer.layers.events.inserted, self._viewer.layers.events.removed):
            event.connect(self._refresh_choices)
        self._show_hint()
        self.job = BackgroundJob(self.native)
        self.traces: Traces | None = None
        #: Noise readout of the traces on the plot (:func:`trace_noise`), one per region.
        self.noise: np.ndarray | None = None

    # ----------------------------------------------------------------------------- inputs
    def _image_choices(self, _widget: Any = None) -> list[str]:
        from napari.layers import Image

        return [layer.name for layer in self._viewer.layers
                if isinstance(layer, Image) and layer.ndim in (3, 4)]

    def _region_choices(self, _widget: Any = None) -> list[str]:
        from napari.layers import Labels, Points, Shapes

        return [layer.name for layer in self._viewer.layers
                if isinstance(layer, Points | Shapes | Labels)]

    def _refresh_choices(self, _event: Any = None) -> None:
        self._image.reset_choices()
        self._regions.reset_choices()
        self._show_hint()

    def _show_hint(self) -> None:
        """Say where regions come from while no Points, Shapes or Labels layer exists."""
        missing = not self._region_choices()
        self.hint.value = REGIONS_HINT if missing else ""
        self.hint.visible = missing

    # ------------------------------------------------------------------------------- work
    def start(self, _value: Any = None) -> Any:
        """Compute the traces in a worker thread; returns the worker (None on bad input)."""
        try:
            if self._image.value is None or self._regions.value is None:
                raise ConfigError("choose an image layer and a Points, Shapes or Labels layer "
                                  "first")
            image = self._viewer.layers[self._image.value]
            regions_layer = self._viewer.layers[self._regions.value]
            regions = layer_regions(image, regions_layer, radius_um=self._radius.value,
                                    half_thickness_planes=self._thickness.value)
        except VolreconError as exc:
            self._message.value = str(exc)
            return None
        data = image.data[0] if image.multiscale else image.data
        self._message.value = f"reading {len(regions)} regions …"
        self._plot_button.enabled = False
        return self.job.start(_compute, data, regions, [r.name for r in regions],
                              frame_times_s(image), image.name, regions_layer.name,
                              on_result=self._show, on_finished=self._done)

    def _done(self) -> None:
        self._plot_button.enabled = True

    def _show(self, traces: Traces) -> None:
        self.traces = traces
        self._redraw()

    def _values(self) -> tuple[Traces, np.ndarray, str]:
        traces = self.traces
        if traces is None:
            raise ConfigError("plot the traces first")
        if self._dff.value:
            return (traces, delta_f_over_f(traces.means_tr,
                                           baseline_percentile=self._percentile.value), "dF/F")
        return traces, traces.means_tr, "mean"

    def _redraw(self, _value: Any = None) -> None:
        if self.traces is None:
            return
        plot = self._plot
        plot.clear()
        try:
            traces, values, kind = self._values()
        except VolreconError as exc:
            self._message.value = str(exc)
            plot.draw()
            return
        ax = plot.axes[0]
        self.noise = trace_noise(values)
        for name, column, sigma in zip(traces.names, values.T, self.noise, strict=True):
            ax.plot(traces.time_s, column, label=f"{name} (noise {sigma:.3g})", linewidth=1.2)
        ax.set_xlabel("time (s)", fontsize=8)
        ax.set_ylabel("ΔF/F" if kind == "dF/F" else "mean intensity", fontsize=8)
        if len(traces.names) <= 10:
            ax.legend(fontsize=7, loc="best")
        plot.draw()
        readout = ", ".join(f"{name} {sigma:.3g}"
                            for name, sigma in zip(traces.names, self.noise, strict=True))
        self._message.value = (f"{len(traces.names)} regions of '{traces.image_name}', "
                               f"{len(traces.time_s)} frames; noise (robust σ of the "
                               f"frame-to-frame change / √2): {readout}")

    def export(self, _value: Any = None) -> Path | None:
        """Write the plotted traces to the chosen CSV file; returns its path (None on error)."""
        target = chosen_path(self._csv)
        try:
            if target is None:
                raise ConfigError("choose a CSV file to write first")
            traces, values, kind = self._values()
            path = write_traces_csv(target, values, names=traces.names, time_s=traces.time_s,
                                    value=kind)
        except (VolreconError, OSError) as exc:
            self._message.value = str(exc)
            return None
        self._message.value = f"wrote {path}"
        return path

    def save_regions(self, _value: Any = None) -> Path | None:
        """Write the chosen regions layer to the regions file; returns its path (None on error)."""
        target = chosen_path(self._regions_file)
        try:
            if target is None:
                raise ConfigError("choose a regions file to write first")
            if self._image.value is None or self._regions.value is None:
                raise ConfigError("choose an image layer and a Points or Shapes layer first")
            shapes = layer_shapes(self._viewer.layers[self._image.value],
                                  self._viewer.layers[self._regions.value],
                                  radius_um=self._radius.value,
                                  half_thickness_planes=self._thickness.value)
            path = write_regions_csv(target, shapes)
        except (VolreconError, OSError) as exc:
            self._message.value = str(exc)
            return None
        self._message.value = f"wrote {len(shapes)} regions to {path}"
        return path

    def load_regions(self, _value: Any = None) -> Any:
        """Add the regions file as a Shapes layer on the chosen image; returns the layer."""
        from napari.layers import Layer

        source = chosen_path(self._regions_file)
        try:
            if source is None:
                raise ConfigError("choose a regions file to read first")
            if self._image.value is None:
                raise ConfigError("choose the image layer the regions belong to first")
            grid = image_grid(self._viewer.layers[self._image.value])
            shapes = read_regions_csv(source, grid=grid)
            for shape in shapes:
                shape.region(grid)  # refuse regions off the image now, naming them
            layer = Layer.create(*shapes_layer_data(shapes, grid, name=source.stem))
        except (VolreconError, OSError) as exc:
            self._message.value = str(exc)
            return None
        self._viewer.add_layer(layer)
        self._regions.value = layer.name
        self._message.value = f"loaded {len(shapes)} regions from {source}"
        return layer

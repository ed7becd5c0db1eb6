"""The preview dock widget: reconstruct one frame with chosen settings, off the GUI thread.

With a temporal window above 1 it reconstructs the window around the frame with the temporal
prior (:func:`volrecon.napari.preview.preview_window`) and shows that frame's volume.
"""

from __future__ import annotations

import os
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
    Label,
    LineEdit,
    PushButton,
    SpinBox,
)
from magicgui.widgets.bases import Widget

from volrecon.errors import ConfigError, ShapeError, VolreconError
from volrecon.napari._widget_tools import BackgroundJob, chosen_path
from volrecon.napari.preview import (
    PreviewResult,
    preview_frame,
    preview_window,
    read_frame,
    window_bounds,
)
from volrecon.napari.stores import VOLUME_COLORMAP
from volrecon.solvers import METHODS, SolverSettings

if TYPE_CHECKING:
    import napari

    from volrecon.models.base import PSFModel

__all__ = ["PreviewWidget"]

FROM_FILE = "file"


@dataclass(frozen=True)
class _Request:
    """Everything a preview needs, gathered on the GUI thread."""

    model_path: Path
    settings: SolverSettings
    frame_path: Path | None
    layer_data: Any
    layer_name: str
    index: int
    dark_path: Path | None
    binning: int


@dataclass(frozen=True)
class _Failure:
    """A user error met in the worker: shown in the widget instead of raised."""

    message: str


def _layer_frames(data: Any, index: int, window: int, name: str) -> tuple[np.ndarray, int]:
    """The frames of the window around `index` of a video layer: ``(W, Y, X)`` and the
    position of `index` in it."""
    if isinstance(data, list | tuple):  # multiscale: full resolution
        data = data[0]
    if getattr(data, "ndim", 0) < 3:
        raise ShapeError(f"layer '{name}' is a single frame; a temporal window needs a video "
                         "layer (t, y, x)")
    start, stop = window_bounds(index, int(data.shape[0]), window)
    frames = [_layer_frame(data, t, name) for t in range(start, stop)]
    return np.stack(frames), index - start


def _file_frames(path: Path, index: int, window: int) -> tuple[np.ndarray, int]:
    """As :func:`_layer_frames`, for a video file."""
    from volrecon.io import open_frames

    source = open_frames(path)
    if not 0 <= index < source.n_frames:
        raise ShapeError(f"{path}: frame {index} is outside 0:{source.n_frames}; choose a "
                         "frame of the video")
    start, stop = window_bounds(index, source.n_frames, window)
    return source.read(start, stop).astype(np.float32), index - start


def _layer_frame(data: Any, index: int, name: str) -> np.ndarray:
    """Frame `index` (axis 0) of an image layer's data, singleton axes dropped: (Y, X)."""
    if getattr(data, "ndim", 0) < 2:
        raise ShapeError(f"layer '{name}' is not an image; choose a video layer")
    if isinstance(data, list | tuple):  # multiscale: full resolution
        data = data[0]
    if data.ndim > 2:
        if not 0 <= index < data.shape[0]:
            raise ShapeError(f"layer '{name}': frame {index} is outside 0:{data.shape[0]}; "
                             "choose a frame of the video")
        data = data[index]
    # One frame of a lazy layer is all the widget reads.
    frame = np.asarray(data.compute() if hasattr(data, "compute") else data)
    frame = frame.reshape([n for n in frame.shape if n != 1] or [1])
    if frame.ndim != 2:
        raise ShapeError(f"layer '{name}': a frame has shape {frame.shape}; choose a (t, y, x) "
                         "video layer, not a volume")
    return frame


def _label(settings: SolverSettings) -> str:
    """The settings' label, with the temporal window when there is one."""
    if settings.temporal_window == 1:
        return settings.label()
    return (f"{settings.label()}, window {settings.temporal_window} "
            f"weight {settings.temporal_weight:g}")


class PreviewWidget(Container[Widget]):
    """Reconstruct a frame with chosen solver settings and add the volume and residual.

    Each run adds two new layers, ``preview N: <settings>`` and ``preview N residual``, so runs
    with other settings can be compared side by side (the grid view shows them next to each
    other). The work runs in a napari ``thread_worker``; the viewer stays responsive.

    Parameters
    ----------
    napari_viewer : napari.viewer.Viewer
        The viewer to add layers to.
    """

    def __init__(self, napari_viewer: napari.viewer.Viewer) -> None:
        self._viewer = napari_viewer
        self._job_file = FileEdit(label="settings from job", mode=FileDialogMode.EXISTING_FILE,
                                  filter="Job file (*.toml)",
                                  tooltip="optional: fill the model and [solver] settings "
                                          "below from a job file")
        self._model_path = FileEdit(label="PSF model", mode=FileDialogMode.EXISTING_DIRECTORY)
        self._source = ComboBox(label="frame from", choices=self._source_choices)
        self._frame_file = FileEdit(label="frame file", mode=FileDialogMode.EXISTING_FILE,
                                    filter="Video (*.tif *.tiff *.zarr)")
        self._index = SpinBox(label="frame", min=0, max=2**31 - 1, value=0)
        self._dark_file = FileEdit(label="dark image", mode=FileDialogMode.EXISTING_FILE,
                                   filter="TIFF (*.tif *.tiff)",
                                   tooltip="optional: mean dark frame subtracted first")
        self._binning = SpinBox(label="binning", min=1, max=64, value=1,
                                tooltip="lateral binning of the raw frame, as in the job")
        self._method = ComboBox(label="method", choices=list(METHODS), value="admm")
        self._iterations = SpinBox(label="iterations", min=1, max=100_000, value=50)
        self._tv = LineEdit(label="tv", value="0")
        self._l1 = LineEdit(label="l1", value="0")
        self._window = SpinBox(label="temporal window", min=1, max=64, value=1,
                               tooltip="frames solved together with the temporal prior (ADMM), "
                                       "as [solver] temporal_window")
        self._weight = LineEdit(label="temporal weight", value="0",
                                tooltip="[solver] temporal_weight")
        self._grid = CheckBox(text="show previews side by side (grid view)", value=False)
        self._run = PushButton(text="Reconstruct")
        self._message = Label(value="")
        super().__init__(widgets=[self._job_file, self._model_path, self._source,
                                  self._frame_file, self._index, self._dark_file,
                                  self._binning, self._method, self._iterations, self._tv,
                                  self._l1, self._window, self._weight, self._grid, self._run,
                                  self._message])
        self._run.changed.connect(self.start)
        self._job_file.changed.connect(self.load_job_settings)
        self._source.changed.connect(self._update_enabled)
        self._viewer.layers.events.inserted.connect(self._refresh_sources)
        self._viewer.layers.events.removed.connect(self._refresh_sources)
        self._models: dict[tuple[str, float], PSFModel] = {}
        self._count = 0
        self._own: list[Any] = []
        self.job = BackgroundJob(self.native)
        self._update_enabled()

    # ------------------------------------------------------------------------------ inputs
    def _source_choices(self, _widget: Any = None) -> list[str]:
        from napari.layers import Image

        own = getattr(self, "_own", [])
        names = [layer.name for layer in self._viewer.layers
                 if isinstance(layer, Image) and layer not in own]
        return [FROM_FILE, *names]

    def _refresh_sources(self, _event: Any = None) -> None:
        self._source.reset_choices()

    def _update_enabled(self, _value: Any = None) -> None:
        from_file = self._source.value == FROM_FILE
        self._frame_file.enabled = from_file
        if not from_file and self._source.value in self._viewer.layers:
            # Start from the frame on screen.
            layer = self._viewer.layers[self._source.value]
            if layer.ndim > 2:
                here = layer.world_to_data(self._viewer.dims.point)[0]
                self._index.value = int(np.clip(np.rint(here), 0, layer.data.shape[0] - 1))

    def load_job_settings(self, _value: Any = None) -> None:
        """Fill the model and solver fields from the chosen job file (its ``[solver]``)."""
        from volrecon.pipeline import load_job

        path = chosen_path(self._job_file)
        if path is None:
            return
        try:
            job = load_job(path)
        except VolreconError as exc:
            self._message.value = str(exc)
            return
        solver = job.solver
        if job.model_path.is_dir():
            self._model_path.value = job.model_path
        self._method.value = solver.method
        note = ""
        if isinstance(solver.iterations, int):
            self._iterations.value = solver.iterations
        else:
            note = f"; iterations = {solver.iterations!r} kept at {self._iterations.value}"
        self._tv.value, self._l1.value = f"{solver.tv:g}", f"{solver.l1:g}"
        self._window.value = solver.temporal_window
        self._weight.value = f"{solver.temporal_weight:g}"
        self._message.value = f"settings from {path}: {_label(solver)}{note}"

    def _request(self) -> _Request:
        model_path = chosen_path(self._model_path)
        if model_path is None:
            raise ConfigError("choose a PSF model store first (a folder written by "
                              "'volrecon calibrate')")
        try:
            tv, l1 = float(self._tv.value), float(self._l1.value)
        except ValueError as exc:
            raise ConfigError(f"tv and l1 must be numbers; got {self._tv.value!r}, "
                              f"{self._l1.value!r}") from exc
        try:
            weight = float(self._weight.value)
        except ValueError as exc:
            raise ConfigError(f"the temporal weight must be a number; got "
                              f"{self._weight.value!r}") from exc
        settings = SolverSettings(method=self._method.value, iterations=self._iterations.value,
                                  tv=tv, l1=l1, temporal_window=int(self._window.value),
                                  temporal_weight=weight)
        source = self._source.value
        frame_path, data, name = None, None, ""
        if source == FROM_FILE:
            frame_path = chosen_path(self._frame_file)
            if frame_path is None:
                raise ConfigError("choose a frame file, or an image layer under 'frame from'")
        else:
            layer = self._viewer.layers[source]
            data, name = layer.data, layer.name
        return _Request(model_path=model_path, settings=settings, frame_path=frame_path,
                        layer_data=data, layer_name=name, index=int(self._index.value),
                        dark_path=chosen_path(self._dark_file),
                        binning=int(self._binning.value))

    # ------------------------------------------------------------------------------- work
    def _model(self, path: Path) -> PSFModel:
        from volrecon import PSFModel

        try:
            stamp = (path / "zarr.json").stat().st_mtime
        except OSError:
            stamp = 0.0
        key = (os.fspath(path.resolve()), stamp)
        if key not in self._models:
            self._models = {key: PSFModel.load(path)}  # keep one model in memory
        return self._models[key]

    def _compute(self, request: _Request) -> tuple[PreviewResult, PSFModel] | _Failure:
        """Runs in the worker thread."""
        from volrecon.io import FrameCorrection, read_image

        try:
            model = self._model(request.model_path)
            dark = None if request.dark_path is None else read_image(request.dark_path)
            correction = FrameCorrection.build(dark_yx=dark, binning=request.binning,
                                               name_dark=str(request.dark_path))
            window = request.settings.temporal_window
            if window > 1:
                frames, position = (
                    _file_frames(request.frame_path, request.index, window)
                    if request.frame_path is not None else
                    _layer_frames(request.layer_data, request.index, window, request.layer_name))
                return preview_window(frames, model, request.settings, index=position,
                                      correction=correction), model
            if request.frame_path is not None:
                frame = read_frame(request.frame_path, request.index)
            else:
                frame = _layer_frame(request.layer_data, request.index, request.layer_name)
            return preview_frame(frame, model, request.settings, correction=correction), model
        except VolreconError as exc:
            return _Failure(str(exc))

    def start(self, _value: Any = None) -> Any:
        """Start a preview with the current settings; returns the worker (None on bad input)."""
        try:
            request = self._request()
        except VolreconError as exc:
            self._message.value = str(exc)
            return None
        self._run.enabled = False
        self._message.value = f"reconstructing ({_label(request.settings)}) …"
        return self.job.start(self._compute, request, on_result=self._show,
                              on_finished=self._done)

    def _done(self) -> None:
        self._run.enabled = True

    def _show(self, outcome: tuple[PreviewResult, PSFModel] | _Failure) -> None:
        if isinstance(outcome, _Failure):
            self._message.value = outcome.message
            return
        result, model = outcome
        self._count += 1
        n = self._count
        g = model.geometry
        high = float(result.volume_zyx.max()) or 1.0
        spread = float(np.abs(result.residual_yx).max()) or 1.0
        info = result.info
        label = _label(result.settings)
        metadata = {"volrecon_preview": {"settings": label,
                                         "iterations": info.iterations,
                                         "residual": info.residual,
                                         "objective": info.objective,
                                         "seconds": info.seconds}}
        for layer in self._own:
            if layer in self._viewer.layers:
                layer.visible = bool(self._grid.value)
        volume = self._viewer.add_image(
            result.volume_zyx, name=f"preview {n}: {label}",
            scale=(g.depth_step_um, g.pixel_size_um, g.pixel_size_um),
            translate=(g.depth_start_um, 0.0, 0.0), axis_labels=("z", "y", "x"),
            units=("micrometer",) * 3, contrast_limits=(0.0, high), colormap=VOLUME_COLORMAP,
            blending="additive", metadata=metadata)
        residual = self._viewer.add_image(
            result.residual_yx, name=f"preview {n} residual",
            scale=(g.pixel_size_um, g.pixel_size_um), axis_labels=("y", "x"),
            units=("micrometer",) * 2, contrast_limits=(-spread, spread), colormap="PiYG",
            visible=bool(self._grid.value), metadata=metadata)
        self._own += [volume, residual]
        if self._grid.value:
            self._viewer.grid.enabled = True
        self._message.value = (f"preview {n}: {info.iterations} iterations, residual "
                               f"{info.residual:.3g}, {info.seconds:.2f} s")

"""The job monitor dock widget: progress, time left and per-frame diagnostics of a store."""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from magicgui.types import FileDialogMode
from magicgui.widgets import CheckBox, Container, FileEdit, FloatSpinBox, Label, PushButton
from magicgui.widgets.bases import Widget

from volrecon.errors import VolreconError
from volrecon.napari._plot import PlotCanvas
from volrecon.napari._widget_tools import BackgroundJob, chosen_path
from volrecon.napari.monitoring import JobSnapshot, plot_series, read_job_snapshot

if TYPE_CHECKING:
    import napari

__all__ = ["JobMonitorWidget"]


def _read(path: Path) -> JobSnapshot | str:
    """Runs in the worker thread: a snapshot, or the message of a user error."""
    try:
        return read_job_snapshot(path)
    except VolreconError as exc:
        return str(exc)


class JobMonitorWidget(Container[Widget]):
    """Follow a job's output store: frames done and failed, time left, diagnostics plots.

    The store is read every few seconds (a Qt timer) in a worker thread; a run writing it is
    never disturbed. When new frames are finished, the viewer's layers of that store are
    re-read so their volumes appear.

    Parameters
    ----------
    napari_viewer : napari.viewer.Viewer
        The viewer; the first output store opened in it is chosen by default.
    """

    def __init__(self, napari_viewer: napari.viewer.Viewer) -> None:
        from qtpy.QtCore import QTimer

        self._viewer = napari_viewer
        self._store = FileEdit(label="output store", mode=FileDialogMode.EXISTING_DIRECTORY)
        self._interval = FloatSpinBox(label="refresh every (s)", min=0.2, max=3600.0,
                                      value=2.0, step=0.5)
        self._follow = CheckBox(text="refresh automatically", value=True)
        self._reload_layers = CheckBox(text="show new frames in the viewer", value=True)
        self._refresh_button = PushButton(text="Refresh now")
        self._summary = Label(value="choose a job's output store")
        super().__init__(widgets=[self._store, self._interval, self._follow,
                                  self._reload_layers, self._refresh_button, self._summary])
        self._plot = PlotCanvas(rows=2, height_in=1.6)
        self.native.layout().addWidget(self._plot.widget)
        self._timer = QTimer(self.native)
        self._timer.timeout.connect(self.refresh)
        self._store.changed.connect(self._store_changed)
        self._interval.changed.connect(self._restart_timer)
        self._follow.changed.connect(self._restart_timer)
        self._refresh_button.changed.connect(self.refresh)
        self._viewer.layers.events.inserted.connect(self._offer_layer_store)
        self.job = BackgroundJob(self.native)
        self.snapshot: JobSnapshot | None = None
        self._done_shown = -1
        self._offer_layer_store()

    # ----------------------------------------------------------------------------- inputs
    def _store_path(self) -> Path | None:
        return chosen_path(self._store)

    def _offer_layer_store(self, _event: Any = None) -> None:
        """Choose the first output store opened in the viewer if none is chosen yet."""
        if self._store_path() is not None:
            return
        for layer in self._viewer.layers:
            if layer.metadata.get("volrecon_kind") == "output":
                self._store.value = layer.metadata["volrecon_store"]
                return

    def _store_changed(self, _value: Any = None) -> None:
        self._done_shown = -1
        self.refresh()
        self._restart_timer()

    def _restart_timer(self, _value: Any = None) -> None:
        self._timer.stop()
        if self._follow.value and self._store_path() is not None:
            self._timer.start(int(self._interval.value * 1000))

    # ------------------------------------------------------------------------------ work
    def refresh(self, _value: Any = None) -> Any:
        """Read the store now in a worker thread; returns it (None while a read is running)."""
        path = self._store_path()
        if path is None or self.job.busy:
            return None
        return self.job.start(_read, path, on_result=self._show)

    def _show(self, outcome: JobSnapshot | str) -> None:
        if isinstance(outcome, str):
            self._summary.value = outcome
            return
        self.snapshot = outcome
        self._summary.value = "\n".join(outcome.summary())
        self._draw(outcome)
        if self._reload_layers.value and outcome.status.done != self._done_shown:
            if self._done_shown >= 0:
                self._reread_layers(outcome.path)
            self._done_shown = outcome.status.done

    def _draw(self, snapshot: JobSnapshot) -> None:
        plot = self._plot
        plot.clear()
        if not snapshot.diagnostics:
            plot.draw()
            return
        for ax, (name, label) in zip(plot.axes, (("iterations", "iterations"),
                                                 ("residual", "residual |Av−b|/|b|")),
                                     strict=True):
            frames, values, failed, _ = plot_series(snapshot.diagnostics, name)
            ax.plot(frames, values, ".", markersize=3, color="#f6a93b")
            if failed.size:
                low = np.nanmin(values) if values.size else 0.0
                ax.plot(failed, np.full(failed.shape, low), "x", color="#e5484d",
                        label="failed")
                ax.legend(fontsize=7, loc="upper right")
            ax.set_ylabel(label, fontsize=8)
            ax.set_xlim(-0.5, snapshot.status.total - 0.5)
        residual = snapshot.diagnostics["residual"]
        positive = residual[np.isfinite(residual) & (residual > 0)]
        if positive.size and positive.max() > 10 * positive.min():  # spans a decade or more
            plot.axes[1].set_yscale("log")
        plot.axes[-1].set_xlabel("frame", fontsize=8)
        plot.draw()

    def _reread_layers(self, path: Path) -> None:
        """Give this store's layers fresh dask arrays, so no cached empty chunk is shown."""
        from volrecon.napari.stores import output_store_layers

        target = os.fspath(path.resolve())
        layers = [layer for layer in self._viewer.layers
                  if layer.metadata.get("volrecon_store") == target
                  and str(layer.metadata.get("volrecon_kind", "")).startswith(("output",
                                                                              "projection"))]
        if not layers:
            return
        fresh = {kwargs["metadata"]["volrecon_kind"]: data
                 for data, kwargs, _ in output_store_layers(path)}
        for layer in layers:
            data = fresh.get(layer.metadata["volrecon_kind"])
            if data is not None:
                layer.data = data

    def close_timer(self) -> None:
        """Stop refreshing (also done when the widget is closed)."""
        self._timer.stop()

"""Open stores in a new napari viewer (what ``volrecon view`` runs)."""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import TYPE_CHECKING

from volrecon.errors import ConfigError, InputFileError
from volrecon.napari.stores import store_kind

if TYPE_CHECKING:
    import napari

__all__ = ["open_viewer", "view"]

#: Display names of the dock widgets in napari.yaml.
MONITOR_WIDGET = "Job monitor"


def _check(paths: Sequence[str | os.PathLike[str]]) -> list[str]:
    checked = []
    for path in paths:
        text = os.fspath(path).rstrip("/\\") or os.fspath(path)
        if not os.path.isdir(text):
            raise InputFileError(f"{text}: no such store folder; give a job's [output] path "
                                 "(volumes.zarr) or a PSF model store")
        if store_kind(text) is None:
            raise InputFileError(
                f"{text}: not a volrecon output store or PSF model store (no 'volrecon' or "
                "'volrecon_model' attribute in zarr.json); give a job's [output] path or a "
                "model store")
        checked.append(text)
    return checked


def _check_display() -> None:
    """Refuse before Qt starts (and aborts the process) when no window can be shown."""
    import sys

    platform = os.environ.get("QT_QPA_PLATFORM", "")
    if sys.platform.startswith("linux") and not platform and not (
            os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        raise ConfigError(
            "volrecon view needs a display: none is set (DISPLAY / WAYLAND_DISPLAY); run it "
            "on a desktop, through 'ssh -X', or under xvfb-run; 'volrecon export' and "
            "'volrecon status' work without one")


def open_viewer(paths: Sequence[str | os.PathLike[str]], *, monitor: bool = False,
                show: bool = True, viewer: napari.Viewer | None = None) -> napari.Viewer:
    """A viewer (new unless given) with each store opened by the volrecon reader.

    Parameters
    ----------
    paths : sequence of str or path
        Output stores and/or PSF model stores.
    monitor : bool
        Also dock the job monitor (on the first output store).
    show : bool
        Show the window of a new viewer.
    viewer : napari.Viewer, optional
        Open the stores in this viewer instead of a new one.

    Raises
    ------
    InputFileError
        If a path is not a volrecon store (checked before napari starts).
    """
    checked = _check(paths)
    if viewer is None:
        import napari

        title = f"volrecon: {', '.join(os.path.basename(p) for p in checked)}"
        viewer = napari.Viewer(title=title, show=show)
    for path in checked:
        viewer.open(path, plugin="volrecon")
    if monitor:
        viewer.window.add_plugin_dock_widget("volrecon", MONITOR_WIDGET)
    return viewer


def view(paths: Sequence[str | os.PathLike[str]], *, monitor: bool = False) -> int:
    """Open `paths` in napari and run its event loop until the window closes; returns 0.

    Raises
    ------
    InputFileError
        If a path is not a volrecon store.
    ConfigError
        If napari is not installed, or there is no display to show a window on.
    """
    checked = _check(paths)
    _check_display()
    try:
        import napari
    except ImportError as exc:
        raise ConfigError(f"the viewer needs napari ({exc}); install it with "
                          "pip install 'volrecon[napari]'") from exc
    open_viewer(checked, monitor=monitor)
    napari.run()
    return 0

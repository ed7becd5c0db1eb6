"""A small matplotlib canvas for the widgets (Qt; no pyplot, so no global figure state)."""

from __future__ import annotations

from typing import Any

__all__ = ["PlotCanvas"]

#: Colours close to napari's dark theme, so the plot does not glare in the dock.
_BACKGROUND = "#262930"
_FOREGROUND = "#d1d2d4"


class PlotCanvas:
    """A figure with `rows` stacked axes sharing x, drawn in a Qt widget.

    Attributes
    ----------
    widget : QWidget
        The canvas, to add to a layout.
    axes : list of matplotlib Axes
    """

    def __init__(self, rows: int = 1, *, height_in: float = 2.5) -> None:
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
        from matplotlib.figure import Figure

        figure = Figure(figsize=(4.0, height_in * rows), layout="constrained",
                        facecolor=_BACKGROUND)
        self.figure = figure
        self.axes = list(figure.subplots(rows, 1, sharex=True, squeeze=False)[:, 0])
        for ax in self.axes:
            self._style(ax)
        self.widget = FigureCanvasQTAgg(figure)  # type: ignore[no-untyped-call]
        self.widget.setMinimumHeight(int(120 * rows))

    @staticmethod
    def _style(ax: Any) -> None:
        ax.set_facecolor(_BACKGROUND)
        for spine in ax.spines.values():
            spine.set_color(_FOREGROUND)
        ax.tick_params(colors=_FOREGROUND, labelsize=8)
        ax.xaxis.label.set_color(_FOREGROUND)
        ax.yaxis.label.set_color(_FOREGROUND)
        ax.title.set_color(_FOREGROUND)

    def clear(self) -> None:
        """Empty every axis (keeping the style)."""
        for ax in self.axes:
            ax.clear()
            self._style(ax)

    def draw(self) -> None:
        """Redraw when Qt is next idle."""
        self.widget.draw_idle()  # type: ignore[no-untyped-call]

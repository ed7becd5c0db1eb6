"""The volrecon napari plugin (npe2): reader, preview, job monitor, time traces, sample data.

The manifest is ``napari.yaml`` beside this file. The plain modules hold the logic and import
neither napari nor Qt (:mod:`~volrecon.napari.stores`, :mod:`~volrecon.napari.traces`,
:mod:`~volrecon.napari.monitoring`, :mod:`~volrecon.napari.preview`,
:mod:`~volrecon.napari.sample`); the ``*_widget`` modules are the Qt dock widgets. Importing
this package imports nothing else.
"""

__all__: list[str] = []

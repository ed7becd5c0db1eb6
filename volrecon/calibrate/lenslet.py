"""Calibration of a lenslet-array scan: a bead stepped through N × N sub-positions and depth."""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from volrecon.calibrate.calibration import _check_options
from volrecon.calibrate.cleaning import clean_psf_stack, normalization_option
from volrecon.errors import DataError, ShapeError, VolreconError
from volrecon.models.periodic import LensletPSF

__all__ = ["calibrate_lenslet_file", "calibrate_lenslet_stack"]


def calibrate_lenslet_stack(
    scan: Any,
    *,
    lenslet_pitch: int,
    depth_step_um: float,
    pixel_size_um: float,
    depth_start_um: float = 0.0,
    dark: Any = None,
    hot_pixel_sigma: float | None = 6.0,
    support_sigma: float | None = 3.0,
    normalization: str = "stack",
    dtype: Any = np.float32,
    source: str | None = None,
) -> LensletPSF:
    """Clean a (Z, N, N, Y, X) bead scan into a periodically shift-variant PSF model.

    Parameters
    ----------
    scan : ndarray of shape (Z, N, N, Y, X)
        Raw camera images: ``scan[z, i, j]`` with the bead at depth ``z`` and sub-position
        ``(y0 + i, x0 + j)`` of the lenslet block holding the sensor centre
        (``y0 = N·((Y//2)//N)``, ``x0 = N·((X//2)//N)``). Any real dtype; not modified.
    lenslet_pitch : int
        Lenslet pitch ``N`` in sensor pixels; must equal the scan's second and third axes.
    depth_step_um, pixel_size_um : float
        Depth between planes and pixel pitch in the sample plane, micrometres (> 0).
    depth_start_um : float
        Depth of the first plane, micrometres.
    dark : ndarray of shape (Y, X) or (M, Y, X), optional
        Camera offset frame(s); default: each image's border median is subtracted.
    hot_pixel_sigma, support_sigma : float or None
        As for :func:`~volrecon.calibrate.clean_psf_stack`.
    normalization : {"stack", "planes", "none"}
        "stack" (default): every sub-position's depth stack is cleaned like a single scan
        and all keep their light relative to the brightest image of the whole scan, so the
        model keeps how much light each depth and sub-position delivers. "planes": every
        image sums to 1. "none": camera counts.
    dtype : {float32, float64}
        Model precision.
    source : str, optional
        Name of the input file, recorded in the model's metadata.

    Returns
    -------
    LensletPSF
        Its ``calibration`` holds, per sub-position ``i·N + j`` and plane, the subtracted
        offset, the light before normalisation and the relative throughput.

    Raises
    ------
    ShapeError
        If the scan is not (Z, N, N, Y, X) with ``N = lenslet_pitch``.
    DataError
        If a sub-position's stack holds NaN/Inf or an empty plane (the message names it).
    ConfigError
        If an option is out of range.

    Notes
    -----
    Each sub-position's stack goes through :func:`~volrecon.calibrate.clean_psf_stack`
    (offset, hot pixels, background mask, clip). No registration: the bead's sub-positions
    are the model's sampling, and moving an image would mix them. No binning or cropping,
    which would change the pitch or move the lattice origin.

    Examples
    --------
    >>> import numpy as np
    >>> scan = np.full((2, 2, 2, 16, 16), 100.0)
    >>> scan[:, :, :, 7:10, 7:10] += 400.0
    >>> model = calibrate_lenslet_stack(scan, lenslet_pitch=2, depth_step_um=2.0,
    ...                                 pixel_size_um=0.5, support_sigma=None)
    >>> model.kind, model.lenslet_pitch, model.shape_in
    ('lenslet', 2, (2, 16, 16))
    """
    geometry = _check_options(depth_step_um, pixel_size_um, depth_start_um, 1, None, 0.999,
                              None)
    normalization = normalization_option(normalization, None)
    raw = np.asarray(scan)
    n = lenslet_pitch
    if (isinstance(n, bool) or not isinstance(n, int | np.integer) or raw.ndim != 5
            or raw.shape[1:3] != (n, n)):
        raise ShapeError(f"--lenslet-pitch {n} needs a bead scan of shape (Z, {n}, {n}, Y, X) "
                         f"(depth, sub-position y, sub-position x, sensor); got {raw.shape}")
    nz, _, _, ny, nx = raw.shape
    cleaned = []
    for i in range(n):
        for j in range(n):
            try:
                cleaned.append(clean_psf_stack(raw[:, i, j], dark_yx=dark,
                                               hot_pixel_sigma=hot_pixel_sigma,
                                               support_sigma=support_sigma,
                                               normalization=normalization))
            except (DataError, ShapeError) as exc:
                raise type(exc)(f"sub-position ({i}, {j}): {exc}") from exc
    sums = np.stack([c.plane_sums for c in cleaned])  # (N², Z)
    psf = np.stack([c.psf_zyx for c in cleaned]).reshape(n, n, nz, ny, nx)
    if normalization == "stack":
        # Each stack was scaled to its own brightest plane; keep the sub-positions' relative
        # light too, relative to the brightest image of all.
        psf = psf * (sums.max(axis=1) / sums.max()).reshape(n, n, 1, 1, 1).astype(np.float32)
    calibration = {
        "source": source,
        "model_kind": LensletPSF.kind,
        "shape_zyx": [nz, ny, nx],
        "depth_step_um": geometry.depth_step_um,
        "pixel_size_um": geometry.pixel_size_um,
        "depth_start_um": geometry.depth_start_um,
        "offset_source": "dark frame" if dark is not None else "border estimate",
        "background": np.stack([c.background for c in cleaned]).tolist(),
        "hot_pixels": int(sum(c.hot_pixels for c in cleaned)),
        "support_fraction": float(np.mean([c.support_fraction for c in cleaned])),
        "plane_sums": sums.tolist(),
        "throughput": (sums / sums.max()).tolist(),
        "normalization": normalization,
    }
    return LensletPSF(np.ascontiguousarray(psf.transpose(2, 0, 1, 3, 4)), geometry,
                      dtype=dtype, calibration=calibration)


def calibrate_lenslet_file(
    stack_path: str | os.PathLike[str],
    out: str | os.PathLike[str],
    *,
    lenslet_pitch: int,
    depth_step_um: float,
    pixel_size_um: float,
    dark_path: str | os.PathLike[str] | None = None,
    report_dir: str | os.PathLike[str] | None = None,
    **options: Any,
) -> LensletPSF:
    """Calibrate a (Z, N, N, Y, X) bead-scan TIFF; write the model store at `out` and its
    report (:func:`~volrecon.calibrate.lenslet_report.lenslet_report`: ``summary.txt`` and
    ``report.json``, the depth discrimination of every sub-position).

    Parameters
    ----------
    stack_path : path-like
        TIFF whose first series has shape (Z, N, N, Y, X).
    out : path-like
        Model store to write; an existing model store there is replaced, anything else is
        refused.
    lenslet_pitch, depth_step_um, pixel_size_um
        As for :func:`calibrate_lenslet_stack`.
    dark_path : path-like, optional
        TIFF of the camera offset: one frame (Y, X) or several (M, Y, X), averaged.
    report_dir : path-like, optional
        Report folder; default ``NAME.report`` beside `out`
        (:func:`~volrecon.calibrate.default_report_dir`).
    **options
        Any other keyword of :func:`calibrate_lenslet_stack`.

    Returns
    -------
    LensletPSF

    Raises
    ------
    ModelStoreError
        If `out` exists and is not a model store, or the report folder exists and is not
        a calibration report.
    VolreconError
        What reading or :func:`calibrate_lenslet_stack` raises, with the file named.
    """
    from volrecon.calibrate.calibration import output_paths
    from volrecon.calibrate.lenslet_report import lenslet_report
    from volrecon.io.files import replacing
    from volrecon.io.tiff import read_tiff_stack
    from volrecon.models.store import save_model

    out_path, report_path = output_paths(out, report_dir)
    scan = read_tiff_stack(stack_path, what="bead scan")
    dark = None if dark_path is None else read_tiff_stack(dark_path, what="dark frame")
    try:
        model = calibrate_lenslet_stack(scan, lenslet_pitch=lenslet_pitch,
                                        depth_step_um=depth_step_um,
                                        pixel_size_um=pixel_size_um, dark=dark,
                                        source=str(stack_path), **options)
    except VolreconError as exc:
        where = dark_path if ("dark frame" in str(exc) and dark_path is not None) else stack_path
        raise type(exc)(f"{where}: {exc}") from exc
    with replacing(report_path) as staging:
        lenslet_report(model).write(staging)
        save_model(model, out_path)
    return model

"""A complete synthetic experiment on disk: fluorescent beads and a fibre drifting in a gel.

:func:`write_hydrogel_scenario` writes what a lab would have after a session at a
single-shot 3-D microscope, plus the truth that only a simulation has;
:func:`write_lenslet_scenario` the same scene seen by a light-field microscope with its
microlens array at the image plane (there the bead scan and ``truth_psf`` are
(Z, N, N, Y, X): the bead stepped through the ``N × N`` sub-positions of a lenslet):

============================  ===========================================================
``psf_scan.tif``              measured bead scan through depth, (Z, Y, X) uint16, "ZYX"
``dark.tif``                  shutter-closed exposures, (N, Y, X) uint16, "TYX"
``video.tif``                 the recording, (T, Y, X) uint16, "TYX"
``truth_volumes.npy``         photons emitted per voxel per frame, (T, Z, Y, X) float32
``truth_positions.npy``       bead centres per frame, (T, N, 3) voxels (z, y, x), float64
``truth_photons.npy``         photons per bead per frame, (N,) float64
``truth_psf.npy``             noise-free centred PSF stack used to render, (Z, Y, X) float32
``truth_frames_photons.npy``  noise-free mean photons per pixel, (T, Y, X) float32
``scenario.json``             every parameter and file name (read with read_scenario)
============================  ===========================================================
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import ConfigError, InputFileError
from volrecon.simulate.camera import Camera
from volrecon.simulate.design import MicroscopeDesign
from volrecon.simulate.lenslet import LensletDesign, lenslet_psf_stack
from volrecon.simulate.recording import (
    expected_photons,
    record_bead_scan,
    write_tiff,
)
from volrecon.simulate.scenes import Scene, bead_scene, filament_scene

if TYPE_CHECKING:
    from volrecon._typing import RNGLike

__all__ = ["Scenario", "read_scenario", "write_hydrogel_scenario", "write_lenslet_scenario"]

_MANIFEST = "scenario.json"
_FORMAT = "volrecon-scenario/1"
_FILES = {
    "psf_scan": "psf_scan.tif",
    "dark": "dark.tif",
    "video": "video.tif",
    "truth_volumes": "truth_volumes.npy",
    "truth_positions": "truth_positions.npy",
    "truth_photons": "truth_photons.npy",
    "truth_psf": "truth_psf.npy",
    "truth_frames_photons": "truth_frames_photons.npy",
}


@dataclass(frozen=True)
class Scenario:
    """Files and parameters of a synthetic experiment written by :func:`write_hydrogel_scenario`.

    Attributes
    ----------
    directory : Path
        Where the files are.
    files : dict of str to Path
        Absolute path of each file by role (keys as in the module table, plus "manifest").
    design : MicroscopeDesign or LensletDesign
        The simulated instrument: a pupil-plane element, or a lenslet array at the image
        plane (then the bead scan is (Z, N, N, Y, X), see :func:`write_lenslet_scenario`).
    camera : Camera
        The camera of the video and dark frames.
    psf_scan_camera : Camera
        The same camera with the bead scan's exposure time.
    shape_zyx : tuple of int
        Model grid (Z, Y, X): the sensor grid times the depth planes.
    n_frames : int
        Frames in the video.
    depth_step_um, depth_start_um : float
        Axial sampling of the planes (sample side), micrometres.
    pixel_size_um : float
        Lateral voxel size in the sample, micrometres.
    sensor_pixel_size_um : float
        Sensor pixel pitch, micrometres.
    frame_interval_s : float
        Time between frames, seconds.
    n_beads : int
        Number of beads.
    bead_offset_yx_um : tuple of float
        Where the calibration bead sat off the axis during the scan, micrometres (zero for
        the lenslet scan, which steps the bead through known sub-positions).
    background_photons : float
        Uniform background per pixel per video frame.
    seed : int or None
        The integer seed the scenario was made from, when one was given.
    """

    directory: Path
    files: dict[str, Path]
    design: MicroscopeDesign | LensletDesign
    camera: Camera
    psf_scan_camera: Camera
    shape_zyx: tuple[int, int, int]
    n_frames: int
    depth_step_um: float
    depth_start_um: float
    pixel_size_um: float
    sensor_pixel_size_um: float
    frame_interval_s: float
    n_beads: int
    bead_offset_yx_um: tuple[float, float]
    background_photons: float
    seed: int | None

    def to_json(self) -> dict[str, Any]:
        """The manifest written next to the files (paths relative to the directory)."""
        return {
            "format": _FORMAT,
            "files": {k: p.name for k, p in self.files.items() if k != "manifest"},
            "instrument": "lenslet" if isinstance(self.design, LensletDesign) else "pupil",
            "design": dataclasses.asdict(self.design),
            "camera": dataclasses.asdict(self.camera),
            "psf_scan_camera": dataclasses.asdict(self.psf_scan_camera),
            "shape_zyx": list(self.shape_zyx),
            "n_frames": self.n_frames,
            "depth_step_um": self.depth_step_um,
            "depth_start_um": self.depth_start_um,
            "pixel_size_um": self.pixel_size_um,
            "sensor_pixel_size_um": self.sensor_pixel_size_um,
            "frame_interval_s": self.frame_interval_s,
            "n_beads": self.n_beads,
            "bead_offset_yx_um": list(self.bead_offset_yx_um),
            "background_photons": self.background_photons,
            "seed": self.seed,
            "axes": {"psf_scan": "ZYX", "dark": "TYX", "video": "TYX",
                     "truth_volumes": "TZYX", "truth_positions": "TNC (c = z, y, x voxels)"},
        }


def write_hydrogel_scenario(directory: str | os.PathLike[str], *, rng: RNGLike = 0,
                            design: MicroscopeDesign | None = None,
                            camera: Camera | None = None, n_frames: int = 40,
                            n_planes: int = 16, depth_step_um: float = 2.0, n_beads: int = 24,
                            bead_photons: float = 2e6, filament_photons_per_um: float = 2e5,
                            background_photons: float = 2.0, frame_interval_s: float = 0.05,
                            drift_zyx_um_per_s: tuple[float, float, float] = (0.4, 1.6, -1.2),
                            psf_scan_exposure_s: float = 0.2, psf_scan_photons: float = 1e8,
                            dark_frames: int = 20, workers: int | None = None) -> Scenario:
    """Simulate beads and a fibre drifting in a hydrogel and write a session's files.

    Parameters
    ----------
    directory : str or path-like
        Output folder (created; existing files of the same names are overwritten).
    rng : numpy Generator, int or None
        Source of everything random (scene, motion, noise, scan offset).
    design : MicroscopeDesign, optional
        The instrument. Default: ``MicroscopeDesign()`` (diffuser, 128 × 128 sensor).
    camera : Camera, optional
        The camera. Default: an sCMOS-like ``Camera`` with a few hot pixels.
    n_frames : int
        Video length T.
    n_planes, depth_step_um : int, float
        Depth planes of the model and the bead scan, centred on the focal plane.
    n_beads : int
        Beads in the gel.
    bead_photons : float
        Mean photons a bead emits per video frame.
    filament_photons_per_um : float
        Photons the fibre emits per frame per micrometre of its length.
    background_photons : float
        Uniform background per pixel per video frame.
    frame_interval_s : float
        Time between frames, seconds.
    drift_zyx_um_per_s : tuple of float
        Drift of the gel on the stage, micrometres per second.
    psf_scan_exposure_s, psf_scan_photons : float
        Exposure of each bead-scan step and the photons the bead emits in it.
    dark_frames : int
        Number of dark exposures.
    workers : int, optional
        FFT threads. Default: every available core.

    Returns
    -------
    Scenario
        The files written and every parameter; also saved as ``scenario.json``.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     s = write_hydrogel_scenario(folder, n_frames=4, n_planes=4)
    ...     sorted(s.files)[:3], s.shape_zyx
    (['dark', 'manifest', 'psf_scan'], (4, 128, 128))
    """
    design = design or MicroscopeDesign()
    camera = camera or Camera(hot_pixel_fraction=5e-4, hot_pixel_seed=11)
    for name, value in (("frame_interval_s", frame_interval_s),
                        ("psf_scan_exposure_s", psf_scan_exposure_s),
                        ("psf_scan_photons", psf_scan_photons)):
        if not (math.isfinite(value) and value > 0):
            raise ConfigError(f"{name} must be positive; got {value!r}")
    seed = int(rng) if isinstance(rng, int | np.integer) else None
    scene_rng, motion_rng, video_rng, scan_rng, dark_rng = np.random.default_rng(rng).spawn(5)
    folder = Path(directory)
    folder.mkdir(parents=True, exist_ok=True)
    files = {role: (folder / name).resolve() for role, name in _FILES.items()}
    files["manifest"] = (folder / _MANIFEST).resolve()

    depths = design.depths_um(n_planes, depth_step_um)
    truth_stack = design.psf_stack(depths, workers=workers)
    model = truth_stack.to_model()
    pixel = design.sample_pixel_size_um
    shape = (n_planes, *design.shape_yx)

    scene = _gel_scene(shape, n_frames, depth_step_um=depth_step_um, pixel_size_um=pixel,
                       n_beads=n_beads, bead_photons=bead_photons,
                       filament_photons_per_um=filament_photons_per_um,
                       frame_interval_s=frame_interval_s,
                       drift_zyx_um_per_s=drift_zyx_um_per_s, rngs=(scene_rng, motion_rng))

    photons = expected_photons(scene.volumes_tzyx, model, background_photons=background_photons)
    video = camera.expose(photons, rng=video_rng)
    shift = scan_rng.uniform(-3.0, 3.0, size=2) * pixel
    offset = (float(shift[0]), float(shift[1]))
    scan_camera = dataclasses.replace(camera, exposure_s=psf_scan_exposure_s)
    scan_stack = design.psf_stack(depths, lateral_offset_yx_um=offset, workers=workers)
    scan = record_bead_scan(scan_stack.psf_zyx, scan_camera, bead_photons=psf_scan_photons,
                            background_photons=background_photons * psf_scan_exposure_s
                            / camera.exposure_s, rng=scan_rng)
    dark = camera.dark_frames(design.shape_yx, dark_frames, rng=dark_rng)

    return _write_files(
        folder, files, design=design, camera=camera, scan_camera=scan_camera, shape=shape,
        scan=scan, scan_axes="ZYX", scan_metadata={}, dark=dark, video=video, scene=scene,
        truth_psf=truth_stack.psf_zyx, photons=photons, n_frames=n_frames,
        depth_step_um=depth_step_um,
        depths=depths, pixel=pixel, frame_interval_s=frame_interval_s,
        psf_scan_exposure_s=psf_scan_exposure_s, n_beads=n_beads, offset=offset,
        background_photons=background_photons, seed=seed)


def _gel_scene(shape: tuple[int, int, int], n_frames: int, *, depth_step_um: float,
               pixel_size_um: float, n_beads: int, bead_photons: float,
               filament_photons_per_um: float, frame_interval_s: float,
               drift_zyx_um_per_s: tuple[float, float, float],
               rngs: tuple[np.random.Generator, np.random.Generator],
               lateral_margin_voxels: float = 10.0) -> Scene:
    """Beads and a fibre drifting together, in voxels (um/s -> voxels per frame)."""
    voxel_um = np.array([depth_step_um, pixel_size_um, pixel_size_um])
    drift = tuple(np.asarray(drift_zyx_um_per_s) * frame_interval_s / voxel_um)
    margin = (min(0.5, (shape[0] - 1) / 2.0),
              lateral_margin_voxels + abs(float(drift[1])) * n_frames,
              lateral_margin_voxels + abs(float(drift[2])) * n_frames)
    beads = bead_scene(shape, n_frames, n_beads=n_beads, photons=bead_photons,
                       margin_voxels=margin, drift_zyx_per_frame=drift,
                       wobble_voxels=(0.1, 0.3, 0.3), wobble_period_frames=25.0,
                       rng=rngs[0])
    fibre = filament_scene(shape, n_frames,
                           photons_per_voxel=filament_photons_per_um * pixel_size_um,
                           drift_zyx_per_frame=drift, rng=rngs[1])
    return beads + fibre


def write_lenslet_scenario(directory: str | os.PathLike[str], *, rng: RNGLike = 0,
                           design: LensletDesign | None = None, camera: Camera | None = None,
                           n_frames: int = 40, n_planes: int = 8, depth_step_um: float = 1.5,
                           n_beads: int = 12, bead_photons: float = 2e6,
                           filament_photons_per_um: float = 1e6,
                           background_photons: float = 2.0, frame_interval_s: float = 0.05,
                           drift_zyx_um_per_s: tuple[float, float, float] = (0.2, 0.4, -0.3),
                           psf_scan_exposure_s: float = 0.2,
                           psf_scan_photons: float | None = None, dark_frames: int = 20,
                           workers: int | None = None) -> Scenario:
    """Simulate beads and a fibre in a hydrogel seen through a lenslet array at the image plane.

    The same files as :func:`write_hydrogel_scenario`, but the bead scan ``psf_scan.tif``
    is (Z, N, N, Y, X), axes "ZIJYX": a bead stepped through the ``N × N`` voxels of the
    lenslet holding the sensor centre at every depth (what ``volrecon calibrate
    --lenslet-pitch N`` reads), and ``truth_psf.npy`` is the noise-free stack of that shape.

    Parameters
    ----------
    directory : str or path-like
        Output folder (created; files of the same names are overwritten).
    rng : numpy Generator, int or None
        Source of everything random (scene, motion, noise).
    design : LensletDesign, optional
        The instrument. Default: ``LensletDesign()`` (60 × 60 sensor, 5 pixels per lenslet).
    camera : Camera, optional
        The camera. Default: an sCMOS-like ``Camera`` with a few hot pixels.
    n_frames, n_planes, depth_step_um, n_beads, bead_photons, filament_photons_per_um
        As for :func:`write_hydrogel_scenario` (defaults: 8 planes 1.5 µm apart, 12 beads).
    background_photons, frame_interval_s, drift_zyx_um_per_s
        As for :func:`write_hydrogel_scenario`.
    psf_scan_exposure_s, dark_frames, workers
        As for :func:`write_hydrogel_scenario`.
    psf_scan_photons : float, optional
        Photons the bead emits per scan exposure. Default: what fills the brightest scan
        pixel to half the camera's full well (a lenslet focuses a bead's light onto a few
        pixels, so a fixed brightness would saturate them).

    Returns
    -------
    Scenario
        Its ``design`` is the :class:`~volrecon.simulate.lenslet.LensletDesign`.
    """
    design = design or LensletDesign()
    camera = camera or Camera(hot_pixel_fraction=5e-4, hot_pixel_seed=11)
    for name, value in (("frame_interval_s", frame_interval_s),
                        ("psf_scan_exposure_s", psf_scan_exposure_s),
                        ("psf_scan_photons", 1.0 if psf_scan_photons is None
                         else psf_scan_photons)):
        if not (math.isfinite(value) and value > 0):
            raise ConfigError(f"{name} must be positive; got {value!r}")
    seed = int(rng) if isinstance(rng, int | np.integer) else None
    scene_rng, motion_rng, video_rng, scan_rng, dark_rng = np.random.default_rng(rng).spawn(5)
    folder = Path(directory)
    folder.mkdir(parents=True, exist_ok=True)
    files = {role: (folder / name).resolve() for role, name in _FILES.items()}
    files["manifest"] = (folder / _MANIFEST).resolve()

    depths = design.depths_um(n_planes, depth_step_um)
    truth_stack = lenslet_psf_stack(design, depths, workers=workers)
    if psf_scan_photons is None:
        well = camera.full_well_electrons or 2.0**camera.bit_depth / camera.gain_adu_per_electron
        psf_scan_photons = 0.5 * well / (camera.quantum_efficiency * float(truth_stack.psf.max()))
    model = truth_stack.to_model()
    pixel = design.sample_pixel_size_um
    shape = (n_planes, *design.shape_yx)
    scene = _gel_scene(shape, n_frames, depth_step_um=depth_step_um, pixel_size_um=pixel,
                       n_beads=n_beads, bead_photons=bead_photons,
                       filament_photons_per_um=filament_photons_per_um,
                       frame_interval_s=frame_interval_s,
                       drift_zyx_um_per_s=drift_zyx_um_per_s, rngs=(scene_rng, motion_rng),
                       lateral_margin_voxels=2.0 * design.lenslet_pitch)
    photons = expected_photons(scene.volumes_tzyx, model, background_photons=background_photons)
    video = camera.expose(photons, rng=video_rng)
    scan_camera = dataclasses.replace(camera, exposure_s=psf_scan_exposure_s)
    scan_background = background_photons * psf_scan_exposure_s / camera.exposure_s
    scan = scan_camera.expose(truth_stack.psf.astype(np.float64) * psf_scan_photons
                              + scan_background, rng=scan_rng)
    dark = camera.dark_frames(design.shape_yx, dark_frames, rng=dark_rng)

    return _write_files(
        folder, files, design=design, camera=camera, scan_camera=scan_camera, shape=shape,
        scan=scan, scan_axes="ZIJYX", scan_metadata={"lenslet_pitch": design.lenslet_pitch},
        dark=dark, video=video, scene=scene, truth_psf=truth_stack.psf, photons=photons,
        n_frames=n_frames, depth_step_um=depth_step_um, depths=depths, pixel=pixel,
        frame_interval_s=frame_interval_s, psf_scan_exposure_s=psf_scan_exposure_s,
        n_beads=n_beads, offset=(0.0, 0.0), background_photons=background_photons, seed=seed)


def _write_files(folder: Path, files: dict[str, Path], *, design: Any, camera: Camera,
                 scan_camera: Camera, shape: tuple[int, int, int], scan: np.ndarray,
                 scan_axes: str, scan_metadata: dict[str, Any], dark: np.ndarray,
                 video: np.ndarray, scene: Any, truth_psf: np.ndarray, photons: np.ndarray,
                 n_frames: int, depth_step_um: float, depths: np.ndarray, pixel: float,
                 frame_interval_s: float, psf_scan_exposure_s: float, n_beads: int,
                 offset: tuple[float, float], background_photons: float, seed: Any
                 ) -> Scenario:
    """Write a scenario's TIFFs, truth arrays and manifest (both instruments)."""
    sampling = {"pixel_size_um": pixel, "sensor_pixel_size_um": design.sensor_pixel_um}
    write_tiff(files["psf_scan"], scan, axes=scan_axes,
               metadata={**sampling, "depth_step_um": depth_step_um,
                         "depth_start_um": float(depths[0]), **scan_metadata,
                         "exposure_s": psf_scan_exposure_s})
    write_tiff(files["dark"], dark, axes="TYX", metadata={"exposure_s": camera.exposure_s})
    write_tiff(files["video"], video, axes="TYX",
               metadata={**sampling, "frame_interval_s": frame_interval_s,
                         "exposure_s": camera.exposure_s})
    np.save(files["truth_volumes"], scene.volumes_tzyx, allow_pickle=False)
    np.save(files["truth_positions"], scene.positions_tnzyx, allow_pickle=False)
    np.save(files["truth_photons"], scene.photons_n, allow_pickle=False)
    np.save(files["truth_psf"], truth_psf, allow_pickle=False)
    np.save(files["truth_frames_photons"], photons, allow_pickle=False)
    scenario = Scenario(
        directory=folder.resolve(), files=files, design=design, camera=camera,
        psf_scan_camera=scan_camera, shape_zyx=shape, n_frames=n_frames,
        depth_step_um=float(depth_step_um), depth_start_um=float(depths[0]),
        pixel_size_um=float(pixel), sensor_pixel_size_um=float(design.sensor_pixel_um),
        frame_interval_s=float(frame_interval_s), n_beads=n_beads, bead_offset_yx_um=offset,
        background_photons=float(background_photons), seed=seed)
    files["manifest"].write_text(json.dumps(scenario.to_json(), indent=2) + "\n")
    return scenario


def read_scenario(directory: str | os.PathLike[str]) -> Scenario:
    """Read the manifest of a folder written by a ``write_*_scenario`` function of this module.

    Raises
    ------
    InputFileError
        If the folder has no readable ``scenario.json`` of this format, or a file it lists
        is missing.
    """
    folder = Path(directory)
    manifest = folder / _MANIFEST
    try:
        data = json.loads(manifest.read_text())
    except (OSError, ValueError) as exc:
        raise InputFileError(
            f"{manifest}: cannot read the scenario manifest ({exc}); write the scenario again "
            "with write_hydrogel_scenario") from exc
    found = data.get("format") if isinstance(data, dict) else None
    if found != _FORMAT:
        raise InputFileError(
            f"{manifest}: key 'format' is {found!r}, expected {_FORMAT!r}; write the scenario "
            "again with this volrecon version")
    files = {role: (folder / name).resolve() for role, name in data["files"].items()}
    files["manifest"] = manifest.resolve()
    missing = [str(p) for p in files.values() if not p.is_file()]
    if missing:
        raise InputFileError(
            f"{manifest}: listed file {missing[0]} is missing; write the scenario again")
    design = data["design"]
    design["shape_yx"] = tuple(design["shape_yx"])
    kind = LensletDesign if data.get("instrument") == "lenslet" else MicroscopeDesign
    return Scenario(
        directory=folder.resolve(), files=files, design=kind(**design),
        camera=Camera(**data["camera"]), psf_scan_camera=Camera(**data["psf_scan_camera"]),
        shape_zyx=tuple(data["shape_zyx"]), n_frames=int(data["n_frames"]),
        depth_step_um=float(data["depth_step_um"]), depth_start_um=float(data["depth_start_um"]),
        pixel_size_um=float(data["pixel_size_um"]),
        sensor_pixel_size_um=float(data["sensor_pixel_size_um"]),
        frame_interval_s=float(data["frame_interval_s"]), n_beads=int(data["n_beads"]),
        bead_offset_yx_um=tuple(data["bead_offset_yx_um"]),
        background_photons=float(data["background_photons"]), seed=data["seed"])

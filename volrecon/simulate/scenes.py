"""Fluorescent test scenes over time: beads, a filament and moving blobs on the model grid.

Every scene is a :class:`Scene`: the expected photons emitted per voxel in each frame,
shape (T, Z, Y, X), float32, plus the centres of its compact objects for scoring. Positions
are in voxel units ``(z, y, x)`` of the model grid (voxel ``i`` is centred at ``i``); a
scenario converts micrometres to voxels. Motion is smooth: a common drift (the gel creeping
on the stage) plus small sinusoidal wobble per object, so consecutive frames differ a little.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy.special import erf

from volrecon.errors import ConfigError, ShapeError

if TYPE_CHECKING:
    from volrecon._typing import FloatArray, RNGLike

__all__ = [
    "Scene",
    "bead_scene",
    "blob_scene",
    "filament_scene",
    "render_points",
    "smooth_motion",
]


@dataclass(frozen=True, eq=False)
class Scene:
    """Ground truth of a simulated recording.

    Attributes
    ----------
    volumes_tzyx : ndarray of shape (T, Z, Y, X), float32, read-only
        Expected photons emitted by each voxel during each frame.
    positions_tnzyx : ndarray of shape (T, N, 3), float64, read-only
        Centre of each compact object in each frame, voxel units ``(z, y, x)``.
    photons_n : ndarray of shape (N,), float64, read-only
        Photons each object emits per frame.
    kinds : tuple of str
        What each object is (``"bead"`` or ``"blob"``), length N.

    Notes
    -----
    ``a + b`` overlays two scenes of the same shape: volumes add, objects are concatenated.
    """

    volumes_tzyx: FloatArray
    positions_tnzyx: FloatArray
    photons_n: FloatArray
    kinds: tuple[str, ...]

    def __post_init__(self) -> None:
        volumes = np.array(self.volumes_tzyx, dtype=np.float32)
        positions = np.array(self.positions_tnzyx, dtype=np.float64)
        photons = np.array(self.photons_n, dtype=np.float64).reshape(-1)
        if volumes.ndim != 4:
            raise ShapeError(f"Scene volumes_tzyx must be (T, Z, Y, X); got {volumes.shape}")
        n = photons.size
        if positions.shape != (volumes.shape[0], n, 3) or len(self.kinds) != n:
            raise ShapeError(
                f"Scene positions_tnzyx {positions.shape} must be (T, N, 3) with T = "
                f"{volumes.shape[0]} and N = {photons.size} = len(kinds) = {len(self.kinds)}")
        for a in (volumes, positions, photons):
            a.setflags(write=False)
        object.__setattr__(self, "volumes_tzyx", volumes)
        object.__setattr__(self, "positions_tnzyx", positions)
        object.__setattr__(self, "photons_n", photons)
        object.__setattr__(self, "kinds", tuple(str(k) for k in self.kinds))

    @property
    def n_frames(self) -> int:
        """Number of frames T."""
        return int(self.volumes_tzyx.shape[0])

    @property
    def shape_zyx(self) -> tuple[int, int, int]:
        """Volume grid (Z, Y, X)."""
        return tuple(int(n) for n in self.volumes_tzyx.shape[1:])  # type: ignore[return-value]

    def __add__(self, other: Scene) -> Scene:
        if not isinstance(other, Scene):
            return NotImplemented
        if other.volumes_tzyx.shape != self.volumes_tzyx.shape:
            raise ShapeError(
                f"cannot overlay scenes of shape {self.volumes_tzyx.shape} and "
                f"{other.volumes_tzyx.shape}; build both with the same shape and frame count")
        return Scene(self.volumes_tzyx + other.volumes_tzyx,
                     np.concatenate([self.positions_tnzyx, other.positions_tnzyx], axis=1),
                     np.concatenate([self.photons_n, other.photons_n]),
                     self.kinds + other.kinds)


def _shape_zyx(shape_zyx: tuple[int, int, int]) -> tuple[int, int, int]:
    if len(shape_zyx) != 3 or min(shape_zyx) < 1:
        raise ShapeError(f"shape_zyx must be three positive sizes (Z, Y, X); got {shape_zyx!r}")
    return int(shape_zyx[0]), int(shape_zyx[1]), int(shape_zyx[2])


def _frames(n_frames: int) -> int:
    if not (isinstance(n_frames, int) and n_frames >= 1):
        raise ConfigError(f"n_frames must be a positive integer; got {n_frames!r}")
    return n_frames


def _sigmas(sigma_zyx_voxels: tuple[float, float, float]) -> tuple[float, float, float]:
    if len(sigma_zyx_voxels) != 3 or not all(
            math.isfinite(s) and s > 0 for s in sigma_zyx_voxels):
        raise ConfigError(
            f"sigma_zyx_voxels must be three positive widths; got {sigma_zyx_voxels!r}")
    return float(sigma_zyx_voxels[0]), float(sigma_zyx_voxels[1]), float(sigma_zyx_voxels[2])


def _voxel_profiles(centres: FloatArray, size: int, sigma: float) -> FloatArray:
    """Gaussian of width `sigma` integrated over each voxel: (N,) centres → (N, size)."""
    edges = np.arange(size + 1, dtype=np.float64) - 0.5
    cdf = 0.5 * (1.0 + erf((edges[None, :] - centres[:, None]) / (sigma * math.sqrt(2.0))))
    return np.diff(cdf, axis=1)


def render_points(positions_nzyx: FloatArray, photons_n: FloatArray,
                  shape_zyx: tuple[int, int, int], *,
                  sigma_zyx_voxels: tuple[float, float, float]) -> FloatArray:
    """Place Gaussian spots at sub-voxel positions, each integrated exactly over the voxels.

    Parameters
    ----------
    positions_nzyx : ndarray of shape (N, 3)
        Spot centres, voxel units ``(z, y, x)``.
    photons_n : ndarray of shape (N,)
        Total photons of each spot (>= 0).
    shape_zyx : tuple of int
        Volume grid.
    sigma_zyx_voxels : tuple of float
        Gaussian standard deviation along each axis, voxels.

    Returns
    -------
    ndarray of shape `shape_zyx`, float32
        A spot well inside the grid contributes its full photon count to the sum; parts
        falling outside the grid are dropped.
    """
    shape = _shape_zyx(shape_zyx)
    sz, sy, sx = _sigmas(sigma_zyx_voxels)
    positions = np.asarray(positions_nzyx, dtype=np.float64).reshape(-1, 3)
    photons = np.asarray(photons_n, dtype=np.float64).reshape(-1)
    if photons.size != positions.shape[0]:
        raise ShapeError(
            f"photons_n has {photons.size} values for {positions.shape[0]} positions; give one "
            "photon count per position")
    if not (np.isfinite(positions).all() and np.isfinite(photons).all()) or (photons < 0).any():
        raise ConfigError("positions_nzyx and photons_n must be finite, photons non-negative")
    if photons.size == 0:
        return np.zeros(shape, dtype=np.float32)
    gz = _voxel_profiles(positions[:, 0], shape[0], sz) * photons[:, None]
    gy = _voxel_profiles(positions[:, 1], shape[1], sy)
    gx = _voxel_profiles(positions[:, 2], shape[2], sx).astype(np.float32)
    zy = (gz[:, :, None] * gy[:, None, :]).astype(np.float32)
    return np.tensordot(zy, gx, axes=(0, 0)).astype(np.float32, copy=False)


def smooth_motion(start_nzyx: FloatArray, n_frames: int, *,
                  drift_zyx_per_frame: tuple[float, float, float] = (0.0, 0.0, 0.0),
                  wobble_voxels: tuple[float, float, float] = (0.0, 0.0, 0.0),
                  wobble_period_frames: float = 30.0, rng: RNGLike = None) -> FloatArray:
    """Smooth trajectories: a common drift plus a slow sinusoidal wobble per object.

    Parameters
    ----------
    start_nzyx : ndarray of shape (N, 3)
        Positions at frame 0 (before wobble), voxel units.
    n_frames : int
        Number of frames T.
    drift_zyx_per_frame : tuple of float
        Velocity shared by all objects, voxels per frame.
    wobble_voxels : tuple of float
        Amplitude of each object's wobble per axis, voxels.
    wobble_period_frames : float
        Mean wobble period; each object and axis gets a period within ±30 % of it.
    rng : numpy Generator, int or None
        Source of the wobble phases and periods.

    Returns
    -------
    ndarray of shape (T, N, 3), float64
        ``p(t) = p0 + drift · t + A sin(2π t / P + φ) - A sin(φ)`` (the wobble starts at 0).
    """
    frames = _frames(n_frames)
    start = np.asarray(start_nzyx, dtype=np.float64).reshape(-1, 3)
    if not (math.isfinite(wobble_period_frames) and wobble_period_frames > 0):
        raise ConfigError(
            f"wobble_period_frames must be positive; got {wobble_period_frames!r}")
    generator = np.random.default_rng(rng)
    t = np.arange(frames, dtype=np.float64)[:, None, None]
    periods = wobble_period_frames * generator.uniform(0.7, 1.3, size=start.shape)
    phases = generator.uniform(0.0, 2.0 * np.pi, size=start.shape)
    amplitude = np.asarray(wobble_voxels, dtype=np.float64)
    wobble = amplitude * (np.sin(2.0 * np.pi * t / periods + phases) - np.sin(phases))
    track: FloatArray = (start[None] + np.asarray(drift_zyx_per_frame, dtype=np.float64) * t
                         + wobble)
    return track


def _uniform_positions(n: int, shape: tuple[int, int, int], margin: tuple[float, float, float],
                       generator: np.random.Generator) -> FloatArray:
    low = np.asarray(margin, dtype=np.float64)
    high = np.asarray(shape, dtype=np.float64) - 1.0 - low
    if (high < low).any():
        raise ConfigError(
            f"margin_voxels {margin} leaves no room inside the grid {shape}; lower the margins")
    return generator.uniform(low, high, size=(n, 3))


def bead_scene(shape_zyx: tuple[int, int, int], n_frames: int, *, n_beads: int = 20,
               photons: float = 2e5, sigma_zyx_voxels: tuple[float, float, float] = (0.4, 0.5, 0.5),
               margin_voxels: tuple[float, float, float] = (1.0, 8.0, 8.0),
               drift_zyx_per_frame: tuple[float, float, float] = (0.0, 0.0, 0.0),
               wobble_voxels: tuple[float, float, float] = (0.0, 0.0, 0.0),
               wobble_period_frames: float = 30.0, rng: RNGLike = None) -> Scene:
    """Sub-resolution fluorescent beads at random positions, moving smoothly.

    Parameters
    ----------
    shape_zyx : tuple of int
        Volume grid.
    n_frames : int
        Number of frames T.
    n_beads : int
        Number of beads N.
    photons : float
        Photons emitted per bead per frame; each bead gets 0.5–1.5 times this.
    sigma_zyx_voxels : tuple of float
        Width of a bead on the grid (sub-voxel for a sub-resolution bead).
    margin_voxels : tuple of float
        Minimum distance of the start positions from the grid faces.
    drift_zyx_per_frame, wobble_voxels, wobble_period_frames
        Motion, see :func:`smooth_motion`.
    rng : numpy Generator, int or None
        Source of positions, brightness and wobble.

    Returns
    -------
    Scene
        ``kinds`` are all ``"bead"``.
    """
    shape = _shape_zyx(shape_zyx)
    frames = _frames(n_frames)
    if not (isinstance(n_beads, int) and n_beads >= 0):
        raise ConfigError(f"n_beads must be a non-negative integer; got {n_beads!r}")
    generator = np.random.default_rng(rng)
    start = _uniform_positions(n_beads, shape, margin_voxels, generator)
    brightness = photons * generator.uniform(0.5, 1.5, size=n_beads)
    track = smooth_motion(start, frames, drift_zyx_per_frame=drift_zyx_per_frame,
                          wobble_voxels=wobble_voxels, wobble_period_frames=wobble_period_frames,
                          rng=generator)
    volumes = np.stack([render_points(track[t], brightness, shape,
                                      sigma_zyx_voxels=sigma_zyx_voxels) for t in range(frames)])
    return Scene(volumes, track, brightness, ("bead",) * n_beads)


def filament_scene(shape_zyx: tuple[int, int, int], n_frames: int, *,
                   photons_per_voxel: float = 2e4, length_voxels: float | None = None,
                   sigma_zyx_voxels: tuple[float, float, float] = (0.5, 0.7, 0.7),
                   bend_voxels: float = 6.0, depth_swing_voxels: float | None = None,
                   drift_zyx_per_frame: tuple[float, float, float] = (0.0, 0.0, 0.0),
                   flex_voxels: float = 1.5, flex_period_frames: float = 40.0,
                   rng: RNGLike = None) -> Scene:
    """One smooth fibre across the field that bends slowly and drifts.

    Parameters
    ----------
    shape_zyx : tuple of int
        Volume grid.
    n_frames : int
        Number of frames T.
    photons_per_voxel : float
        Photons emitted per frame per voxel of fibre length.
    length_voxels : float, optional
        Chord length of the fibre. Default: 60 % of the smaller lateral size.
    sigma_zyx_voxels : tuple of float
        Cross-section width of the fibre.
    bend_voxels : float
        Amplitude of its lateral bends.
    depth_swing_voxels : float, optional
        How far it climbs through depth end to end. Default: half the depth range.
    drift_zyx_per_frame : tuple of float
        Common drift, voxels per frame.
    flex_voxels, flex_period_frames
        Slow change of the bends over time: amplitude (voxels) and period (frames).
    rng : numpy Generator, int or None
        Source of the fibre's course.

    Returns
    -------
    Scene
        No compact objects (N = 0); the fibre is only in ``volumes_tzyx``.

    Notes
    -----
    The fibre's axis is ``c + s u + w(s, t) v + h(s) e_z`` for ``s`` along the chord,
    ``u``/``v`` lateral unit vectors along and across it, ``w`` a sum of three sine modes
    with slowly varying amplitudes and ``h`` a smooth climb through depth. It is sampled
    six times per voxel of chord length and each sample carries ``photons_per_voxel · ds``.
    """
    shape = _shape_zyx(shape_zyx)
    frames = _frames(n_frames)
    generator = np.random.default_rng(rng)
    length = 0.6 * min(shape[1:]) if length_voxels is None else float(length_voxels)
    swing = 0.5 * (shape[0] - 1) if depth_swing_voxels is None else float(depth_swing_voxels)
    angle = generator.uniform(0.0, np.pi)
    along = np.array([0.0, math.sin(angle), math.cos(angle)])
    across = np.array([0.0, math.cos(angle), -math.sin(angle)])
    centre = (np.asarray(shape, dtype=np.float64) - 1.0) / 2.0
    modes = np.arange(1, 4, dtype=np.float64)
    amplitudes = bend_voxels * generator.standard_normal(3) / modes
    flex = flex_voxels * generator.standard_normal(3) / modes
    flex_phase = generator.uniform(0.0, 2.0 * np.pi, size=3)
    n_samples = max(8, math.ceil(6.0 * length))
    s = np.linspace(-0.5, 0.5, n_samples)
    shape_modes = np.sin(np.pi * modes[None, :] * (s[:, None] + 0.5))
    climb = swing * (s + 0.15 * np.sin(2.0 * np.pi * s))
    volumes = np.empty((frames, *shape), dtype=np.float32)
    for t in range(frames):
        amp_t = amplitudes + flex * np.sin(2.0 * np.pi * t / flex_period_frames + flex_phase)
        offset = shape_modes @ amp_t
        axis = (centre + np.asarray(drift_zyx_per_frame, dtype=np.float64) * t
                + length * s[:, None] * along + offset[:, None] * across)
        axis[:, 0] += climb
        steps = np.linalg.norm(np.diff(axis, axis=0), axis=1)
        ds = np.concatenate([[steps[0] / 2], (steps[1:] + steps[:-1]) / 2, [steps[-1] / 2]])
        volumes[t] = render_points(axis, photons_per_voxel * ds, shape,
                                   sigma_zyx_voxels=sigma_zyx_voxels)
    return Scene(volumes, np.zeros((frames, 0, 3)), np.zeros(0), ())


def blob_scene(shape_zyx: tuple[int, int, int], n_frames: int, *, n_blobs: int = 5,
               photons: float = 1e6, sigma_zyx_voxels: tuple[float, float, float] = (1.0, 3.0, 3.0),
               travel_voxels: tuple[float, float, float] = (2.0, 15.0, 15.0),
               period_frames: float = 60.0, rng: RNGLike = None) -> Scene:
    """Larger blobs (cells, aggregates) roaming independently on smooth bounded paths.

    Parameters
    ----------
    shape_zyx : tuple of int
        Volume grid.
    n_frames : int
        Number of frames T.
    n_blobs : int
        Number of blobs N.
    photons : float
        Photons emitted per blob per frame; each gets 0.5–1.5 times this.
    sigma_zyx_voxels : tuple of float
        Blob size (Gaussian standard deviation per axis).
    travel_voxels : tuple of float
        Amplitude of each blob's excursion from its home position, per axis.
    period_frames : float
        Mean period of the excursions (each blob and axis within ±30 %).
    rng : numpy Generator, int or None
        Source of homes, phases and brightness.

    Returns
    -------
    Scene
        ``kinds`` are all ``"blob"``; paths stay within the grid (home positions keep
        `travel_voxels` plus two widths from every face where the grid allows).
    """
    shape = _shape_zyx(shape_zyx)
    frames = _frames(n_frames)
    if not (isinstance(n_blobs, int) and n_blobs >= 0):
        raise ConfigError(f"n_blobs must be a non-negative integer; got {n_blobs!r}")
    sig = _sigmas(sigma_zyx_voxels)
    generator = np.random.default_rng(rng)
    half = (np.asarray(shape, dtype=np.float64) - 1.0) / 2.0
    travel = np.minimum(np.asarray(travel_voxels, dtype=np.float64), half)
    margin = np.minimum(travel + 2.0 * np.asarray(sig), half)
    homes = _uniform_positions(n_blobs, shape, tuple(margin), generator)
    periods = period_frames * generator.uniform(0.7, 1.3, size=(n_blobs, 3))
    phases = generator.uniform(0.0, 2.0 * np.pi, size=(n_blobs, 3))
    t = np.arange(frames, dtype=np.float64)[:, None, None]
    track = homes[None] + travel * np.sin(2.0 * np.pi * t / periods + phases)
    brightness = photons * generator.uniform(0.5, 1.5, size=n_blobs)
    volumes = np.stack([render_points(track[i], brightness, shape, sigma_zyx_voxels=sig)
                        for i in range(frames)])
    return Scene(volumes, track, brightness, ("blob",) * n_blobs)

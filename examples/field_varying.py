"""A light-field microscope with field curvature: one PSF per field position beats one PSF.

Scenario: fluorescent beads in a hydrogel seen by a Fourier light-field microscope whose
objective has field curvature: its surface of best focus sags towards the objective away
from the axis, so a bead near the edge of the field looks, on the sensor, like a bead on the
axis at another depth. A light-field PSF encodes depth in how far its lenslet spots spread,
so a single shift-invariant PSF measured on the axis puts off-axis beads at the wrong depth.

Steps, with the public API:

1. simulate bead scans through depth at a 3 x 3 grid of field positions (wave optics, each
   bead at its own lateral offset and focal shift) as a (K, Z, Y, X) TIFF, a positions CSV
   and dark frames;
2. calibrate two models from those files: a ``FieldVaryingPSF`` from all K scans
   (registered onto the centre and blended linearly across the field) and a shift-invariant
   ``DepthConvolutionPSF`` from the centre scan alone;
3. simulate one camera frame of beads, each bead rendered by wave optics at its own
   position and focal shift (so neither model is the one that made the data);
4. reconstruct the frame with FISTA through each model (ADMM's exact volume update needs a
   shift-invariant model) and score both against the truth.

Run::

    python examples/field_varying.py --out field-out
    python examples/field_varying.py --out field-out --small    # a few seconds

The last two lines printed are ``quality <model>: correlation C, beads found F/N,
depth error E um`` for the field-varying and the shift-invariant model.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

from volrecon import reconstruct
from volrecon.calibrate import calibrate_file
from volrecon.models import FieldVaryingPSF
from volrecon.simulate import (
    Camera,
    MicroscopeDesign,
    bead_scene,
    record_bead_scan,
    write_tiff,
)
from volrecon.simulate.scoring import score_reconstruction

#: The focal surface sags this far (towards the objective: negative depth) ...
SAG_UM = 5.0
#: ... at this distance from the axis, growing with the square of the distance.
SAG_RADIUS_UM = 35.0
#: Field positions of the bead scans and the beads' region: +-FIELD_UM about the axis.
FIELD_UM = 25.0


def focal_shift_um(y_um: np.ndarray | float, x_um: np.ndarray | float) -> np.ndarray:
    """Depth shift of the image of a point at lateral sample position (y, x), micrometres."""
    return -SAG_UM * (np.square(y_um) + np.square(x_um)) / SAG_RADIUS_UM**2


def depth_error_um(volume_zyx: np.ndarray, positions_nzyx: np.ndarray, depth_step_um: float,
                   *, window_px: int = 2) -> float:
    """Median distance between each bead's true depth and its brightest reconstructed plane.

    The brightest plane is that of the maximum over a (2 window_px + 1)^2 column around the
    bead; the median, because a neighbour within the column can take over the odd bead.
    """
    errors = []
    for z, y, x in positions_nzyx:
        yi, xi = int(np.rint(y)), int(np.rint(x))
        column = volume_zyx[:, yi - window_px: yi + window_px + 1,
                            xi - window_px: xi + window_px + 1]
        errors.append(abs(int(column.max(axis=(1, 2)).argmax()) - z) * depth_step_um)
    return float(np.median(errors))


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, required=True, help="folder for every file made")
    parser.add_argument("--small", action="store_true",
                        help="fewer planes and iterations (a few seconds; used by the tests)")
    parser.add_argument("--seed", type=int, default=3, help="seed of the simulation")
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    args.out.mkdir(parents=True, exist_ok=True)
    scan_rng, dark_rng, scene_rng, frame_rng = np.random.default_rng(args.seed).spawn(4)

    # The instrument: 128 x 128 sensor pixels of 4 um, 1 um per voxel in the sample. An
    # off-axis point tilts the wavefront in the pupil; two simulation grid points per sensor
    # pixel keep that tilt sampled (the bench warns when a grid is too coarse).
    design = MicroscopeDesign(kind="lightfield", oversample=2)
    n_planes, iterations, n_beads = (6, 40, 12) if args.small else (12, 100, 24)
    depth_step_um = 2.0
    depths_um = design.depths_um(n_planes, depth_step_um)
    pixel_um = design.sample_pixel_size_um
    ny, nx = design.shape_yx
    camera = Camera(hot_pixel_fraction=5e-4, hot_pixel_seed=11)

    # 1. Bead scans at a 3 x 3 grid of field positions. At field position (a, b) the bead's
    # image sits at sensor pixel (Y//2 + a / pixel, X//2 + b / pixel), and nominal depth z
    # images like depth z + focal_shift_um(a, b) on the axis.
    offsets_um = [(a, b) for a in (-FIELD_UM, 0.0, FIELD_UM) for b in (-FIELD_UM, 0.0, FIELD_UM)]
    scans = np.stack([
        record_bead_scan(
            design.psf_stack(depths_um + focal_shift_um(a, b), lateral_offset_yx_um=(a, b),
                             workers=2).psf_zyx,
            camera, bead_photons=1e8, background_photons=10.0, rng=scan_rng)
        for a, b in offsets_um])
    dark = camera.dark_frames(design.shape_yx, 20, rng=dark_rng)
    sampling = {"pixel_size_um": pixel_um, "depth_step_um": depth_step_um,
                "depth_start_um": float(depths_um[0])}
    write_tiff(args.out / "field_scans.tif", scans, axes="PZYX", metadata=sampling)
    write_tiff(args.out / "centre_scan.tif", scans[4], axes="ZYX", metadata=sampling)
    write_tiff(args.out / "dark.tif", dark, axes="TYX")
    positions_csv = args.out / "positions.csv"
    positions_csv.write_text("y_px,x_px\n" + "".join(
        f"{ny // 2 + a / pixel_um:g},{nx // 2 + b / pixel_um:g}\n" for a, b in offsets_um))
    print(f"simulated bead scans at {len(offsets_um)} field positions, {n_planes} planes "
          f"{depth_step_um:g} um apart; focal surface sags {SAG_UM:g} um at "
          f"{SAG_RADIUS_UM:g} um off axis")

    # 2. Two models from the same measurements.
    options = {"depth_step_um": depth_step_um, "pixel_size_um": pixel_um,
               "depth_start_um": float(depths_um[0]), "dark_path": args.out / "dark.tif"}
    varying = calibrate_file(args.out / "field_scans.tif", args.out / "field-model",
                             positions_path=positions_csv, **options).model
    invariant = calibrate_file(args.out / "centre_scan.tif", args.out / "centre-model",
                               **options).model
    if not isinstance(varying, FieldVaryingPSF):  # what a (K, Z, Y, X) scan calibrates to
        raise SystemExit(f"expected a FieldVaryingPSF, got {type(varying).__name__}")
    print(f"calibrated: {type(varying).__name__} with {varying.n_kernels} kernels, "
          f"{type(invariant).__name__} from the centre scan")

    # 3. One frame of beads within the calibrated field, each rendered by wave optics at its
    # own lateral position and focal shift (the model grid's voxel (z, Y//2, X//2) is the
    # axis at depth depths_um[z]).
    margin_px = ny / 2 - FIELD_UM / pixel_um
    scene = bead_scene((n_planes, ny, nx), 1, n_beads=n_beads, photons=2e6,
                       margin_voxels=(0.5, margin_px, margin_px), rng=scene_rng)
    positions = scene.positions_tnzyx[0]
    photons_yx = np.full(design.shape_yx, 2.0)  # background photons per pixel
    for (z, y, x), photons in zip(positions, scene.photons_n, strict=True):
        y_um, x_um = (y - ny // 2) * pixel_um, (x - nx // 2) * pixel_um
        depth_um = depths_um[0] + z * depth_step_um + focal_shift_um(y_um, x_um)
        psf = design.psf_stack([depth_um], lateral_offset_yx_um=(y_um, x_um), workers=2)
        photons_yx += photons * psf.psf_zyx[0]
    counts = camera.expose(photons_yx, rng=frame_rng)
    write_tiff(args.out / "frame.tif", counts, axes="YX")
    frame_yx = counts.astype(np.float32) - dark.mean(axis=0, dtype=np.float32)
    print(f"simulated one frame of {n_beads} beads ({time.perf_counter() - t0:.1f} s so far)")

    # 4. Reconstruct through each model and score against the truth.
    results = {}
    for name, model in (("field-varying", varying), ("shift-invariant", invariant)):
        start = time.perf_counter()
        volume, info = reconstruct(frame_yx, model, method="fista", iterations=iterations,
                                   return_info=True)
        write_tiff(args.out / f"volume_{name}.tif", volume, axes="ZYX")
        score = score_reconstruction(volume[None], scene.volumes_tzyx, scene.positions_tnzyx)
        results[name] = (score, depth_error_um(volume, positions, depth_step_um))
        print(f"FISTA through the {name} model: {info.iterations} iterations in "
              f"{time.perf_counter() - start:.1f} s, residual {info.residual:.3f}")
    print(f"total time: {time.perf_counter() - t0:.1f} s")
    for name, (score, error) in results.items():
        print(f"quality {name}: correlation {score.correlation:.3f}, beads found "
              f"{score.beads_found}/{score.beads_total}, depth error {error:.2f} um")


if __name__ == "__main__":
    main()

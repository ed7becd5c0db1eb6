"""Synthetic optics bench: wave-optics PSFs, fluorescent scenes, a camera, files on disk.

- Propagation: :func:`propagate` (band-limited angular spectrum method).
- Elements: :class:`PhaseMask`, :func:`circular_aperture`, :func:`thin_lens_mask`,
  :func:`microlens_array_mask`, :func:`random_diffuser_mask`.
- Sources: :func:`spherical_wave`, :func:`pupil_field`.
- PSF stacks: :func:`lensless_psf_stack`, :func:`pupil_psf_stack`, :class:`MicroscopeDesign`.
- Scenes: :func:`bead_scene`, :func:`filament_scene`, :func:`blob_scene`.
- Camera and files: :class:`Camera`, :func:`record_video`, :func:`record_bead_scan`,
  :func:`write_tiff`, :func:`write_hydrogel_scenario`.
"""

from volrecon.simulate.camera import Camera
from volrecon.simulate.design import KINDS, MicroscopeDesign
from volrecon.simulate.lenslet import LensletDesign, lenslet_point_images, lenslet_psf_stack
from volrecon.simulate.masks import (
    PhaseMask,
    circular_aperture,
    grid_coordinates,
    microlens_array_mask,
    random_diffuser_mask,
    thin_lens_mask,
)
from volrecon.simulate.propagation import (
    angular_spectrum_transfer,
    band_limit_frequency,
    propagate,
)
from volrecon.simulate.psf import PSFStack, emission_band, lensless_psf_stack, pupil_psf_stack
from volrecon.simulate.recording import (
    expected_photons,
    record_bead_scan,
    record_video,
    write_tiff,
)
from volrecon.simulate.scenario import (
    Scenario,
    read_scenario,
    write_hydrogel_scenario,
    write_lenslet_scenario,
)
from volrecon.simulate.scenes import (
    Scene,
    bead_scene,
    blob_scene,
    filament_scene,
    render_points,
    smooth_motion,
)
from volrecon.simulate.sources import collection_efficiency, pupil_field, spherical_wave

__all__ = [
    "KINDS",
    "Camera",
    "LensletDesign",
    "MicroscopeDesign",
    "PSFStack",
    "PhaseMask",
    "Scenario",
    "Scene",
    "angular_spectrum_transfer",
    "band_limit_frequency",
    "bead_scene",
    "blob_scene",
    "circular_aperture",
    "collection_efficiency",
    "emission_band",
    "expected_photons",
    "filament_scene",
    "grid_coordinates",
    "lensless_psf_stack",
    "lenslet_point_images",
    "lenslet_psf_stack",
    "microlens_array_mask",
    "propagate",
    "pupil_field",
    "pupil_psf_stack",
    "random_diffuser_mask",
    "read_scenario",
    "record_bead_scan",
    "record_video",
    "render_points",
    "smooth_motion",
    "spherical_wave",
    "thin_lens_mask",
    "write_hydrogel_scenario",
    "write_lenslet_scenario",
    "write_tiff",
]

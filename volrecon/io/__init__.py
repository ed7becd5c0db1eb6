"""Input and output: lazy frame readers (TIFF, TIFF parts, OME-TIFF series, HDF5, zarr), camera
corrections, input sanity checks, fingerprints, OME-Zarr writing and reading, zarr group
attributes."""

from volrecon.io.checks import check_offset, find_hot_pixels, sample_frames
from volrecon.io.correct import FrameCorrection
from volrecon.io.files import replacing
from volrecon.io.fingerprint import fingerprint_file, fingerprint_frames, fingerprint_tree
from volrecon.io.frames import (
    FrameSource,
    TiffFrames,
    TiffGlobFrames,
    ZarrFrames,
    natural_sort_key,
    open_frames,
    read_image,
)
from volrecon.io.hdf5 import Hdf5Frames, read_hdf5_array
from volrecon.io.ome_zarr import (
    OmeImage,
    OmeLevel,
    create_ome_image,
    ome_image_attributes,
    parse_ome_image,
    volume_chunks,
)
from volrecon.io.tiff import capture_tifffile_log, read_tiff_stack, tiff_page_problem
from volrecon.io.zarr_groups import group_attributes

__all__ = [
    "FrameCorrection",
    "FrameSource",
    "Hdf5Frames",
    "OmeImage",
    "OmeLevel",
    "TiffFrames",
    "TiffGlobFrames",
    "ZarrFrames",
    "capture_tifffile_log",
    "check_offset",
    "create_ome_image",
    "find_hot_pixels",
    "fingerprint_file",
    "fingerprint_frames",
    "fingerprint_tree",
    "group_attributes",
    "natural_sort_key",
    "ome_image_attributes",
    "open_frames",
    "parse_ome_image",
    "read_hdf5_array",
    "read_image",
    "read_tiff_stack",
    "replacing",
    "sample_frames",
    "tiff_page_problem",
    "volume_chunks",
]

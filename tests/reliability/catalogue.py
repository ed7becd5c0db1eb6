"""The bad-input catalogue: mistakes a new user makes, and the one line volrecon answers with.

Each :class:`Case` builds its bad input inside a copy of a finished tiny job (inputs,
``job.toml``, its complete store ``out.zarr``) and returns the ``volrecon`` command line to run
there. ``python tests/reliability/catalogue.py`` prints the table that README.md carries under
"What happens with bad input".
"""

from __future__ import annotations

import json
import shutil
import struct
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import tifffile
import zarr

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "pipeline"))

from jobdata import JobFiles

from volrecon.pipeline.store import JobStore

Setup = Callable[[JobFiles], list[str]]


@dataclass(frozen=True)
class Case:
    """One bad input.

    Attributes
    ----------
    name : str
        Test id.
    bad_input : str
        What is wrong, as the README says it.
    command : str
        The command that meets it (README).
    expect : tuple of str
        Fragments the error line must hold: where (file, key) and the fix.
    setup : callable or None
        Builds the input in a job copy, returns the argv; None for cases with their own test
        (named in `test`).
    exit_status : int
        Expected exit status.
    test : str
        The test that checks a case without `setup`.
    warns : bool
        The input is odd, not unusable: the command goes on (exit 0, or 1 when frames then
        fail) and prints one ``warning:`` line about it (checked by
        ``test_odd_input_gives_one_warning_line``).
    """

    name: str
    bad_input: str
    command: str
    expect: tuple[str, ...]
    setup: Setup | None = None
    exit_status: int = 2
    test: str = "test_bad_input_gives_one_line_and_changes_nothing"
    warns: bool = False


CASES: list[Case] = []


def case(name: str, bad_input: str, command: str, *expect: str, exit_status: int = 2
         ) -> Callable[[Setup], Setup]:
    """Register the decorated setup function as a catalogue case."""
    def register(setup: Setup) -> Setup:
        CASES.append(Case(name, bad_input, command, tuple(expect), setup, exit_status))
        return setup
    return register


def warning(name: str, bad_input: str, command: str, *expect: str, exit_status: int = 0
            ) -> Callable[[Setup], Setup]:
    """Register the decorated setup function as a case that warns and goes on."""
    def register(setup: Setup) -> Setup:
        CASES.append(Case(name, bad_input, command, tuple(expect), setup, exit_status,
                          "test_odd_input_gives_one_warning_line", warns=True))
        return setup
    return register


def external(name: str, bad_input: str, command: str, test: str, *expect: str) -> None:
    """Register a case checked by a test of its own."""
    CASES.append(Case(name, bad_input, command, tuple(expect), None, 2, test))


def _run(files: JobFiles, name: str, **sections: dict) -> list[str]:
    return ["run", str(files.write_job(name, **sections)), "--no-progress"]


def _model_copy(files: JobFiles, name: str) -> Path:
    target = files.folder / name
    shutil.copytree(files.folder / "model", target)
    return target


def _edit_model_attributes(store: Path, **changes: object) -> None:
    meta = json.loads((store / "zarr.json").read_text())
    meta["attributes"]["volrecon_model"].update(changes)
    (store / "zarr.json").write_text(json.dumps(meta))


def _store_copy(files: JobFiles, name: str) -> Path:
    target = files.folder / name
    shutil.copytree(files.folder / "out.zarr", target)
    return target


# ------------------------------------------------------------------------------- job file
@case("job_missing", "job file does not exist", "run", "nojob.toml", "check the path")
def _(files: JobFiles) -> list[str]:
    return ["run", str(files.folder / "nojob.toml")]


@case("job_binary", "job file is not text (e.g. a TIFF given by mistake)", "run",
      "raw.tif", "not a text file", "give a TOML job file")
def _(files: JobFiles) -> list[str]:
    return ["run", str(files.folder / "raw.tif")]


@case("toml_syntax", "TOML syntax error (unclosed table)", "run", "bad.toml",
      "not valid TOML", "line 1", "fix the syntax")
def _(files: JobFiles) -> list[str]:
    (files.folder / "bad.toml").write_text('model = {path = "model"\n')
    return ["run", str(files.folder / "bad.toml")]


@case("unknown_key", "unknown key (typo `iterationz`)", "run", "solver.iterationz",
      "allowed here", "iterations")
def _(files: JobFiles) -> list[str]:
    return _run(files, "typo.toml", solver={"iterationz": 30})


@case("unknown_section", "unknown section `[extra]`", "run", "unknown key 'extra'",
      "allowed here")
def _(files: JobFiles) -> list[str]:
    return _run(files, "section.toml", extra={"x": 1})


@case("wrong_type", 'wrong type (`tv = "much"`)', "run", "solver.tv",
      "must be of type number")
def _(files: JobFiles) -> list[str]:
    return _run(files, "type.toml", solver={"tv": "much"})


@case("missing_key", "required key missing (`[output] time_interval_s`)", "run",
      "output.time_interval_s", "add it to the job file")
def _(files: JobFiles) -> list[str]:
    return _run(files, "missing.toml", output={"time_interval_s": None})


@case("zero_iterations", "value out of range (`iterations = 0`)", "run",
      "solver.iterations", "at least 1 or \"auto\"", "fix the job file")
def _(files: JobFiles) -> list[str]:
    return _run(files, "range.toml", solver={"iterations": 0})


@case("zero_time_step", "non-positive time step (`time_interval_s = 0`)", "run",
      "output.time_interval_s", "fix the job file")
def _(files: JobFiles) -> list[str]:
    return _run(files, "dt.toml", output={"time_interval_s": 0.0})


@case("nan_in_job", "`nan` in the job file (`time_interval_s = nan`)", "run",
      "output.time_interval_s", "use a finite number")
def _(files: JobFiles) -> list[str]:
    return _run(files, "nan.toml", output={"time_interval_s": float("nan")})


@case("bad_scheduler", 'unknown scheduler (`scheduler = "gpu-farm"`)', "run",
      "compute.scheduler", "use threads, processes")
def _(files: JobFiles) -> list[str]:
    return _run(files, "sched.toml", compute={"scheduler": "gpu-farm"})


@case("frames_beyond_video", "frame range beyond the video (`frames = [0, 99]`)", "run",
      "video.frames", "raw.tif has 12", "use stop <= 12")
def _(files: JobFiles) -> list[str]:
    return _run(files, "frames.toml", video={"frames": [0, 99]})


@case("frames_reversed", "empty frame range (`frames = [5, 2]`)", "run", "video.frames",
      "stop must be larger than start")
def _(files: JobFiles) -> list[str]:
    return _run(files, "reversed.toml", video={"frames": [5, 2]})


# ---------------------------------------------------------------------------------- model
@case("model_missing", "model store does not exist", "run", "nomodel",
      "no such model store", "volrecon calibrate")
def _(files: JobFiles) -> list[str]:
    return _run(files, "m.toml", model={"path": "nomodel"})


@case("model_is_tiff", "model path points at a TIFF", "run", "raw.tif",
      "not a zarr v3 store", "volrecon calibrate")
def _(files: JobFiles) -> list[str]:
    return _run(files, "m.toml", model={"path": "raw.tif"})


@case("model_newer_format", "model store from a newer format version", "run", "model2",
      "format_version 2", "upgrade volrecon")
def _(files: JobFiles) -> list[str]:
    _edit_model_attributes(_model_copy(files, "model2"), format_version=2)
    return _run(files, "m.toml", model={"path": "model2"})


@case("model_all_zero", "all-zero PSF in the model store", "run", "model0",
      "array 'psf' is all zero", "re-run calibration")
def _(files: JobFiles) -> list[str]:
    store = _model_copy(files, "model0")
    zarr.open_array(store / "psf", mode="r+")[...] = 0
    return _run(files, "m.toml", model={"path": "model0"})


@case("model_nan", "NaN in the model's PSF", "run", "modelnan", "NaN or Inf",
      "re-run calibration")
def _(files: JobFiles) -> list[str]:
    store = _model_copy(files, "modelnan")
    zarr.open_array(store / "psf", mode="r+")[1, 2, 3] = np.nan
    return _run(files, "m.toml", model={"path": "modelnan"})


@case("model_corrupt_chunk", "corrupt chunk in the model store", "run", "modelbad",
      "cannot read model store", "re-run calibration")
def _(files: JobFiles) -> list[str]:
    store = _model_copy(files, "modelbad")
    (chunk,) = (p for p in (store / "psf" / "c").rglob("*") if p.is_file())
    chunk.write_bytes(b"\x28\xb5\x2f\xfd" + bytes(range(60)))  # zstd magic, then garbage
    return _run(files, "m.toml", model={"path": "modelbad"})


@case("model_damaged_shape", "model array metadata declaring an absurd shape", "run",
      "modelshape", "more than this machine's memory", "re-run calibration")
def _(files: JobFiles) -> list[str]:
    meta_file = _model_copy(files, "modelshape") / "psf" / "zarr.json"
    meta = json.loads(meta_file.read_text())
    meta["shape"] = [100_000, 100_000, 100_000]  # 4 PB of float32, never allocated
    meta_file.write_text(json.dumps(meta))
    return _run(files, "m.toml", model={"path": "modelshape"})


@case("model_negative_step", "non-positive depth step in the model store", "run",
      "modelstep", "depth_step_um must be a positive number", "re-run calibration")
def _(files: JobFiles) -> list[str]:
    _edit_model_attributes(_model_copy(files, "modelstep"), depth_step_um=-2.0)
    return _run(files, "m.toml", model={"path": "modelstep"})


# ---------------------------------------------------------------------------------- video
@case("video_missing", "video file does not exist", "run", "novideo.tif",
      "check [video] path")
def _(files: JobFiles) -> list[str]:
    return _run(files, "v.toml", video={"path": "novideo.tif"})


@case("video_folder", "video path is a folder that is not a zarr store", "run", "frames",
      "not a zarr store", "set [video] path")
def _(files: JobFiles) -> list[str]:
    (files.folder / "frames").mkdir()
    return _run(files, "v.toml", video={"path": "frames"})


@case("video_empty", "empty video file (0 bytes)", "run", "empty.tif",
      "not a readable TIFF", "check [video] path")
def _(files: JobFiles) -> list[str]:
    (files.folder / "empty.tif").write_bytes(b"")
    return _run(files, "v.toml", video={"path": "empty.tif"})


@case("video_not_tiff", "video is not a TIFF (text renamed .tif)", "run", "notes.tif",
      "not a TIFF file", "check [video] path")
def _(files: JobFiles) -> list[str]:
    (files.folder / "notes.tif").write_text("frame rate 20 Hz\n")
    return _run(files, "v.toml", video={"path": "notes.tif"})


@case("video_cut_header", "TIFF cut inside its 8-byte header", "run", "cut5.tif",
      "not a readable TIFF", "check [video] path")
def _(files: JobFiles) -> list[str]:
    (files.folder / "cut5.tif").write_bytes((files.folder / "raw.tif").read_bytes()[:5])
    return _run(files, "v.toml", video={"path": "cut5.tif"})


@case("video_truncated", "TIFF truncated in its image data (copy interrupted)", "run",
      "cut.tif", "truncated", "copy it again")
def _(files: JobFiles) -> list[str]:
    data = (files.folder / "raw.tif").read_bytes()
    (files.folder / "cut.tif").write_bytes(data[: len(data) * 3 // 5])
    return _run(files, "v.toml", video={"path": "cut.tif"})


@case("video_broken_page_chain", "TIFF whose page chain breaks half-way (a bad IFD offset)",
      "run", "chain.tif", "damaged TIFF", "copy it again")
def _(files: JobFiles) -> list[str]:
    path = files.folder / "chain.tif"
    with tifffile.TiffWriter(path) as writer:  # one series per page, as some cameras write
        for frame in files.raw:
            writer.write(frame, photometric="minisblack", contiguous=False)
    with tifffile.TiffFile(path) as tf:
        offset = tf.pages[6].offset
    data = bytearray(path.read_bytes())
    pointer = data.index(struct.pack("<I", offset), 8)
    data[pointer:pointer + 4] = struct.pack("<I", len(data) + 4096)
    path.write_bytes(bytes(data))
    return _run(files, "v.toml", video={"path": "chain.tif", "dark": "dark.tif"})


@case("video_4d", "4-D TIFF (TZYX) as video", "run", "tzyx.tif", "axes TZYX",
      "expected a stack of 2-D frames")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "tzyx.tif", np.zeros((2, 3, 24, 24), np.uint16),
                     photometric="minisblack", metadata={"axes": "TZYX"})
    return _run(files, "v.toml", video={"path": "tzyx.tif"})


@case("video_rgb", "colour (RGB) TIFF as video", "run", "rgb.tif", "2-D grayscale frames")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "rgb.tif", np.zeros((24, 24, 3), np.uint8),
                     photometric="rgb")
    return _run(files, "v.toml", video={"path": "rgb.tif", "dark": None})


@case("video_complex", "complex-valued pixels", "run", "complex.tif",
      "pixels are of type complex64", "uint16")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "complex.tif", np.ones((4, 24, 24), np.complex64),
                     photometric="minisblack")
    return _run(files, "v.toml", video={"path": "complex.tif", "dark": None})


@case("video_bool", "1-bit (bool) pixels", "run", "mask.tif", "pixels are of type bool",
      "uint16")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "mask.tif", np.ones((4, 24, 24), bool),
                     photometric="minisblack")
    return _run(files, "v.toml", video={"path": "mask.tif", "dark": None})


@case("frame_psf_mismatch", "frames smaller than the PSF model", "run", "small.tif",
      "do not match the model", "use a model calibrated for this camera")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "small.tif", files.raw[:, :20, :20])
    return _run(files, "v.toml", video={"path": "small.tif", "dark": None})


@case("frames_need_binning", "frames twice the model's size (binning forgotten)", "run",
      "big.tif", "set [video] binning = 2")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "big.tif", np.repeat(np.repeat(files.raw, 2, 1), 2, 2))
    return _run(files, "v.toml", video={"path": "big.tif", "dark": None})


@case("dark_missing", "dark frame file does not exist", "run", "nodark.tif",
      "check [video] dark")
def _(files: JobFiles) -> list[str]:
    return _run(files, "d.toml", video={"dark": "nodark.tif"})


@case("dark_size", "dark frame of another size than the frames", "run", "raw.tif",
      "dark/flat images (20, 20)", "same camera settings")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "dark20.tif", np.zeros((20, 20), np.uint16))
    return _run(files, "d.toml", video={"dark": "dark20.tif"})


@case("dark_nan", "NaN pixels in the dark frame", "run", "darknan.tif", "NaN or Inf",
      "clean calibration image")
def _(files: JobFiles) -> list[str]:
    dark = np.full((24, 24), 100.0, np.float32)
    dark[3, 4] = np.nan
    tifffile.imwrite(files.folder / "darknan.tif", dark)
    return _run(files, "d.toml", video={"dark": "darknan.tif"})


@case("dark_other_camera", "frames mostly below the dark (uint8 video, 16-bit dark)", "run",
      "u8.tif", "below zero after subtracting the dark", "dark16.tif", "remove [video] dark")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "u8.tif", (files.raw // 16).astype(np.uint8))
    tifffile.imwrite(files.folder / "dark16.tif", np.full((24, 24), 1600, np.uint16))
    return _run(files, "d.toml", video={"path": "u8.tif", "dark": "dark16.tif"})


@warning("dark_twice", "dark subtracted twice (float video already offset-subtracted)",
         "run", "float.tif", "% of the sampled pixels are below zero", "subtracted twice",
         "remove [video] dark", exit_status=1)
def _(files: JobFiles) -> list[str]:
    # Every volume then explains none of its frame: the frames fail (exit 1), not stored as 0.
    tifffile.imwrite(files.folder / "float.tif", files.raw.astype(np.float32) - 100)
    return _run(files, "w.toml", video={"path": "float.tif"}, output={"path": "w.zarr"})


@warning("dark_not_given", "no dark for a camera with an offset", "run", "raw.tif",
         "no [video] dark is given", "flat pedestal", "set [video] dark")
def _(files: JobFiles) -> list[str]:
    return _run(files, "w.toml", video={"dark": None}, output={"path": "w.zarr"})


@warning("hot_pixels", "hot pixels in the video that the dark does not remove", "run",
         "hot.tif", "2 hot pixels", 'hot_pixels = "repair"')
def _(files: JobFiles) -> list[str]:
    hot = files.raw.copy()
    hot[:, 5, 7] += 500
    hot[:, 15, 20] += 300
    tifffile.imwrite(files.folder / "hot.tif", hot)
    return _run(files, "w.toml", video={"path": "hot.tif"}, output={"path": "w.zarr"})


@case("flat_zero", "flat field with zero pixels", "run", "flat.tif",
      "zero or negative after dark subtraction", "more light")
def _(files: JobFiles) -> list[str]:
    flat = np.full((24, 24), 1000, np.uint16)
    flat[:2] = 100  # equal to the dark level
    tifffile.imwrite(files.folder / "flat.tif", flat)
    return _run(files, "f.toml", video={"flat": "flat.tif"})


# --------------------------------------------------------------------------------- output
@case("output_below_file", "output path below a regular file", "run", "output.path",
      "notes.txt is a file, not a folder", "choose another [output] path")
def _(files: JobFiles) -> list[str]:
    (files.folder / "notes.txt").write_text("lab notes\n")
    return _run(files, "o.toml", output={"path": "notes.txt/out.zarr"})


@case("output_foreign_folder", "output folder holds other files", "run", "thesis",
      "not a volrecon output store", "choose another [output] path")
def _(files: JobFiles) -> list[str]:
    (files.folder / "thesis").mkdir()
    (files.folder / "thesis" / "chapter1.txt").write_text("precious\n")
    return _run(files, "o.toml", output={"path": "thesis"})


@case("output_other_job", "output store made by another job (other settings)", "run",
      "solver.iterations", "is 8 in the store but 9", "--restart")
def _(files: JobFiles) -> list[str]:
    return _run(files, "other.toml", solver={"iterations": 9})


@case("output_other_video", "output store made from another video behind the same name",
      "run", "video.path", "not the one the store was made from", "original file")
def _(files: JobFiles) -> list[str]:
    raw = files.raw.copy()
    raw[3, 0, 0] += 1
    tifffile.imwrite(files.folder / "raw.tif", raw, photometric="minisblack")
    return _run(files, "job.toml")


@case("output_damaged_status", "corrupt chunk in an existing store (its frame record)", "run",
      "diagnostics/status", "cannot be read", "--restart")
def _(files: JobFiles) -> list[str]:
    (files.folder / "out.zarr" / "diagnostics" / "status" / "c" / "0").write_bytes(b"\0junk")
    return _run(files, "job.toml")


@case("output_damaged_metadata", "damaged array metadata in an existing store", "run",
      "diagnostics/residual", "metadata is damaged", "--restart")
def _(files: JobFiles) -> list[str]:
    (files.folder / "out.zarr" / "diagnostics" / "residual" / "zarr.json").write_text("{")
    return _run(files, "job.toml")


@case("output_newer_format", "output store from a newer volrecon format", "run",
      "output store format 4", "use a matching volrecon")
def _(files: JobFiles) -> list[str]:
    meta_file = files.folder / "out.zarr" / "zarr.json"
    meta = json.loads(meta_file.read_text())
    meta["attributes"]["volrecon"]["format_version"] = 4
    meta_file.write_text(json.dumps(meta))
    return _run(files, "job.toml")


external("output_locked", "output store being written by another live run", "run",
         "test_live_writer_refused", "another run is writing this store", "wait for it")
external("disk_full_tmpfs", "disk full (a 100 KiB tmpfs as output, real ENOSPC)", "run",
         "test_disk_full_on_a_small_tmpfs", "No space left on device", "free disk space")
external("disk_full_mid_write", "disk full mid-write (a zarr store raising ENOSPC after N "
         "chunks)", "run", "test_disk_full_mid_write_keeps_finished_frames",
         "No space left on device", "free disk space")


# ------------------------------------------------------------------------ status / export
@case("status_not_a_store", "`status` of a folder that is not a store", "status", "model",
      "not a volrecon output store", "[output] path")
def _(files: JobFiles) -> list[str]:
    return ["status", str(files.folder / "model")]


@case("export_damaged_chunk", "`export` of a store with a corrupt volume chunk", "export",
      "frame 3", "cannot be read", "export other frames with --frames")
def _(files: JobFiles) -> list[str]:
    store = files.folder / "out.zarr"
    chunk = JobStore.open(store, mode="r").frame_chunk_paths(3)[0]  # frame 3's shard file
    chunk.write_bytes(chunk.read_bytes()[:40])
    (files.folder / "volumes.tif").write_bytes(b"last week's export")
    return ["export", str(store), "--tiff", str(files.folder / "volumes.tif")]


@case("export_into_folder", "`export --tiff` naming a folder", "export", "--tiff",
      "is a folder", "name of a TIFF file")
def _(files: JobFiles) -> list[str]:
    return ["export", str(files.folder / "out.zarr"), "--tiff", str(files.folder / "model")]


@case("export_below_file", "`export --tiff` below a regular file", "export", "--tiff",
      "cannot write the file", "writable folder")
def _(files: JobFiles) -> list[str]:
    return ["export", str(files.folder / "out.zarr"), "--tiff",
            str(files.folder / "raw.tif" / "volumes.tif")]


@case("export_frames_range", "`export --frames` outside the store", "export", "--frames",
      "selects no frame", "use a range inside 0:12")
def _(files: JobFiles) -> list[str]:
    return ["export", str(files.folder / "out.zarr"), "--tiff",
            str(files.folder / "v.tif"), "--frames", "20:30"]


# --------------------------------------------------------------------------------- verify
@case("verify_model_store", "`verify` of a PSF model store (not an output store)", "verify",
      "model", "not a volrecon output store", "[output] path")
def _(files: JobFiles) -> list[str]:
    return ["verify", str(files.folder / "model"), "--no-progress"]


@case("verify_damaged_metadata", "`verify` of a store whose `zarr.json` is damaged", "verify",
      "out.zarr", "metadata (zarr.json) is damaged", "restore the store from a copy")
def _(files: JobFiles) -> list[str]:
    (files.folder / "out.zarr" / "zarr.json").write_text('{"zarr_format": 3, "node_')
    return ["verify", str(files.folder / "out.zarr"), "--no-progress"]


@case("verify_other_format", "`verify` of an output store of another format", "verify",
      "output store format 4", "use a matching volrecon")
def _(files: JobFiles) -> list[str]:
    meta_file = files.folder / "out.zarr" / "zarr.json"
    meta = json.loads(meta_file.read_text())
    meta["attributes"]["volrecon"]["format_version"] = 4
    meta_file.write_text(json.dumps(meta))
    return ["verify", str(files.folder / "out.zarr"), "--no-progress"]


@case("verify_frames_range", "`verify --frames` outside the store", "verify", "--frames",
      "selects no frame", "use a range inside 0:12")
def _(files: JobFiles) -> list[str]:
    return ["verify", str(files.folder / "out.zarr"), "--frames", "30:40", "--no-progress"]


# ------------------------------------------------------------------------------ calibrate
def _calibrate(files: JobFiles, stack: str, *extra: str) -> list[str]:
    return ["calibrate", str(files.folder / stack), "--pixel-size", "0.65",
            "--out", str(files.folder / "new_model"), *extra]


@case("calibrate_zero_step", "non-positive depth step (`--depth-step 0`)", "calibrate",
      "--depth-step", "must be a positive number")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "scan.tif", files.model.psf_zyx, photometric="minisblack")
    return _calibrate(files, "scan.tif", "--depth-step", "0")


@case("calibrate_all_zero", "all-zero bead scan", "calibrate", "zeros.tif", "all zero",
      "before calibrating")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "zeros.tif", np.zeros((3, 24, 24), np.float32),
                     photometric="minisblack")
    return _calibrate(files, "zeros.tif", "--depth-step", "2")


@case("calibrate_nan", "NaN / Inf pixels in the bead scan", "calibrate", "nan.tif",
      "NaN or Inf", "replace bad values")
def _(files: JobFiles) -> list[str]:
    stack = files.model.psf_zyx.copy()
    stack[1, 5, 5] = np.inf
    tifffile.imwrite(files.folder / "nan.tif", stack, photometric="minisblack")
    return _calibrate(files, "nan.tif", "--depth-step", "2")


@case("calibrate_truncated", "truncated bead-scan TIFF", "calibrate", "cutscan.tif",
      "export it again")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "scan.tif", files.model.psf_zyx, photometric="minisblack")
    data = (files.folder / "scan.tif").read_bytes()
    (files.folder / "cutscan.tif").write_bytes(data[: len(data) // 2])
    return _calibrate(files, "cutscan.tif", "--depth-step", "2")


@warning("calibrate_nm_pixel", "pixel size in nanometres (`--pixel-size 800`)", "calibrate",
         "--pixel-size", "is 800 um", "use 0.8")
def _(files: JobFiles) -> list[str]:
    tifffile.imwrite(files.folder / "scan.tif", files.model.psf_zyx, photometric="minisblack")
    return ["calibrate", str(files.folder / "scan.tif"), "--pixel-size", "800",
            "--depth-step", "2", "--out", str(files.folder / "new_model")]


def markdown_table() -> str:
    """The README table: one row per case."""
    rows = ["| # | Bad input | Command | The error (or warning) line names, and says |",
            "|---|---|---|---|"]
    for number, item in enumerate(CASES, start=1):
        said = " … ".join(f"`{fragment}`" for fragment in item.expect)
        if item.warns:
            said = f"warning: {said}"
        rows.append(f"| {number} | {item.bad_input} | `volrecon {item.command}` | {said} |")
    return "\n".join(rows)


if __name__ == "__main__":
    print(markdown_table())

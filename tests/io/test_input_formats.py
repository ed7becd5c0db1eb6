"""Video and bead-scan formats beyond one TIFF: TIFF parts (a glob of multi-page files), an
OME-TIFF series over several files, HDF5 datasets (gzip, hdf5plugin filters, contiguous).
Each gives the frames of the equivalent single TIFF written by tifffile, pickles, stays lazy
(a read opens only the files holding its frames) and refuses damaged input in one line."""

from __future__ import annotations

import pickle
from pathlib import Path

import h5py
import hdf5plugin
import numpy as np
import pytest
import tifffile
from test_frame_readers import FrameSourceContract

from volrecon.errors import InputFileError
from volrecon.io import Hdf5Frames, TiffGlobFrames, open_frames, read_image, read_tiff_stack

OME_NS = 'xmlns="http://www.openmicroscopy.org/Schemas/OME/2016-06"'


def write_ome_series(folder: Path, frames: np.ndarray, splits: list[tuple[int, int]]) -> Path:
    """An OME-TIFF series of (T, Y, X) frames over several files: the first file's OME-XML
    places planes ``a:b`` of each split in one file (TiffData with UUID and FileName), the
    others hold pixels and a BinaryOnly reference to it, as the OME-TIFF specification lays
    out a multi-file dataset."""
    folder.mkdir(exist_ok=True)
    names = [f"rec_{i}.ome.tif" for i in range(len(splits))]
    uuids = [f"urn:uuid:00000000-0000-0000-0000-{i:012d}" for i in range(len(splits))]
    tiffdata = "".join(
        f'<TiffData FirstT="{a}" IFD="0" PlaneCount="{b - a}"><UUID FileName="{name}">{uuid}'
        "</UUID></TiffData>" for (a, b), name, uuid in zip(splits, names, uuids, strict=True))
    t, y, x = frames.shape
    kind = {np.dtype(np.uint16): "uint16", np.dtype(np.float32): "float"}[frames.dtype]
    root = (f'<?xml version="1.0" encoding="UTF-8"?><OME {OME_NS} UUID="{uuids[0]}">'
            f'<Image ID="Image:0"><Pixels ID="Pixels:0" DimensionOrder="XYCZT" Type="{kind}" '
            f'SizeX="{x}" SizeY="{y}" SizeC="1" SizeZ="1" SizeT="{t}">'
            f'<Channel ID="Channel:0:0" SamplesPerPixel="1"/>{tiffdata}</Pixels></Image></OME>')
    for i, ((a, b), name) in enumerate(zip(splits, names, strict=True)):
        description = root if i == 0 else (
            f'<?xml version="1.0" encoding="UTF-8"?><OME {OME_NS} UUID="{uuids[i]}">'
            f'<BinaryOnly MetadataFile="{names[0]}" UUID="{uuids[0]}"/></OME>')
        tifffile.imwrite(folder / name, frames[a:b], description=description, metadata=None,
                         photometric="minisblack")
    return folder / names[0]


def write_parts(folder: Path, frames: np.ndarray, sizes: list[int], *, names: list[str],
                **options) -> list[Path]:
    """Consecutive multi-page parts of `frames`, one TIFF file per size."""
    folder.mkdir(exist_ok=True)
    paths, start = [], 0
    for size, name in zip(sizes, names, strict=True):
        paths.append(folder / name)
        tifffile.imwrite(paths[-1], frames[start:start + size], photometric="minisblack",
                         **options)
        start += size
    return paths


class SameAsSingleTiff(FrameSourceContract):
    """Every format's frames equal those of one TIFF file of the same frames."""

    def test_same_frames_as_single_tiff(self, written, tmp_path):
        source, frames = written
        single = tmp_path / "single.tif"
        tifffile.imwrite(single, frames, photometric="minisblack")
        # Reference: tifffile reading back the single TIFF, and volrecon's single-file reader.
        np.testing.assert_array_equal(source.read(0, source.n_frames), tifffile.imread(single))
        np.testing.assert_array_equal(source.read(2, 6), open_frames(single).read(2, 6))


class TestTiffParts(SameAsSingleTiff):
    """Unequal multi-page parts whose natural order differs from their text order."""

    kind = TiffGlobFrames

    def write(self, tmp_path, frames):
        write_parts(tmp_path / "rec", frames, [2, 1, 4],
                    names=["part_1.tif", "part_2.tif", "part_10.tif"])
        return str(tmp_path / "rec" / "part_*.tif")

    def test_parts_counted(self, written):
        source, _ = written
        assert source.part_stops == (2, 3, 7) and source.paths[-1].endswith("part_10.tif")


class TestCompressedBigTiffParts(SameAsSingleTiff):
    kind = TiffGlobFrames

    def write(self, tmp_path, frames):
        write_parts(tmp_path / "rec", frames, [3, 4], names=["a_1.tif", "a_2.tif"],
                    compression="zlib", bigtiff=True)
        return str(tmp_path / "rec" / "a_?.tif")


class TestOmeTiffSeries(SameAsSingleTiff):
    kind = TiffGlobFrames

    def write(self, tmp_path, frames):
        return str(write_ome_series(tmp_path / "ome", frames, [(0, 3), (3, 7)]))

    def test_reference_is_tifffile_ome_series(self, written):
        source, _ = written
        # Reference: tifffile's own OME reading of the multi-file series.
        with tifffile.TiffFile(source.pattern) as tf:
            assert tf.series[0].is_multifile
            np.testing.assert_array_equal(source.read(0, 7), tf.series[0].asarray())


class TestFloatOmeTiffSeries(TestOmeTiffSeries):
    def frames(self, rng):
        return rng.standard_normal(self.shape).astype(np.float32)


class TestHdf5Chunked(SameAsSingleTiff):
    """gzip chunks of 3 frames: reads of 1 to 7 frames cross chunk boundaries."""

    kind = Hdf5Frames

    def write(self, tmp_path, frames):
        with h5py.File(tmp_path / "raw.h5", "w") as handle:
            handle.create_dataset("entry/data", data=frames, chunks=(3, 9, 5),
                                  compression="gzip")
            handle.create_dataset("entry/dark", data=frames[0])  # a 2-D dataset beside it
        return str(tmp_path / "raw.h5")

    def test_chunk_frames(self, written):
        source, _ = written
        assert source.chunk_frames == 3 and source.dataset == "/entry/data"

    def test_reference_is_h5py(self, written):
        source, _ = written
        # Reference: h5py reading the dataset back.
        with h5py.File(source.path, "r") as handle:
            np.testing.assert_array_equal(source.read(1, 6), handle["entry/data"][1:6])


class TestHdf5PluginFilter(SameAsSingleTiff):
    """Blosc/Zstd through hdf5plugin, a file name without an HDF5 suffix: found by content."""

    kind = Hdf5Frames

    def write(self, tmp_path, frames):
        with h5py.File(tmp_path / "camera.dat", "w") as handle:
            handle.create_dataset("frames", data=frames, chunks=(2, 9, 10),
                                  **hdf5plugin.Blosc(cname="zstd", clevel=3))
        return str(tmp_path / "camera.dat")


class TestHdf5Contiguous(SameAsSingleTiff):
    kind = Hdf5Frames

    def frames(self, rng):
        return rng.standard_normal(self.shape).astype(np.float32)

    def write(self, tmp_path, frames):
        with h5py.File(tmp_path / "raw.hdf5", "w") as handle:
            handle.create_dataset("video", data=frames, dtype=">f4")  # big-endian on disk
        return str(tmp_path / "raw.hdf5")

    def test_kind_shape_dtype(self, written):
        source, frames = written
        assert type(source) is Hdf5Frames and source.dtype == np.float32
        assert source.chunk_frames == frames.shape[0]


def test_hdf5_dataset_named_among_several(tmp_path, rng):
    frames = rng.integers(0, 60000, (5, 8, 6), dtype=np.uint16)
    with h5py.File(tmp_path / "two.h5", "w") as handle:
        handle["a"] = frames
        handle["b/raw"] = frames[::-1]
    with pytest.raises(InputFileError, match=r"two\.h5: holds 2 3-D datasets \(/a .*/b/raw.*"
                                             r"set \[video\] dataset"):
        open_frames(tmp_path / "two.h5")
    np.testing.assert_array_equal(open_frames(tmp_path / "two.h5", component="/b/raw")
                                  .read(0, 5), frames[::-1])


# ------------------------------------------------------------------------------- laziness
def test_tiff_part_read_opens_only_its_file(tmp_path, rng):
    frames = rng.integers(0, 60000, (7, 9, 10), dtype=np.uint16)
    paths = write_parts(tmp_path / "rec", frames, [3, 4], names=["p_1.tif", "p_2.tif"])
    source = open_frames(tmp_path / "rec" / "p_*.tif")
    paths[1].unlink()  # frames 0:3 live in p_1 only: reading them must not touch p_2
    np.testing.assert_array_equal(source.read(0, 3), frames[:3])
    with pytest.raises(InputFileError, match=r"p_2\.tif"):
        source.read(2, 4)


def test_ome_part_read_opens_only_its_file(tmp_path, rng):
    frames = rng.integers(0, 60000, (7, 9, 10), dtype=np.uint16)
    first = write_ome_series(tmp_path / "ome", frames, [(0, 3), (3, 7)])
    source = open_frames(first)
    first.unlink()  # the file with the OME-XML: frames 3:7 are read from rec_1 alone
    np.testing.assert_array_equal(pickle.loads(pickle.dumps(source)).read(3, 7), frames[3:])


# ------------------------------------------------------------------------------ bead scans
@pytest.mark.parametrize("layout", ["parts", "ome", "hdf5"])
def test_bead_scan_formats_equal_single_tiff(tmp_path, rng, layout):
    scan = rng.integers(0, 4000, (6, 8, 9), dtype=np.uint16)
    single = tmp_path / "scan.tif"
    tifffile.imwrite(single, scan, photometric="minisblack")
    if layout == "parts":
        write_parts(tmp_path / "z", scan, [2, 4], names=["z_2.tif", "z_10.tif"])
        path = str(tmp_path / "z" / "z_*.tif")
    elif layout == "ome":
        path = str(write_ome_series(tmp_path / "ome", scan, [(0, 4), (4, 6)]))
    else:
        with h5py.File(tmp_path / "scan.h5", "w") as handle:
            handle.create_dataset("psf", data=scan, chunks=(1, 8, 9), **hdf5plugin.LZ4())
        path = str(tmp_path / "scan.h5")
    # Reference: tifffile reading back the single TIFF of the same planes.
    got = read_tiff_stack(path)
    assert got.dtype == scan.dtype
    np.testing.assert_array_equal(got, tifffile.imread(single))


def test_dark_frame_from_hdf5_is_averaged(tmp_path, rng):
    stack = rng.integers(90, 110, (4, 6, 7), dtype=np.uint16)
    with h5py.File(tmp_path / "dark.h5", "w") as handle:
        handle["dark"] = stack
    # Reference: numpy's mean over the frame axis.
    np.testing.assert_allclose(read_image(tmp_path / "dark.h5"), stack.mean(axis=0), rtol=1e-6)


# ------------------------------------------------------------------------- bad input rows
def _truncated_h5(tmp_path, rng):
    with h5py.File(tmp_path / "cut.h5", "w") as handle:
        handle["frames"] = rng.integers(0, 9, (6, 32, 32), dtype=np.uint16)
    data = (tmp_path / "cut.h5").read_bytes()
    (tmp_path / "cut.h5").write_bytes(data[: len(data) // 2])
    return tmp_path / "cut.h5", {}


def _four_d_h5(tmp_path, rng):
    with h5py.File(tmp_path / "tz.h5", "w") as handle:
        handle["frames"] = np.zeros((2, 3, 8, 8), np.float32)
    return tmp_path / "tz.h5", {"component": "/frames"}


def _no_3d_dataset_h5(tmp_path, rng):
    with h5py.File(tmp_path / "tz.h5", "w") as handle:
        handle["frames"] = np.zeros((2, 3, 8, 8), np.float32)
    return tmp_path / "tz.h5", {}


def _missing_dataset_h5(tmp_path, rng):
    with h5py.File(tmp_path / "raw.h5", "w") as handle:
        handle["cam/frames"] = np.zeros((2, 8, 8), np.uint16)
    return tmp_path / "raw.h5", {"component": "/cam/raw"}


def _group_dataset_h5(tmp_path, rng):
    path, _ = _missing_dataset_h5(tmp_path, rng)
    return path, {"component": "/cam"}


def _h5_suffix_not_hdf5(tmp_path, rng):
    (tmp_path / "raw.h5").write_text("not hdf5")
    return tmp_path / "raw.h5", {}


def _dataset_for_tiff(tmp_path, rng):
    tifffile.imwrite(tmp_path / "raw.tif", np.zeros((2, 8, 8), np.uint16))
    return tmp_path / "raw.tif", {"component": "/frames"}


def _parts_of_two_sizes(tmp_path, rng):
    write_parts(tmp_path / "rec", np.zeros((3, 8, 8), np.uint16), [2, 1],
                names=["p1.tif", "p2.tif"])
    write_parts(tmp_path / "rec", np.zeros((2, 8, 9), np.uint16), [2], names=["p3.tif"])
    return tmp_path / "rec" / "p*.tif", {}


def _multi_page_among_single_frames(tmp_path, rng):
    frames = np.zeros((4, 8, 8), np.uint16)
    write_parts(tmp_path / "rec", frames, [1, 2, 1], names=["p1.tif", "p2.tif", "p3.tif"])
    return tmp_path / "rec" / "p*.tif", {}


def _truncated_part(tmp_path, rng):
    paths = write_parts(tmp_path / "rec", rng.integers(0, 9, (9, 32, 32), dtype=np.uint16),
                        [3, 3, 3], names=["p1.tif", "p2.tif", "p3.tif"])
    data = paths[1].read_bytes()
    paths[1].write_bytes(data[: len(data) // 2])
    return tmp_path / "rec" / "p*.tif", {}


def _ome_part_missing(tmp_path, rng):
    first = write_ome_series(tmp_path / "ome", np.zeros((4, 8, 8), np.uint16), [(0, 2), (2, 4)])
    (first.parent / "rec_1.ome.tif").unlink()
    return first, {}


def _ome_pixels_only_file(tmp_path, rng):
    first = write_ome_series(tmp_path / "ome", np.zeros((4, 8, 8), np.uint16), [(0, 2), (2, 4)])
    return first.parent / "rec_1.ome.tif", {}


def _ome_glob(tmp_path, rng):
    write_ome_series(tmp_path / "ome", np.zeros((4, 8, 8), np.uint16), [(0, 2), (2, 4)])
    return tmp_path / "ome" / "rec_*.ome.tif", {}


@pytest.mark.parametrize(("make", "message"), [
    (_truncated_h5, r"cut\.h5: not a readable HDF5 file .*truncated or damaged, copy it again"),
    (_four_d_h5, r"tz\.h5: dataset '/frames' has shape \(2, 3, 8, 8\); expected \(T, Y, X\) "
                 r"frames; set \[video\] dataset to a 3-D dataset"),
    (_no_3d_dataset_h5, r"tz\.h5: holds no 3-D or 2-D dataset; write the frames as one"),
    (_missing_dataset_h5, r"raw\.h5: no dataset '/cam/raw' in the file; set \[video\] dataset "
                          r"to one of its image datasets \(/cam/frames\)"),
    (_group_dataset_h5, r"raw\.h5: '/cam' is an HDF5 group, not a dataset; set \[video\] "
                        r"dataset to one of the datasets inside it \(/frames"),
    (_h5_suffix_not_hdf5, r"raw\.h5: not a readable HDF5 file"),
    (_dataset_for_tiff, r"raw\.tif: \[video\] dataset is only for zarr stores and HDF5 files"),
    (_parts_of_two_sizes, r"p3\.tif: holds frames of \(8, 9\) uint16, but .*p1\.tif \(8, 8\) "
                          r"uint16; every file of the glob must hold frames of one size"),
    (_truncated_part, r"p2\.tif: .*truncated"),
    (_ome_part_missing, r"rec_0\.ome\.tif: the OME-TIFF series lacks planes .*rec_1\.ome\.tif"
                        r".*put every file the OME-XML names next to this one"),
    (_ome_pixels_only_file, r"rec_1\.ome\.tif: holds only pixels of an OME-TIFF series whose "
                            r"OME-XML is in rec_0\.ome\.tif; set \[video\] path to that file"),
    (_ome_glob, r"rec_0\.ome\.tif: is one file of an OME-TIFF series over several files; set "
                r"\[video\] path to this one file"),
])
def test_bad_input_refused_in_one_line(tmp_path, rng, make, message):
    path, options = make(tmp_path, rng)
    with pytest.raises(InputFileError, match=message) as caught:
        open_frames(path, **options)
    assert "\n" not in str(caught.value)


def test_multi_page_file_among_single_frames_refused_at_read(tmp_path, rng):
    path, _ = _multi_page_among_single_frames(tmp_path, rng)
    source = open_frames(path)  # first and last hold one frame: the others checked when read
    with pytest.raises(InputFileError, match=r"p2\.tif: holds 2 frames, the first and last "
                                             r"files of .* one each; give every file one frame"):
        source.read(0, 3)


def test_bad_bead_scans_refused_in_one_line(tmp_path, rng):
    path, _ = _truncated_h5(tmp_path, rng)
    with pytest.raises(InputFileError, match=r"cut\.h5: not a readable HDF5 file"):
        read_tiff_stack(path)
    path, _ = _ome_part_missing(tmp_path, rng)
    with pytest.raises(InputFileError, match=r"rec_0\.ome\.tif: plane 2 of the bead scan is in no "
                                             r"readable file of its OME-TIFF series"):
        read_tiff_stack(path)
    write_parts(tmp_path / "z", np.zeros((3, 8, 8), np.uint16), [3], names=["z1.tif"])
    write_parts(tmp_path / "z", np.zeros((3, 8, 9), np.uint16), [3], names=["z2.tif"])
    with pytest.raises(InputFileError, match=r"z2\.tif: this part of the bead scan has shape "
                                             r"\(3, 8, 9\)"):
        read_tiff_stack(tmp_path / "z" / "z*.tif")
    with h5py.File(tmp_path / "two.h5", "w") as handle:
        handle["a"] = np.zeros((2, 8, 8), np.uint16)
        handle["b"] = np.zeros((2, 8, 8), np.uint16)
    with pytest.raises(InputFileError, match=r"two\.h5: holds 2 3-D datasets"):
        read_tiff_stack(tmp_path / "two.h5")


def test_calibrate_cli_gives_the_same_model_from_every_format(tmp_path, rng):
    from volrecon.cli import main
    from volrecon.models import PSFModel

    z, y, x = np.mgrid[:5, :32, :32]
    bead = 3000 * np.exp(-((y - 16) ** 2 + (x - 15) ** 2) / (2 * (1.0 + z) ** 2))
    scan = (bead + 100 + rng.normal(0, 3, bead.shape)).astype(np.uint16)
    tifffile.imwrite(tmp_path / "scan.tif", scan, photometric="minisblack")
    with h5py.File(tmp_path / "scan.h5", "w") as handle:
        handle.create_dataset("scan", data=scan, **hdf5plugin.Zstd())
    write_parts(tmp_path / "z", scan, [2, 3], names=["z_9.tif", "z_10.tif"])
    stacks = {}
    for name, path in (("tif", tmp_path / "scan.tif"), ("h5", tmp_path / "scan.h5"),
                       ("parts", tmp_path / "z" / "z_*.tif")):
        out = tmp_path / f"{name}.zarr"
        assert main(["calibrate", str(path), "--depth-step", "2", "--pixel-size", "0.65",
                     "--out", str(out)]) == 0
        stacks[name] = PSFModel.load(out).store_arrays()
    # Reference: the model calibrated from the single TIFF; same pixels in, same bits out.
    for name in ("h5", "parts"):
        assert stacks[name].keys() == stacks["tif"].keys()
        for key, array in stacks["tif"].items():
            assert stacks[name][key].tobytes() == array.tobytes(), (name, key)

"""'volrecon calibrate' end to end on TIFFs written with tifffile, and its error paths."""

from __future__ import annotations

import re

import numpy as np
import pytest
import tifffile

from volrecon.cli import main
from volrecon.models import FieldVaryingPSF, LowRankDepthPSF, PSFModel


def _write(path, data):
    tifffile.imwrite(path, data, photometric="minisblack")
    return str(path)


def test_bead_scan_to_model_and_report(rng, tmp_path, gaussian, camera, capsys):
    psf = gaussian(8, 48)
    raw, dark = camera(rng, psf, photons=1e5, hot=3)
    scan = _write(tmp_path / "bead.tif", raw)
    dark_file = _write(tmp_path / "dark.tif", dark)
    out = tmp_path / "bead.zarr"
    status = main(["calibrate", scan, "--depth-step", "2", "--pixel-size", "0.65",
                   "--depth-start", "-8", "--dark", dark_file, "--wavelength", "510",
                   "--crop", "0:48,2:46", "--rank", "auto", "--energy", "0.99",
                   "--out", str(out)])
    assert status == 0
    printed = capsys.readouterr().out
    assert "axial resolution" in printed and f"model written to {out}" in printed
    model = PSFModel.load(out)
    assert isinstance(model, LowRankDepthPSF) and model.shape_in == (8, 48, 44)
    assert model.geometry.depth_start_um == -8.0 and model.calibration["source"] == scan
    report_dir = tmp_path / "bead.report"
    assert (report_dir / "summary.txt").is_file() and (report_dir / "report.json").is_file()
    assert len(list(report_dir.glob("*.png"))) == 6 and (report_dir / "psf.png").is_file()
    # Known truth: the expanded model reproduces the PSF (issue criterion per plane).
    expanded = model.expanded_stack()
    for got, truth in zip(expanded, psf[:, :, 2:46], strict=True):
        assert np.corrcoef(got.ravel(), truth.ravel())[0, 1] >= 0.95
    # Running again replaces the model and the report in place.
    assert main(["calibrate", scan, "--depth-step", "2", "--pixel-size", "0.65", "--bin", "2",
                 "--out", str(out)]) == 0
    assert PSFModel.load(out).shape_in == (8, 24, 24)
    assert not list(tmp_path.glob(".*partial"))


def test_field_positions_from_csv(rng, tmp_path, gaussian, camera):
    scans = np.stack([camera(rng, gaussian(3, 40, centre=c), photons=1e5)[0]
                      for c in ((20, 20), (12, 27), (28, 12))])
    scan = _write(tmp_path / "field.tif", scans)
    (tmp_path / "pos.csv").write_text("y_px,x_px\n20,20\n12,27\n28,12\n")
    assert main(["calibrate", scan, "--depth-step", "1", "--pixel-size", "0.5", "--positions",
                 str(tmp_path / "pos.csv"), "--out", str(tmp_path / "field.zarr")]) == 0
    model = PSFModel.load(tmp_path / "field.zarr")
    assert isinstance(model, FieldVaryingPSF) and model.n_kernels == 3
    np.testing.assert_array_equal(model.positions_yx, [[20, 20], [12, 27], [28, 12]])


def _cases(rng, tmp_path, gaussian, camera):
    raw, _ = camera(rng, gaussian(4, 24), photons=1e5)
    good = _write(tmp_path / "good.tif", raw)
    nan = raw.astype(np.float32)
    nan[1, 3, 4] = np.nan
    zero = raw.copy()
    zero[2] = 0
    _write(tmp_path / "field.tif", np.stack([raw, raw]))
    (tmp_path / "short.csv").write_text("10,10\n")
    (tmp_path / "taken").mkdir()
    (tmp_path / "taken" / "data.txt").write_text("keep me")
    base = ["--depth-step", "2", "--pixel-size", "0.5"]
    return [
        ([_write(tmp_path / "flat.tif", raw[0]), *base], "flat.tif: .*single 2-D image"),
        ([_write(tmp_path / "nan.tif", nan), *base], "nan.tif: .*NaN"),
        ([_write(tmp_path / "zero.tif", zero), *base], "zero.tif: plane 2 .*all zero"),
        ([good, *base, "--dark", _write(tmp_path / "dark.tif", raw[0, :10])],
         "dark.tif: .*dark frame has shape"),
        ([good, "--depth-step", "0", "--pixel-size", "0.5"], "--depth-step"),
        ([good, "--depth-step", "-2", "--pixel-size", "0.5"], "--depth-step"),
        ([good, *base, "--rank", "5"], "--rank 5 is larger than .* Z = 4"),
        ([good, *base, "--rank", "many"], "--rank 'many'"),
        ([good, *base, "--crop", "0:10"], "--crop '0:10'"),
        ([good, *base, "--crop", "0:10,0:99"], "--crop 0:10,0:99 does not fit"),
        ([str(tmp_path / "field.tif"), *base, "--positions", str(tmp_path / "short.csv")],
         "short.csv: has 1 positions but the bead scan has 2"),
        ([good, *base, "--positions", str(tmp_path / "short.csv")], "--positions needs"),
        ([str(tmp_path / "missing.tif"), *base], "missing.tif: no such file"),
        ([good, *base, "--dark", str(tmp_path / "nodark.tif")], "nodark.tif: no such file"),
    ]


def test_bad_input_gives_one_line_and_leaves_nothing(rng, tmp_path, gaussian, camera, capsys):
    for argv, pattern in _cases(rng, tmp_path, gaussian, camera):
        out = tmp_path / "model.zarr"
        status = main(["calibrate", *argv, "--out", str(out)])
        err = capsys.readouterr().err
        assert status == 2, argv
        lines = err.strip().splitlines()
        assert len(lines) == 1 and "Traceback" not in err, err
        assert lines[0].startswith("volrecon calibrate: error: ")
        assert re.search(pattern, lines[0]), (pattern, lines[0])
        assert not out.exists() and not (tmp_path / "model.report").exists()
        assert not list(tmp_path.glob(".*partial"))
    # An existing directory that is not a model store is never overwritten.
    good = str(tmp_path / "good.tif")
    status = main(["calibrate", good, "--depth-step", "2", "--pixel-size", "0.5", "--out",
                   str(tmp_path / "taken")])
    assert status == 2 and "not a volrecon model store" in capsys.readouterr().err
    assert (tmp_path / "taken" / "data.txt").read_text() == "keep me"
    # Nor is a directory in the report's place.
    (tmp_path / "other.report").mkdir()
    status = main(["calibrate", good, "--depth-step", "2", "--pixel-size", "0.5", "--out",
                   str(tmp_path / "other.zarr")])
    assert status == 2 and "not a calibration report" in capsys.readouterr().err
    assert not (tmp_path / "other.zarr").exists()


def test_missing_required_option_is_a_usage_error(tmp_path, capsys):
    with pytest.raises(SystemExit) as stop:
        main(["calibrate", "x.tif", "--pixel-size", "1", "--out", str(tmp_path / "m")])
    assert stop.value.code == 2 and "--depth-step" in capsys.readouterr().err

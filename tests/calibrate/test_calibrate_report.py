"""The calibration report: files, JSON content, text, and the no-matplotlib fallback."""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest

from volrecon.calibrate import calibrate_stack


@pytest.fixture
def report(rng, speckle, camera):
    raw, dark = camera(rng, speckle(rng, 8, 40), photons=3e5)
    return calibrate_stack(raw, dark=dark, depth_step_um=2.0, pixel_size_um=0.5, rank="auto",
                           wavelength_nm=600.0).report


def test_writes_text_json_and_plots(report, tmp_path):
    written = report.write(tmp_path / "r")
    names = sorted(p.split("/")[-1] for p in written.files)
    assert names == sorted(["summary.txt", "report.json", "singular_values.png", "throughput.png",
                            "depth_correlation.png", "lateral_resolution.png",
                            "registration.png"])
    for name in names:
        if name.endswith(".png"):
            # Known truth: the PNG signature (RFC 2083).
            assert (tmp_path / "r" / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    data = json.loads((tmp_path / "r" / "report.json").read_text())
    assert data["rank"] == report.rank and len(data["depth_ncc"]) == 8
    assert "common-practice" in data["axial_resolution_criterion"]
    text = (tmp_path / "r" / "summary.txt").read_text()
    assert "axial resolution" in text and "common-practice criterion" in text
    assert "Airy-equivalent NA at 600 nm" in text


def test_figures_are_consistent(report):
    # Known truth: the speckle planes decorrelate within the 16 µm scan, so the axial
    # resolution is a finite distance shorter than the scan, and it bounds the number of
    # distinguishable depths; the NCC matrix is symmetric with a unit diagonal.
    assert report.axial_resolution_um is not None and 0 < report.axial_resolution_um < 16
    assert 1 <= report.distinguishable_planes <= 16 / report.axial_resolution_um + 1e-9
    np.testing.assert_allclose(report.depth_ncc, report.depth_ncc.T)
    np.testing.assert_allclose(np.diag(report.depth_ncc), 1.0)
    assert report.lateral_resolution_um == pytest.approx(
        np.nanmin(report.lateral_fwhm_per_plane_um))
    assert report.rank_for_energy(report.retained_energy) <= report.rank


def test_without_matplotlib_the_text_says_so(report, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)
    monkeypatch.setitem(sys.modules, "matplotlib.backends.backend_agg", None)
    written = report.write(tmp_path / "r")
    assert [p.split("/")[-1] for p in written.files] == ["summary.txt", "report.json"]
    assert "install matplotlib" in (tmp_path / "r" / "summary.txt").read_text()

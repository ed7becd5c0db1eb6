"""volrecon's warnings reach the CLI user as one 'warning:' line each on stderr."""

from __future__ import annotations

import warnings
from types import SimpleNamespace

import numpy as np
import tifffile

import volrecon.cli as cli
from volrecon.errors import ConfigError, VolreconWarning


def _rank_one_scan(path, z=4, n=24):
    """Noise-free bead scan whose planes are all the same image: one usable singular value."""
    yy, xx = np.mgrid[:n, :n]
    spot = np.exp(-((yy - n // 2) ** 2 + (xx - n // 2) ** 2) / (2 * 1.5**2))
    plane = np.round(100.0 + 4000.0 * spot).astype(np.uint16)
    tifffile.imwrite(path, np.stack([plane] * z), photometric="minisblack")
    return str(path)


def _warning_lines(err):
    return [line for line in err.splitlines() if line.startswith("warning:")]


def test_rank_above_usable_singular_values_is_one_warning_line(tmp_path, capsys):
    scan = _rank_one_scan(tmp_path / "flat.tif")
    status = cli.main(["calibrate", scan, "--depth-step", "2", "--pixel-size", "0.5",
                       "--rank", "3", "--out", str(tmp_path / "m.zarr")])
    assert status == 0
    captured = capsys.readouterr()
    lines = _warning_lines(captured.err)
    assert len(lines) == 1, captured.err
    assert "singular values" in lines[0] and "rank 3 was lowered" in lines[0]
    assert "model written to" in captured.out


def test_each_message_once_other_warnings_silent_errors_unchanged(monkeypatch, capsys):
    def run(args):
        for _ in range(3):
            warnings.warn("plate too\n  coarse", VolreconWarning, stacklevel=1)
        warnings.warn("some library chatter", UserWarning, stacklevel=1)
        warnings.warn("old API", DeprecationWarning, stacklevel=1)
        raise ConfigError("bad value; write it right")

    monkeypatch.setattr(cli, "_run_status", run)
    assert cli.main(["status", "anything"]) == 2
    err = capsys.readouterr().err.splitlines()
    assert err == ["warning: plate too coarse",
                   "volrecon status: error: bad value; write it right"]


def test_resume_by_other_version_is_one_warning_line(monkeypatch, capsys):
    from volrecon.pipeline import job

    store = SimpleNamespace(path="out.zarr",
                            attributes={"provenance": {"volrecon_version": "0.0.1"}})

    def run(args):
        job._warn_on_other_version(store)
        job._warn_on_other_version(store)
        job.logger.warning("unrelated notice")
        return 0

    monkeypatch.setattr(cli, "_run_status", run)
    assert cli.main(["status", "anything"]) == 0
    lines = _warning_lines(capsys.readouterr().err)
    assert len(lines) == 1 and lines[0].startswith("warning: out.zarr: written by volrecon "
                                                   "0.0.1, continued by ")
    # The logger is back as it was after the command.
    assert job.logger.propagate and job.logger.level == 0

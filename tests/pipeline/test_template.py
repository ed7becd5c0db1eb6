"""``volrecon init``: a commented job file that the job loader accepts as written."""

from __future__ import annotations

import tomllib

import pytest

from volrecon.cli import main
from volrecon.pipeline import load_job
from volrecon.pipeline.config import job_schema


def test_init_writes_every_schema_key_and_the_loader_accepts_it(tmp_path, capsys):
    assert main(["init", str(tmp_path)]) == 0
    path = tmp_path / "job.toml"
    assert "<- edit" in capsys.readouterr().out
    text = path.read_text()
    document = tomllib.loads(text)
    # Reference: the published schema — every section and key appears (set or commented out),
    # and every default is the schema's.
    for section, spec in job_schema()["properties"].items():
        for key, prop in spec["properties"].items():
            assert f"{key} =" in text, (section, key)
            if "default" in prop:
                assert document[section][key] == prop["default"], (section, key)
    job = load_job(path)  # schema-valid as written
    assert job.solver.iterations == "auto" and job.output_path == tmp_path / "volumes.zarr"


def test_init_never_overwrites(tmp_path, capsys):
    (tmp_path / "job.toml").write_text("# mine\n")
    assert main(["init", str(tmp_path / "job.toml")]) == 2
    assert "exists already" in capsys.readouterr().err
    assert (tmp_path / "job.toml").read_text() == "# mine\n"


@pytest.mark.parametrize("name", ["lab.toml", "sub/dir/lab.toml"])
def test_init_writes_the_named_file(tmp_path, name):
    assert main(["init", str(tmp_path / name)]) == 0
    assert (tmp_path / name).is_file()

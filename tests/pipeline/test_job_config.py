"""Job files: schema checks name the key, paths are relative to the job file, defaults fill in."""

from __future__ import annotations

import json

import jsonschema
import pytest

from volrecon.errors import ConfigError
from volrecon.pipeline import load_job
from volrecon.pipeline.config import SCHEMA_PATH, job_schema


def test_schema_is_valid_2020_12():
    # Published standard: the JSON Schema 2020-12 meta-schema, checked by jsonschema.
    schema = json.loads(SCHEMA_PATH.read_text())
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(schema)


def test_paths_relative_to_job_file_and_defaults(job_files, tmp_path, monkeypatch):
    path = job_files.write_job(solver={"iterations": None, "tv": None})
    monkeypatch.chdir("/")
    job = load_job(path)
    assert job.model_path == tmp_path / "model" and job.video_path == tmp_path / "raw.tif"
    assert job.output_path == tmp_path / "out.zarr" and job.dark_path == tmp_path / "dark.tif"
    # Defaults written in the schema, filled in:
    assert job.solver.iterations == job_schema()["properties"]["solver"]["properties"][
        "iterations"]["default"]
    assert job.solver.tv == 0.0 and job.compute.device == "cpu" and job.binning == 1
    assert "compute" not in job.settings() and job.settings()["solver"]["iterations"] == "auto"


def test_settings_compare_fingerprints_not_spelling(job_files):
    job = load_job(job_files.write_job())
    fps = {"model.path": "sha256:m", "video.path": "sha256:v", "video.dark": "sha256:d"}
    comparable = job.comparable_settings(fps)
    assert comparable["video"]["path"] == "sha256:v" and "path" not in comparable["output"]
    other = load_job(job_files.write_job("other.toml",
                                         video={"path": str(job_files.folder / "raw.tif")}))
    assert other.comparable_settings(fps) == comparable


@pytest.mark.parametrize(("sections", "pattern"), [
    ({"solver": {"iterationz": 3}}, r"unknown key 'solver\.iterationz'"),
    ({"extra": {"a": 1}}, r"unknown key 'extra'"),
    ({"compute": {"gpu": True}}, r"unknown key 'compute\.gpu'"),
    ({"solver": {"iterations": "sixty"}},
     r"key 'solver\.iterations' must be an integer of at least 1 or \"auto\"; got 'sixty'"),
    ({"solver": {"tv": "much"}}, r"key 'solver\.tv' must be of type number"),
    ({"solver": {"warm_start": 1}}, r"key 'solver\.warm_start' must be of type boolean"),
    ({"solver": {"iterations": 0}},
     r"key 'solver\.iterations' must be an integer of at least 1.*got 0"),
    ({"solver": {"method": "cg"}}, r"key 'solver\.method'"),
    ({"output": {"time_interval_s": None}}, r"required key 'output\.time_interval_s'"),
    ({"compute": {"scheduler": "mpi"}}, r"compute\.scheduler.*tcp://host:port"),
    ({"video": {"frames": [5, 2]}}, r"video\.frames.*stop must be larger"),
    ({"video": {"frames": [1]}}, r"key 'video\.frames'"),
])
def test_bad_job_refused_with_key_path(job_files, sections, pattern):
    path = job_files.write_job(**sections)
    with pytest.raises(ConfigError, match=pattern) as info:
        load_job(path)
    message = str(info.value)
    assert message.startswith(str(path)) and "\n" not in message


def test_tcp_scheduler_accepted_and_toml_errors_reported(job_files, tmp_path):
    job = load_job(job_files.write_job(compute={"scheduler": "tcp://10.0.0.5:8786"}))
    assert job.compute.is_distributed and job.compute.scheduler == "tcp://10.0.0.5:8786"
    bad = tmp_path / "bad.toml"
    bad.write_text("[model\npath = 1\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_job(bad)
    with pytest.raises(ConfigError, match="cannot read"):
        load_job(tmp_path / "missing.toml")


def test_with_compute_revalidates(job_files):
    job = load_job(job_files.write_job())
    other = job.with_compute(scheduler="processes", workers=3)
    assert other.compute.workers == 3 and other.model_path == job.model_path
    with pytest.raises(ConfigError, match=r"compute\.workers"):
        job.with_compute(workers=0)


def test_job_file_with_a_byte_order_mark_loads(job_files):
    # Editors on Windows save UTF-8 with a byte-order mark (U+FEFF); TOML itself forbids it
    # before the first key, so it is dropped on reading.
    path = job_files.write_job()
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    assert load_job(path).solver == load_job(job_files.write_job()).solver

"""Safety: no pickle and no code evaluation anywhere in volrecon; a job file is data, its paths
resolve relative to it, and a run writes nothing but its output store."""

from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np
import tifffile
import tomli_w
from jobdata import DEFAULT_JOB, make_job_files
from reliability_tools import one_error_line, run_cli, snapshot_changes, tree_snapshot

import volrecon

PACKAGE = Path(volrecon.__file__).resolve().parent
#: Ways to run code hidden in data, or to load pickles. ``np.save(..., allow_pickle=False)``
#: (refusing pickles) is fine; ``np.load`` refuses pickles by default.
FORBIDDEN = {
    "pickle-like module": re.compile(r"^\s*(import|from)\s+(c?pickle|cloudpickle|dill|marshal|"
                                     r"shelve|joblib)\b", re.MULTILINE),
    "pickle load": re.compile(r"\b(pickle|dill|joblib)\.loads?\("),
    "allow_pickle other than False": re.compile(r"allow_pickle\s*=\s*(?!False\b)"),
    "eval/exec": re.compile(r"(?<![\w.])(eval|exec)\s*\("),
    "__import__": re.compile(r"__import__\s*\("),
    "yaml.load": re.compile(r"yaml\.(unsafe_)?load\("),
    "shell=True": re.compile(r"shell\s*=\s*True"),
    "os.system": re.compile(r"\bos\.(system|popen)\("),
}


def test_no_pickle_and_no_eval_in_the_package():
    sources = sorted(PACKAGE.rglob("*.py"))
    assert len(sources) > 30  # the whole package, not an empty folder
    found = []
    for source in sources:
        text = source.read_text(encoding="utf-8")
        for what, pattern in FORBIDDEN.items():
            for match in pattern.finditer(text):
                line = text.count("\n", 0, match.start()) + 1
                found.append(f"{source.relative_to(PACKAGE)}:{line}: {what}")
    assert not found, found


def test_the_forbidden_patterns_do_catch(tmp_path):
    """The check above can fail: each pattern finds its own example."""
    examples = {"pickle-like module": "import pickle", "pickle load": "pickle.load(f)",
                "allow_pickle other than False": "np.load(p, allow_pickle=True)",
                "eval/exec": "eval(text)", "__import__": "__import__('os')",
                "yaml.load": "yaml.load(f)", "shell=True": "run(c, shell=True)",
                "os.system": "os.system(c)"}
    for what, text in examples.items():
        assert FORBIDDEN[what].search(text), what
    refusing = "np.save(p, a, allow_pickle=False)"
    assert not FORBIDDEN["allow_pickle other than False"].search(refusing)
    assert not FORBIDDEN["eval/exec"].search("model.evaluate(x); executor.submit(f)")


def test_nothing_in_a_job_file_is_evaluated(tmp_path):
    make_job_files(tmp_path, np.random.default_rng(1))
    marker = tmp_path / "PWNED"
    tricks = {
        "model": {"path": f"__import__('os').system('touch {marker}')"},
        "video": {"path": f"$(touch {marker})", "dark": f"`touch {marker}`"},
        "output": {"path": "${HOME}/out.zarr", "time_interval_s": 0.05},
    }
    for section, values in tricks.items():
        document = {k: dict(v) for k, v in DEFAULT_JOB.items()}
        document[section].update(values)
        job = tmp_path / f"{section}.toml"
        job.write_text(tomli_w.dumps(document))
        done = run_cli(["run", str(job), "--no-progress"], cwd=tmp_path)
        assert not marker.exists()
        if section == "output":  # no variable expansion: a folder named "${HOME}" is made
            assert done.returncode == 0, done.stderr
            assert (tmp_path / "${HOME}" / "out.zarr" / "zarr.json").is_file()
        else:  # the text is taken as a (missing) file name, literally
            assert done.returncode == 2
            line = one_error_line(done.stderr, "run")
            assert str(tmp_path / values["path"]) in line
    # A method name is checked against its list, not looked up or run.
    document = {k: dict(v) for k, v in DEFAULT_JOB.items()}
    document["solver"]["method"] = "__import__('os').getcwd"
    (tmp_path / "method.toml").write_text(tomli_w.dumps(document))
    done = run_cli(["run", str(tmp_path / "method.toml")], cwd=tmp_path)
    assert done.returncode == 2 and "solver.method" in one_error_line(done.stderr, "run")


def test_paths_relative_to_the_job_file_and_nothing_written_elsewhere(tmp_path):
    lab = tmp_path / "lab" / "session1"
    lab.mkdir(parents=True)
    files = make_job_files(lab, np.random.default_rng(2))
    job = files.write_job("job.toml", output={"path": "volumes/out.zarr"})
    elsewhere, home, scratch = (tmp_path / name for name in ("cwd", "home", "tmp"))
    for folder in (elsewhere, home, scratch):
        folder.mkdir()
    # The child's home, caches and temporary folder are inside the snapshot too.
    env = {**os.environ, "HOME": str(home), "TMPDIR": str(scratch),
           "XDG_CACHE_HOME": str(home / ".cache"), "XDG_CONFIG_HOME": str(home / ".config"),
           "MPLCONFIGDIR": str(home / ".mpl")}
    env.pop("DASK_CONFIG", None)
    before = tree_snapshot(tmp_path)
    relative_job = os.path.relpath(job, elsewhere)  # "../lab/session1/job.toml"
    done = run_cli(["run", relative_job, "--no-progress"], cwd=elsewhere, env=env)
    assert done.returncode == 0, done.stderr
    changes = snapshot_changes(before, tree_snapshot(tmp_path))
    assert changes["deleted"] == [] and changes["modified"] == []
    store = "lab/session1/volumes/out.zarr"
    outside = [p for p in changes["created"]
               if p != "lab/session1/volumes" and not p.startswith(store)]
    assert outside == [], outside
    assert f"{store}/zarr.json" in changes["created"]
    # status reads, export writes just its file (again from elsewhere, relative paths).
    before = tree_snapshot(tmp_path)
    store_arg = os.path.relpath(lab / "volumes" / "out.zarr", elsewhere)
    assert run_cli(["status", store_arg], cwd=elsewhere, env=env).returncode == 0
    assert tree_snapshot(tmp_path) == before
    done = run_cli(["export", store_arg, "--tiff", "mip.tif", "--projection", "max"],
                   cwd=elsewhere, env=env)
    assert done.returncode == 0, done.stderr
    assert snapshot_changes(before, tree_snapshot(tmp_path))["created"] == ["cwd/mip.tif"]
    with tifffile.TiffFile(elsewhere / "mip.tif") as tf:
        assert tf.series[0].shape == (12, 24, 24)

"""The job file: TOML, checked against ``schemas/job.schema.json``, turned into frozen settings.

Unknown keys and wrong types are refused with the key's dotted path and the job file's name.
Relative paths are resolved against the job file's folder.
"""

from __future__ import annotations

import copy
import json
import math
import os
import tomllib
import warnings
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path
from typing import Any

from volrecon.errors import ConfigError
from volrecon.solvers.settings import SolverSettings

__all__ = [
    "ComputeSettings",
    "JobConfig",
    "SolverSettings",
    "dask_config_seconds",
    "job_from_dict",
    "job_schema",
    "load_job",
]

SCHEMA_PATH = Path(__file__).resolve().parent.parent / "schemas" / "job.schema.json"
#: Keys whose values are paths; the store compares their fingerprints, not their spelling.
PATH_KEYS = (("model", "path"), ("video", "path"), ("video", "dark"), ("video", "flat"),
             ("output", "path"))


@cache
def job_schema() -> dict[str, Any]:
    """The job file's JSON Schema (2020-12) as a dict (a fresh copy each call is not made)."""
    with open(SCHEMA_PATH, encoding="utf-8") as handle:
        return json.load(handle)  # type: ignore[no-any-return]


@dataclass(frozen=True)
class ComputeSettings:
    """The ``[compute]`` section: how work is spread. Never changes the results."""

    scheduler: str = "threads"
    workers: int = 1
    frames_per_task: int = 8
    device: str = "cpu"
    threads: int | None = None

    @property
    def is_distributed(self) -> bool:
        """True for a dask.distributed scheduler (LocalCluster or an address)."""
        return self.scheduler == "local-cluster" or "://" in self.scheduler


@dataclass(frozen=True)
class JobConfig:
    """A validated job.

    Attributes
    ----------
    source : str
        Where the job came from (the job file's path), for messages.
    document : dict
        The validated job document with defaults filled in, paths as written.
    base_dir : Path
        Folder that relative paths are relative to.
    model_path, video_path, output_path : Path
        Resolved paths (`video_path` may be a glob pattern).
    video_component : str
        Array path inside a zarr store or an HDF5 file (``[video] dataset``).
    dark_path, flat_path : Path or None
        Calibration images.
    frames : tuple of int or None
        Half-open video frame range.
    binning : int
        Lateral binning of raw frames.
    hot_pixels : {"keep", "repair"}
        What to do with hot pixels found in the video.
    time_interval_s : float
        Frame interval.
    max_projections : bool
        Write max projections.
    compression_level : int
        zstd level of the output.
    shard_frames : int
        Frames per file of the output's frame arrays (``[output] shard_frames``, default the
        chain length, 32 for one-frame chains); a divisor or a multiple of the chain length.
    levels : int or "auto"
        Resolution levels of the output (``[output] levels``; "auto" resolves against the
        model's grid when the store is created, :func:`volrecon.io.pyramid_levels`).
    dtype : str
        Element type of the output's frame arrays ("float32" or "float16").
    solver : SolverSettings
    compute : ComputeSettings
    """

    source: str
    document: dict[str, Any] = field(repr=False)
    base_dir: Path
    model_path: Path
    video_path: Path
    output_path: Path
    video_component: str = ""
    dark_path: Path | None = None
    flat_path: Path | None = None
    frames: tuple[int, int] | None = None
    binning: int = 1
    hot_pixels: str = "keep"
    time_interval_s: float = 1.0
    max_projections: bool = False
    compression_level: int = 3
    shard_frames: int = 32
    levels: int | str = "auto"
    dtype: str = "float32"
    solver: SolverSettings = field(default_factory=SolverSettings)
    compute: ComputeSettings = ComputeSettings()

    def settings(self) -> dict[str, Any]:
        """The job's settings as the store records them: every section but ``[compute]``.

        Paths are kept as written in the job file (provenance); a resumed job is compared
        through :meth:`comparable_settings`, where input paths are replaced by fingerprints.
        """
        return {key: copy.deepcopy(value) for key, value in self.document.items()
                if key != "compute"}

    def comparable_settings(self, fingerprints: dict[str, str]) -> dict[str, Any]:
        """Settings without path spellings: each input path becomes its file's fingerprint."""
        settings = self.settings()
        for section, key in PATH_KEYS:
            if key in settings.get(section, {}):
                if section == "output":
                    del settings[section][key]
                else:
                    settings[section][key] = fingerprints.get(f"{section}.{key}", "")
        return settings

    def level_count(self, shape_zyx: tuple[int, int, int]) -> int:
        """Resolution levels of the output for volumes of `shape_zyx` ("auto": down to the
        first level whose longer side is at most 64 px)."""
        from volrecon.io.ome_zarr import pyramid_levels

        return pyramid_levels(shape_zyx[1:]) if self.levels == "auto" else int(self.levels)

    def with_compute(self, **changes: Any) -> JobConfig:
        """A copy with other ``[compute]`` settings (checked; None removes a key)."""
        document = copy.deepcopy(self.document)
        document["compute"].update(changes)
        document["compute"] = {k: v for k, v in document["compute"].items() if v is not None}
        return job_from_dict(document, base_dir=self.base_dir, source=self.source)


def load_job(path: str | os.PathLike[str]) -> JobConfig:
    """Read and validate a TOML job file.

    Parameters
    ----------
    path : str or path
        The job file; relative paths inside it are relative to its folder.

    Returns
    -------
    JobConfig

    Raises
    ------
    ConfigError
        If the file is missing, not valid TOML, or breaks the schema (unknown key, wrong type,
        value out of range), naming the key.
    """
    job_path = Path(path)
    try:
        text = job_path.read_text(encoding="utf-8-sig")  # a byte-order mark is allowed
    except OSError as exc:
        raise ConfigError(f"{job_path}: cannot read the job file ({exc.strerror}); check the "
                          "path of the job file") from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{job_path}: not a text file (byte {exc.start} is not UTF-8); give "
                          "a TOML job file (see workflows/workstation.toml)") from exc
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{job_path}: not valid TOML ({exc}); fix the syntax") from exc
    return job_from_dict(document, base_dir=job_path.resolve().parent, source=str(job_path))


def job_from_dict(document: dict[str, Any], *, base_dir: str | os.PathLike[str] | None,
                  source: str = "job") -> JobConfig:
    """Validate a job given as a dict (the parsed TOML) and resolve its paths.

    Parameters
    ----------
    document : dict
        Sections ``model``, ``video``, ``solver``, ``output``, ``compute``.
    base_dir : str or path or None
        Folder that relative paths are relative to (the job file's). None: the current folder.
    source : str
        Name used in messages.

    Raises
    ------
    ConfigError
        If the document breaks the schema or its frame range is empty.
    """
    _validate(document, source)
    _refuse_non_finite(document, source)
    document = _with_defaults(copy.deepcopy(document), job_schema())
    base = Path(base_dir) if base_dir is not None else Path.cwd()
    video, output = document["video"], document["output"]
    frames = None
    if "frames" in video:
        start, stop = video["frames"]
        if stop <= start:
            raise ConfigError(
                f"{source}: key 'video.frames' is [{start}, {stop}]; stop must be larger than "
                "start (a half-open range)"
            )
        frames = (int(start), int(stop))
    compute = document["compute"]
    solver = SolverSettings(**document["solver"])
    chain = solver.chain_frames
    shard_frames = int(output.get("shard_frames", chain if chain > 1 else 32))
    if chain % shard_frames and shard_frames % chain:
        raise ConfigError(
            f"{source}: key 'output.shard_frames' is {shard_frames} but solver.chain_frames is "
            f"{chain}; use a divisor or a multiple of {chain} (one task must own every frame of "
            "a shard)"
        )
    return JobConfig(
        source=source,
        document=document,
        base_dir=base,
        model_path=_resolve(base, document["model"]["path"]),
        video_path=_resolve(base, video["path"]),
        output_path=_resolve(base, output["path"]),
        video_component=_video_dataset(video, source),
        dark_path=_resolve(base, video["dark"]) if "dark" in video else None,
        flat_path=_resolve(base, video["flat"]) if "flat" in video else None,
        frames=frames,
        binning=int(video["binning"]),
        hot_pixels=str(video["hot_pixels"]),
        time_interval_s=float(output["time_interval_s"]),
        max_projections=bool(output["max_projections"]),
        compression_level=int(output["compression_level"]),
        shard_frames=shard_frames,
        levels=output["levels"] if output["levels"] == "auto" else int(output["levels"]),
        dtype=str(output["dtype"]),
        solver=solver,
        compute=ComputeSettings(**{k: compute[k] for k in compute}),
    )


def _video_dataset(video: dict[str, Any], source: str) -> str:
    """``[video] dataset``, or its older name ``component`` (kept working, with a warning).

    One key names an array inside a container for HDF5 files and zarr stores alike; the job
    file is not rewritten, so a store begun with ``component`` resumes unchanged.
    """
    if "component" not in video:
        return str(video.get("dataset", ""))
    if "dataset" in video:
        raise ConfigError(f"{source}: keys 'video.dataset' and 'video.component' are both set; "
                          "keep dataset only (component is its older name)")
    warnings.warn(f"{source}: key 'video.component' is renamed; write dataset = "
                  f"{video['component']!r} in [video]", FutureWarning, stacklevel=3)
    return str(video["component"])


def _resolve(base: Path, text: str) -> Path:
    path = Path(os.path.expanduser(text))
    return path if path.is_absolute() else base / path


def _with_defaults(document: dict[str, Any], schema: dict[str, Any]) -> dict[str, Any]:
    """Fill each schema default into `document` (sections included), recursively."""
    for key, sub in schema.get("properties", {}).items():
        if sub.get("type") == "object":
            if key not in document and key not in schema.get("required", []):
                document[key] = {}
            if key in document:
                _with_defaults(document[key], sub)
        elif key not in document and "default" in sub:
            document[key] = copy.deepcopy(sub["default"])
    return document


def _refuse_non_finite(value: Any, source: str, where: str = "") -> None:
    """TOML allows ``nan`` and ``inf``, which pass every numeric bound of the schema."""
    if isinstance(value, dict):
        for key, item in value.items():
            _refuse_non_finite(item, source, f"{where}.{key}" if where else str(key))
    elif isinstance(value, list):
        for item in value:
            _refuse_non_finite(item, source, where)
    elif isinstance(value, float) and not math.isfinite(value):
        raise ConfigError(f"{source}: key '{_dotted([where])}' is {value}; use a finite number")


def _dotted(parts: Any) -> str:
    """A key path for messages, control characters escaped so the message stays one line."""
    text = ".".join(str(p) for p in parts)
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def _validate(document: Any, source: str) -> None:
    import jsonschema

    validator = jsonschema.Draft202012Validator(job_schema())
    errors = sorted(validator.iter_errors(document),
                    key=lambda e: (list(map(str, e.absolute_path)), e.validator))
    if not errors:
        return
    error = errors[0]
    where = _dotted(error.absolute_path)
    if error.validator == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        unknown = sorted(set(error.instance) - set(allowed))
        key = _dotted([*error.absolute_path, unknown[0]]) if unknown else where
        raise ConfigError(
            f"{source}: unknown key '{key}'; allowed here: {', '.join(allowed)} "
            "(see schemas/job.schema.json)"
        )
    if error.validator == "required":
        missing = [name for name in error.validator_value if name not in error.instance]
        key = _dotted([*error.absolute_path, missing[0]]) if missing else where
        raise ConfigError(f"{source}: required key '{key}' is missing; add it to the job file")
    if error.validator == "type":
        expected = error.validator_value
        raise ConfigError(
            f"{source}: key '{where}' must be of type {expected}; got {error.instance!r}"
        )
    if error.validator == "anyOf" and where == "solver.iterations":
        raise ConfigError(f"{source}: key 'solver.iterations' must be an integer of at least 1 "
                          f"or \"auto\"; got {error.instance!r}; fix the job file")
    if error.validator == "pattern" and where == "compute.scheduler":
        raise ConfigError(
            f"{source}: key 'compute.scheduler' is {error.instance!r}; use threads, processes, "
            "synchronous, local-cluster or a tcp://host:port address"
        )
    message = error.message.replace("\n", " ")
    raise ConfigError(f"{source}: key '{where or '(top level)'}': {message}; fix the job file")


def dask_config_seconds(key: str, default: str) -> float:
    """A duration from dask's config (``volrecon.<name>``: a job's environment sets it as
    ``DASK_VOLRECON__<NAME>=5m``, also on every worker), in seconds.

    Raises
    ------
    ConfigError
        If the value is not a duration of at least 0.
    """
    import dask.config
    from dask.utils import parse_timedelta

    value = dask.config.get(key, default)
    try:
        seconds = parse_timedelta(value, default="s")
    except (TypeError, ValueError, KeyError):
        seconds = None
    if seconds is None or seconds < 0:
        raise ConfigError(f"dask config '{key}' is {value!r}; give a duration such as "
                          "\"60s\"")
    return float(seconds)

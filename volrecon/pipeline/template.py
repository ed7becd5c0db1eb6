"""``volrecon init``: a commented job file with every key of the schema and its default."""

from __future__ import annotations

import os
import textwrap
from pathlib import Path
from typing import Any

from volrecon.errors import ConfigError, OutputWriteError
from volrecon.pipeline.config import job_schema

__all__ = ["EXAMPLES", "job_template", "write_job_template"]

#: Values written for required keys that have no default (edit them).
EXAMPLES: dict[tuple[str, str], Any] = {
    ("model", "path"): "psf-model",
    ("video", "path"): "raw/video.tif",
    ("output", "path"): "volumes.zarr",
    ("output", "time_interval_s"): 0.05,
}


def _toml_value(value: Any) -> str:
    import tomli_w

    return tomli_w.dumps({"v": value}).split("=", 1)[1].strip()


def job_template() -> str:
    """The text of a job file: each section and key of ``schemas/job.schema.json`` with its
    description as a comment; keys with a default are set to it, required keys to an example
    to edit, optional keys without a default are commented out.

    Examples
    --------
    >>> import tomllib
    >>> document = tomllib.loads(job_template())
    >>> document["solver"]["iterations"], document["model"]["path"]
    ('auto', 'psf-model')
    """
    schema = job_schema()
    lines = ["# A volrecon job file written by 'volrecon init'. Paths are relative to this file.",
             "# Every key is described in schemas/job.schema.json; edit the marked values.",
             "# Reconstructions are research images, not for diagnosis."]
    for section, spec in schema["properties"].items():
        required = set(spec.get("required", ()))
        lines += ["", f"[{section}]"]
        description = spec.get("description")
        if description:
            lines += [f"# {line}" for line in textwrap.wrap(description, 94)]
        for key, prop in spec["properties"].items():
            lines += [f"# {line}" for line in textwrap.wrap(prop.get("description", ""), 94)]
            if "default" in prop:
                lines.append(f"{key} = {_toml_value(prop['default'])}")
            elif key in required:
                example = EXAMPLES.get((section, key), "")
                lines.append(f"{key} = {_toml_value(example)}  # <- edit")
            else:
                lines.append(f"# {key} =")
    return "\n".join(lines) + "\n"


def write_job_template(path: str | os.PathLike[str]) -> Path:
    """Write :func:`job_template` to `path` (a folder gets ``job.toml``); never overwrites.

    Raises
    ------
    ConfigError
        If the file exists already.
    OutputWriteError
        If it cannot be written.
    """
    target = Path(path)
    if target.is_dir() or os.fspath(path).endswith(("/", os.sep)):
        target = target / "job.toml"
    if target.exists():
        raise ConfigError(f"{target}: exists already; give another name or folder (volrecon "
                          "init never overwrites a job file)")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(job_template(), encoding="utf-8")
    except OSError as exc:
        raise OutputWriteError(f"{target}: cannot write the job file ({exc.strerror}); choose "
                               "a folder you can write to") from exc
    return target

"""Write the tuned settings into a copy of the job file (or the file itself).

Only ``[solver] tv``, ``l1``, ``iterations`` (and ``temporal_weight`` when it was swept)
change; every other key stays as written (defaults are not filled in). Relative paths are
rewritten so they still point at the same files from the new file's folder. The TOML text is
edited in place with tomlkit, so the file's comments, key order and layout survive; a header
comment records where the values came from (replacing the header of an earlier tuning run).
The result is checked against ``schemas/job.schema.json`` before anything is written, and
written atomically (a temporary file, then a rename), so a failed write never leaves half a
job file.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

import tomlkit
from tomlkit.exceptions import TOMLKitError

from volrecon.errors import ConfigError, InputFileError
from volrecon.io.files import replacing

if TYPE_CHECKING:
    from volrecon.tune.tune import TuneResult

__all__ = ["check_output_path", "tuned_document", "write_tuned_job"]

#: First line of the header comment; an earlier header starting so is replaced.
HEADER_START = "# Solver settings chosen by `volrecon tune`"


def check_output_path(path: str | os.PathLike[str], *, what: str = "--out",
                      folder: bool = False) -> Path:
    """Refuse an output path that cannot be written later (checked before any work).

    Parameters
    ----------
    path : str or path
        A file to write (or, with `folder`, a folder to create).
    what : str
        The option's name, for the message.
    folder : bool
        `path` is a folder (it may exist as one, but not as a file).

    Raises
    ------
    ConfigError
        If its parent folder is missing, or it exists as the wrong kind.
    """
    out = Path(path)
    if folder and out.exists() and not out.is_dir():
        raise ConfigError(f"{what} {out}: is a file; give a folder for the report")
    if not folder and out.is_dir():
        raise ConfigError(f"{what} {out}: is a folder; give a file name such as tuned.toml")
    if not out.parent.is_dir():
        raise ConfigError(f"{what} {out}: the folder {out.parent} does not exist; create it "
                          "or choose another path")
    return out


def tuned_document(result: TuneResult, *, directory: str | os.PathLike[str] | None = None
                   ) -> dict[str, Any]:
    """The job document with the tuned ``[solver]`` values, as plain dicts.

    Parameters
    ----------
    result : TuneResult
    directory : str or path, optional
        Folder the new job file will live in; relative paths are rewritten for it. Default:
        the original job's folder (paths unchanged).

    Returns
    -------
    dict
        A new document (the job file is not modified).

    Raises
    ------
    InputFileError
        If the original job file can no longer be read.
    """
    return _tuned_toml(result, directory=directory).unwrap()


def _tuned_toml(result: TuneResult, *, directory: str | os.PathLike[str] | None = None
                ) -> tomlkit.TOMLDocument:
    """The job document with the tuned ``[solver]`` values.

    Parameters
    ----------
    result : TuneResult
    directory : str or path, optional
        Folder the new job file will live in; relative paths are rewritten for it. Default:
        the original job's folder (paths unchanged).

    Returns
    -------
    tomlkit.TOMLDocument
        The job file's text, parsed with its comments, with the new values (the job file
        itself is not modified).

    Raises
    ------
    InputFileError
        If the original job file can no longer be read.
    """
    from volrecon.pipeline.config import PATH_KEYS

    job = result.job
    source = Path(job.source)
    if source.is_file():
        try:
            document = tomlkit.parse(_without_header(source.read_text(encoding="utf-8")))
        except (OSError, TOMLKitError) as exc:
            raise InputFileError(f"{source}: cannot read the job file again ({exc}); it "
                                 "changed during tuning") from exc
    else:
        document = tomlkit.document()
        document.update(job.document)
    if "solver" not in document:
        document["solver"] = tomlkit.table()
    solver: Any = document["solver"]
    solver["tv"] = result.tv
    solver["l1"] = result.l1
    solver["iterations"] = result.iteration_count
    if result.temporal_weight is not None:
        solver["temporal_weight"] = result.temporal_weight
    target = Path(directory).resolve() if directory is not None else job.base_dir.resolve()
    if target != job.base_dir.resolve():
        for section, key in PATH_KEYS:
            table: Any = document.get(section, {})
            text = table.get(key)
            if isinstance(text, str) and not Path(os.path.expanduser(text)).is_absolute():
                absolute = (job.base_dir / text).resolve()
                table[key] = Path(os.path.relpath(absolute, target)).as_posix()
    return document


def _without_header(text: str) -> str:
    """`text` without the header comment of an earlier tuning run (and its blank line)."""
    lines = text.splitlines(keepends=True)
    if not lines or not lines[0].startswith(HEADER_START):
        return text
    end = 1
    while end < len(lines) and lines[end].startswith("#   "):
        end += 1
    if end < len(lines) and not lines[end].strip():
        end += 1
    return "".join(lines[end:])


def write_tuned_job(result: TuneResult, path: str | os.PathLike[str], *,
                    report: str | os.PathLike[str] | None = None) -> Path:
    """Write the job file with the tuned settings to `path` (may be the job file itself).

    Parameters
    ----------
    result : TuneResult
    path : str or path
        The file to write (TOML).
    report : str or path, optional
        The report folder, named in the header comment.

    Returns
    -------
    Path
        `path`.

    Raises
    ------
    ConfigError
        If the tuned document breaks the job schema (it is not written then).
    InputFileError
        If `path` cannot be written.
    """
    from volrecon.pipeline.config import job_from_dict

    out = Path(path)
    document = _tuned_toml(result, directory=out.parent)
    job_from_dict(document.unwrap(), base_dir=out.parent.resolve(), source=str(out))
    choice = result.choice
    frames = ", ".join(map(str, result.site_frames))
    how = (f"by {choice.criterion}" if result.confirmation == "kept" else
           f"(the sweep chose tv = {result.cells[choice.index].tv:.3g}, l1 = "
           f"{result.cells[choice.index].l1:.3g} by {choice.criterion}, but tv = l1 = 0 scored "
           f"better at {result.iteration_count} iterations)")
    header = [
        f"{HEADER_START} on video frames {frames} of {result.job.source}:",
        f"#   tv = {result.tv:g}, l1 = {result.l1:g} {how}; weight unit u = "
        f"{result.weight_unit:.4g}.",
        f"#   iterations = {result.iteration_count}: within "
        f"{result.iterations.tolerance:g} of the converged result"
        + ("" if result.iterations.within_tolerance else " NOT reached; the largest count "
           "tried") + ".",
    ]
    if result.temporal is not None:
        header.append(f"#   temporal_weight = {result.temporal.weight:g}: held-out odd frames "
                      f"of runs of {result.temporal.run_length}, one-standard-error rule.")
    if report is not None:
        header.append(f"#   Report: {Path(report)}")
    text = "\n".join(header) + "\n\n" + tomlkit.dumps(document)
    try:
        with replacing(out) as temporary:
            temporary.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputFileError(f"{out}: cannot write the tuned job file ({exc.strerror}); "
                             "choose another --out") from exc
    return out

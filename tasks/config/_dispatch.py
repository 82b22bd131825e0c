"""Config of the dispatch stage: templates, command, runner, retries and timeouts."""

from __future__ import annotations

import os
import re
import shlex
from pathlib import PurePosixPath
from typing import Annotated, Any, Literal

from pydantic import (
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationInfo,
    field_validator,
    model_validator,
)

from ._base import _Model


# --------------------------------------------------------------------------------------------
# dispatch stage
# --------------------------------------------------------------------------------------------
class LocalClusterSettings(_Model):
    n_workers: int = Field(2, ge=1, description="Worker processes of the local Dask cluster.")
    threads_per_worker: int = Field(1, ge=1, description="Threads per Dask worker.")


class DaskSettings(_Model):
    address: str | None = Field(
        None, description="Address of a running Dask scheduler, e.g. 'tcp://10.0.0.5:8786'."
    )
    local_cluster: LocalClusterSettings | None = Field(
        None, description="Start a Dask LocalCluster with these settings."
    )

    @model_validator(mode="after")
    def _one(self) -> DaskSettings:
        if (self.address is None) == (self.local_cluster is None):
            raise ValueError("give exactly one of 'address' or 'local_cluster'")
        return self


class DaskRunner(_Model):
    """Run on a Dask cluster."""

    dask: DaskSettings = Field(description="Dask cluster to run on.")


class BatchSettings(_Model):
    submit: list[str] = Field(
        default_factory=lambda: ["sbatch"],
        description="Submit command (argv) that takes the job script path as last argument.",
    )
    template: str | None = Field(
        None,
        description="Job script template (Jinja2), relative to the config; a Slurm script is "
        "built in.",
    )
    directives: list[str] = Field(
        default_factory=list,
        description="Extra scheduler directives written at the top of each job script, e.g. "
        "'--time=04:00:00'.",
    )
    poll_interval: float = Field(5.0, gt=0, description="Seconds between completion checks (s).")
    max_wait: float | None = Field(
        None, gt=0, description="Give up on a job after this long (s); no limit when omitted."
    )
    cancel: list[str] = Field(
        default_factory=lambda: ["scancel"],
        description="Cancel command (argv) that takes the job id as last argument.",
    )


class BatchRunner(_Model):
    """Run through a batch scheduler: one job script per run."""

    batch: BatchSettings = Field(description="Batch scheduler settings.")


_RUNNER_TAGS = ("local", "dask", "batch")


def _runner_kind(v: Any) -> str | None:
    # A tag per shape keeps a bad runner to one error message instead of one per union member.
    if isinstance(v, str):
        return "local"
    keys = set(v) if isinstance(v, dict) else set(getattr(v, "model_fields_set", ()))
    for kind in ("dask", "batch"):
        if kind in keys:
            return kind
    return None


def _argv_list(v: Any) -> Any:
    if isinstance(v, str):
        raise ValueError(
            "the solver command must be a list of arguments, not one shell string; "
            f"for example {shlex.split(v)!r}"
        )
    return v


#: Placeholder of the command for the config file's folder (absolute), filled in when the
#: config is read from a file (``load_config``, or ``parse_config(..., config_dir=...)``).
CONFIG_DIR_PLACEHOLDER = "{config_dir}"


def _fill_config_dir(v: list[str], info: ValidationInfo) -> list[str]:
    folder = (info.context or {}).get("config_dir")
    if folder is None:  # read without its file (e.g. a saved block): left for the renderer
        return v
    return [a.replace(CONFIG_DIR_PLACEHOLDER, str(folder)) for a in v]


# Suffixes of scripts an interpreter is given by name (``python solver.py``): such an argv
# entry is a file even without a path separator.
_SCRIPT_SUFFIXES = (
    ".py", ".sh", ".bash", ".zsh", ".csh", ".ksh", ".pl", ".rb", ".r", ".jl", ".m", ".lua",
    ".js", ".tcl", ".bat", ".cmd", ".ps1",
)  # fmt: skip

_NOT_A_PATH = re.compile(r"[\s()'\";$`|&<>*?\[\]{}]")


def _posix(text: str) -> PurePosixPath:
    """``text`` as a clean relative POSIX path (``./`` and empty parts dropped)."""
    parts = [q for q in PurePosixPath(text.replace("\\", "/")).parts if q not in ("", ".")]
    return PurePosixPath(*parts) if parts else PurePosixPath(".")


def _is_absolute(text: str) -> bool:
    return text.startswith(("/", "\\", "~")) or re.match(r"^[A-Za-z]:", text) is not None


def _relative_file_in_argv(i: int, arg: str) -> str | None:
    """The relative file path an argv entry names, or None when it names none.

    An entry names a file when it has a path separator or ends in a script suffix
    (``solver.py``); for an option (``--mesh=grid/a.msh``, ``mesh=grid/a.msh``) the value
    counts. Entry 0 without a separator is a program looked up on PATH. Placeholders,
    absolute paths, URLs and text with spaces, quotes or shell characters (code given to
    ``-c``) are not checked.
    """
    if "=" in arg:
        arg = arg.split("=", 1)[1]
    elif arg.startswith("-"):
        return None
    if not arg or "://" in arg or _NOT_A_PATH.search(arg) or _is_absolute(arg):
        return None
    has_sep = "/" in arg or "\\" in arg
    if not has_sep and (i == 0 or not arg.lower().endswith(_SCRIPT_SUFFIXES)):
        return None
    return arg


def _input_entry(file: str, stage: str = "copy") -> str:
    """An ``inputs`` entry as written in YAML."""
    return f"{{file: {file}}}" if stage == "copy" else f"{{file: {file}, stage: {stage}}}"


def _dotdot_message(
    field: str, i: int, entry: str, tdir: str, folder: Any, stage: str = "copy"
) -> str:
    """Why a staging path with ``..`` is refused, and what to write instead."""
    name = PurePosixPath(entry.replace("\\", "/")).name
    at = f"dispatch.{field}[{i}]" + (".file" if field == "inputs" else "")
    where = f"{at}: path {entry!r} contains '..'"
    if field == "templates":
        return (
            f"{where}; templates are read from inside template_dir ({tdir!r}) and must stay "
            f"inside the run folder: move {name!r} under template_dir, or set template_dir "
            "to a folder that holds it"
        )
    if folder is not None:
        absolute = os.path.normpath(os.path.join(str(folder), tdir, entry))
    else:
        absolute = "ABSOLUTE_PATH"
    return (
        f"{where}; a staged file keeps its relative name, which must stay inside the run "
        f"folder: write inputs: [{_input_entry(absolute, stage)}] (staged as {name!r}) or "
        f"move the file under template_dir ({tdir!r})"
    )


def _unstaged_message(i: int, arg: str, rel: str, tdir: str, folder: Any) -> str:
    """Why a relative file in the command is refused, and what to write instead."""
    clean = str(_posix(rel))
    where = "" if rel == arg else f" (the path {rel!r})"
    beside = None if folder is None else os.path.join(str(folder), *_posix(rel).parts)
    if beside is not None and "/" not in clean and os.path.isfile(beside):
        stage = f"inputs: [{_input_entry(beside)}]"  # an absolute file: staged by base name
    elif tdir in (".", "./", ""):
        stage = f"inputs: [{_input_entry(clean)}]"
    else:
        stage = f"inputs: [{_input_entry(clean)}] (a path relative to template_dir {tdir!r})"
    return (
        f"dispatch.command[{i}]: {arg!r}{where} is a relative path, but the solver runs in "
        "its run folder, where no such file is staged (templates, inputs, outputs); "
        f"use {{config_dir}}/{clean} for a file next to the config, or stage it with {stage}"
    )


#: How an input file is put into a run folder (``dispatch.inputs[].stage``).
StageName = Literal["copy", "link"]


class InputFile(_Model):
    """One file put unchanged into every run folder (``dispatch.inputs``)."""

    file: str = Field(
        description="Path relative to template_dir (staged under that relative path) or "
        "absolute (staged under its base name); for stage: link it may be a folder."
    )
    stage: StageName = Field(
        "copy",
        description="'copy': a copy in each run folder, its content part of the run key; "
        "'link': a symbolic link (large meshes and tables; its content is not hashed).",
    )

    @model_validator(mode="before")
    @classmethod
    def _bare_path(cls, v: Any) -> Any:
        # `inputs: [mesh.msh]` is the common case: a copy
        return {"file": v} if isinstance(v, str) else v


class DispatchSettings(_Model):
    """Dispatch stage: input decks and solver runs."""

    template_dir: str = Field(
        ".",
        description="Folder of the deck templates and of the input files, relative to the "
        "config file.",
    )
    templates: list[str] = Field(
        min_length=1,
        description="Deck templates (Jinja2), relative to template_dir; each is rendered into "
        "the run folder under the same relative path without a trailing '.j2'.",
    )
    inputs: list[InputFile] = Field(
        default_factory=list,
        description="Files put unchanged into every run folder (meshes, tables, scripts), each "
        "{file: PATH, stage: copy | link}; a bare PATH is staged as a copy.",
    )
    constants: dict[str, Any] = Field(
        default_factory=dict, description="User constants available in the templates."
    )
    formats: dict[str, str] = Field(
        default_factory=dict,
        description="Format spec per parameter for fixed-width decks, e.g. {'log10_T': '.6e'}; "
        "shortest round-trip text by default.",
    )
    command: Annotated[list[str], Field(min_length=1)] = Field(
        description="Solver command as an argument list (never a shell string), run in the "
        "run folder; placeholders {deck} (first rendered deck), {run_dir}, {python} (the "
        "Python running winnow) and {config_dir} (the config file's folder, absolute). A "
        "relative file in it (solver.py, bin/solver) must be staged into the run folder "
        "(templates, inputs); a file next to the config is {config_dir}/solver.py."
    )
    env: dict[str, str] = Field(
        default_factory=dict, description="Extra environment variables for the solver."
    )
    outputs: list[str] = Field(
        default_factory=list,
        description="Output files (relative to the run folder) a successful run must leave.",
    )
    timeout: float = Field(3600.0, gt=0, description="Wall-time limit of one attempt (s).")
    retries: int = Field(0, ge=0, le=20, description="Extra attempts after a failed one.")
    retry_delay: float = Field(0.0, ge=0, description="Pause before a retry (s).")
    concurrency: int = Field(2, ge=1, le=1024, description="Runs at the same time.")
    runner: Annotated[
        Annotated[Literal["local"], Tag("local")]
        | Annotated[DaskRunner, Tag("dask")]
        | Annotated[BatchRunner, Tag("batch")],
        Discriminator(
            _runner_kind,
            custom_error_type="runner_kind",
            custom_error_message="expected 'local', {dask: {address | local_cluster}} or "
            "{batch: {submit, template, directives, poll_interval, max_wait, cancel}}",
        ),
    ] = Field("local", description="'local' processes, {dask: ...} or {batch: ...}.")

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    @property
    def copy_files(self) -> list[str]:
        """The ``inputs`` staged as copies, in order."""
        return [f.file for f in self.inputs if f.stage == "copy"]

    @property
    def link_files(self) -> list[str]:
        """The ``inputs`` staged as symbolic links, in order."""
        return [f.file for f in self.inputs if f.stage == "link"]

    _check_command = field_validator("command", mode="before")(_argv_list)
    _config_dir = field_validator("command", mode="after")(_fill_config_dir)

    @model_validator(mode="after")
    def _staged_paths(self, info: ValidationInfo) -> DispatchSettings:
        """Staging paths that stay in the run folder; relative files of the command staged.

        The solver's working folder is its run folder, so ``["{python}", "solver.py"]``
        with solver.py next to the config would fail in every run.
        """
        folder = (info.context or {}).get("config_dir")
        tdir = self.template_dir
        root = None  # the template folder, when it is known without the config's folder
        if _is_absolute(tdir) or folder is not None:
            root = _posix(os.path.normpath(os.path.join(folder or "", tdir)))
        staged: set[PurePosixPath] = set()
        tails: list[PurePosixPath] = []  # absolute templates whose place in root is unknown
        for field, items in (
            ("templates", self.templates),
            ("inputs", [f.file for f in self.inputs]),
        ):
            for i, entry in enumerate(items):
                if not _is_absolute(entry):
                    dest = _posix(entry)
                    if ".." in dest.parts:
                        stage = self.inputs[i].stage if field == "inputs" else "copy"
                        raise ValueError(_dotdot_message(field, i, entry, tdir, folder, stage))
                elif field != "templates":  # an input: copied or linked under its base name
                    dest = PurePosixPath(_posix(entry).name)
                elif root is not None and _posix(entry).is_relative_to(root):
                    dest = _posix(entry).relative_to(root)  # rendered under its path in root
                else:
                    tails.append(
                        _posix(entry).with_suffix("") if entry.endswith(".j2") else _posix(entry)
                    )
                    continue
                if field == "templates" and dest.name.endswith(".j2"):
                    dest = dest.with_name(dest.name[:-3])
                staged.add(dest)
        staged |= {_posix(o) for o in self.outputs}  # written by the solver: fine to name

        def found(rel: PurePosixPath) -> bool:
            if ".." in rel.parts:
                return False
            # the file itself, a folder holding staged files, or a file in a linked folder
            if any(rel == h or rel in h.parents or h in rel.parents for h in staged):
                return True
            return any(t.parts[-len(rel.parts) :] == rel.parts for t in tails)

        for i, arg in enumerate(self.command):
            rel = _relative_file_in_argv(i, arg)
            if rel is not None and not found(_posix(rel)):
                raise ValueError(_unstaged_message(i, arg, rel, tdir, folder))
        return self


# --------------------------------------------------------------------------------------------
# collect stage
# --------------------------------------------------------------------------------------------

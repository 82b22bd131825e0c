"""Input decks of the dispatch stage: sandboxed rendering, exact numbers, confined paths.

Each chosen point becomes a run folder named by a stable id. The folder holds the decks
rendered from the user's Jinja2 templates, files copied or linked unchanged (meshes, tables)
and a small manifest ``winnow-manifest.json`` (parameters, provenance, deck hashes, key).

Templates are rendered by Jinja2's sandboxed environment with ``StrictUndefined``: a template
cannot reach Python internals through attribute tricks, and a misspelt name is an error that
names the template, the line and the name instead of an empty string in the deck.

References
----------
.. [1] Jinja2 documentation, "Sandbox": ``jinja2.sandbox.SandboxedEnvironment`` refuses access
   to unsafe attributes (names starting with an underscore, internal attributes of functions,
   methods, generators) and raises ``jinja2.exceptions.SecurityError``.
   https://jinja.palletsprojects.com/en/stable/sandbox/
"""

from __future__ import annotations

import functools
import hashlib
import math
import numbers
import os
import re
import shlex
import shutil
import tempfile
import traceback
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any

from winnow.tasks.records import RunSpec

from ._folders import (
    MANIFEST_NAME,
    OUTCOME_NAME,
    DeckError,
    _confined,
    _read_outcome_state,
    _validate_relative,
    write_json_atomic,
)
from ._runids import (
    _sha256_file,
    _validate_params,
    point_run_id,
    run_id_for,
    run_key,
    setup_digest_of,
)

__all__ = [
    "MANIFEST_NAME",
    "OUTCOME_NAME",
    "DeckError",
    "DeckSpec",
    "format_number",
    "point_run_id",
    "render_run",
    "run_id_for",
    "run_key",
    "setup_digest",
]

#: Template variables set by winnow; parameters and constants may not use these names.
RESERVED_VARIABLES = frozenset(
    {"run_id", "point_id", "point_index", "chain_index", "weight", "run_dir", "params"}
)
MANIFEST_FORMAT = "winnow-run-manifest"
MANIFEST_VERSION = 1

_PLACEHOLDER = re.compile(r"\{(deck|run_dir|run_id|config_dir)(?::([^{}]+))?\}")


# --------------------------------------------------------------------------------------------
# validation helpers
# --------------------------------------------------------------------------------------------
def _validate_command(command: Any) -> tuple[str, ...]:
    if isinstance(command, str | bytes):
        text = command.decode() if isinstance(command, bytes) else command
        if any(ch.isspace() for ch in text.strip()) or not text.strip():
            try:
                hint = shlex.split(text)
            except ValueError:
                hint = text.split()
            raise TypeError(
                f"command must be an argv list (no shell is used), e.g. {hint!r}, "
                f"not the single string {text!r}"
            )
        return (text,)
    if not isinstance(command, Sequence) or not command:
        raise TypeError(f"command must be a non-empty argv list of str, got {command!r}")
    argv = tuple(command)
    bad = [a for a in argv if not isinstance(a, str | os.PathLike)]
    if bad:
        raise TypeError(f"command items must be str, got {bad[0]!r} in {command!r}")
    return tuple(os.fspath(a) for a in argv)


# --------------------------------------------------------------------------------------------
# numbers and ids
# --------------------------------------------------------------------------------------------
def format_number(value: float, spec: str | None = None) -> str:
    """Write ``value`` as deck text.

    Parameters
    ----------
    value : float
        A finite number.
    spec : str, optional
        A format spec such as ``".6e"`` or ``"12.5f"``. ``None`` writes the shortest text that
        reads back as exactly the same float (Python's ``repr(float)``, which is the shortest
        round-trip representation).

    Returns
    -------
    str
    """
    value = float(value)
    if spec is None:
        return repr(value)
    try:
        text = format(value, spec)
    except (ValueError, TypeError) as exc:
        raise ValueError(f"format spec {spec!r} cannot format a float: {exc}") from exc
    try:
        float(text)
    except ValueError:
        raise ValueError(
            f"format spec {spec!r} writes {text!r}, which does not read back as a number"
        ) from None
    return text


class _DeckNumber(float):
    """A float that prints as its deck text but still does arithmetic in templates."""

    text: str

    def __new__(cls, value: float, text: str) -> _DeckNumber:
        obj = super().__new__(cls, value)
        obj.text = text
        return obj

    def __str__(self) -> str:
        return self.text

    def __repr__(self) -> str:
        return self.text


# --------------------------------------------------------------------------------------------
# the deck specification
# --------------------------------------------------------------------------------------------
def _as_str_tuple(value: Any, name: str) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str | os.PathLike):
        value = [value]
    try:
        items = tuple(os.fspath(v) for v in value)
    except TypeError:
        raise TypeError(f"DeckSpec.{name} must be a list of paths, got {value!r}") from None
    return items


@dataclass(frozen=True)
class DeckSpec:
    """What goes into each run folder.

    Attributes
    ----------
    templates : sequence of str
        Template files, relative to the template root. Each is rendered to the same relative
        name in the run folder, without a trailing ``.j2``. The first one is ``{deck}`` in the
        solver command.
    copies : sequence of str
        Files copied unchanged. A relative path keeps its relative name; an absolute path is
        copied under its base name.
    links : sequence of str
        Files symbolically linked unchanged (large meshes, tables), named like ``copies``.
        Linked files are not hashed: they are assumed not to change between runs.
    constants : dict
        Extra template variables shared by every run.
    formats : dict of str to str
        Format spec per parameter (e.g. ``".6e"``) for solvers that need a fixed width;
        parameters without one are written as the shortest round-trip text.
    """

    templates: Sequence[str]
    copies: Sequence[str] = ()
    links: Sequence[str] = ()
    constants: Mapping[str, Any] = field(default_factory=dict)
    formats: Mapping[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "templates", _as_str_tuple(self.templates, "templates"))
        object.__setattr__(self, "copies", _as_str_tuple(self.copies, "copies"))
        object.__setattr__(self, "links", _as_str_tuple(self.links, "links"))
        if not self.templates:
            raise ValueError("DeckSpec.templates must name at least one template file")
        if not isinstance(self.constants, Mapping):
            raise TypeError(f"DeckSpec.constants must be a mapping, got {self.constants!r}")
        if not isinstance(self.formats, Mapping):
            raise TypeError(f"DeckSpec.formats must be a mapping, got {self.formats!r}")
        for name in self.constants:
            if not isinstance(name, str) or not name.isidentifier():
                raise ValueError(f"DeckSpec.constants names must be identifiers, got {name!r}")
            if name in RESERVED_VARIABLES:
                raise ValueError(
                    f"DeckSpec.constants may not use the reserved name {name!r} "
                    f"(reserved: {sorted(RESERVED_VARIABLES)})"
                )
        for name, spec in self.formats.items():
            if not isinstance(spec, str):
                raise TypeError(f"DeckSpec.formats[{name!r}] must be a str, got {spec!r}")
            format_number(1.0, spec)  # raises on a spec that cannot write a number
        object.__setattr__(self, "constants", dict(self.constants))
        object.__setattr__(self, "formats", dict(self.formats))


# --------------------------------------------------------------------------------------------
# rendering
# --------------------------------------------------------------------------------------------
@functools.lru_cache(maxsize=16)
def _environment(template_root: Path):
    # Cached per template root; Jinja2's loader re-reads a template whose file changed.
    from jinja2 import FileSystemLoader, StrictUndefined
    from jinja2.sandbox import SandboxedEnvironment

    return SandboxedEnvironment(
        loader=FileSystemLoader(str(template_root)),
        undefined=StrictUndefined,
        keep_trailing_newline=True,
        autoescape=False,
    )


def _template_line(exc: BaseException, template_root: Path) -> tuple[str, int | None]:
    """Template file and line where a rendering error arose (Jinja2 rewrites the traceback)."""
    root = str(template_root.resolve())
    found: tuple[str, int | None] = ("", None)
    for frame in traceback.extract_tb(exc.__traceback__):
        fname = frame.filename or ""
        if fname.startswith(root) or fname == "<template>":
            found = (fname, frame.lineno)
    return found


def _render_one(env, name: str, context: dict[str, Any], template_root: Path) -> str:
    from jinja2 import TemplateNotFound, TemplateSyntaxError
    from jinja2.exceptions import SecurityError, UndefinedError

    try:
        template = env.get_template(name)
    except TemplateSyntaxError as exc:
        where = exc.filename or name
        raise DeckError(
            f"template {where!r}, line {exc.lineno}: syntax error: {exc.message}"
        ) from exc
    except TemplateNotFound as exc:
        raise DeckError(
            f"template {name!r} not found under the template root {template_root}"
        ) from exc
    try:
        return template.render(context)
    except SecurityError as exc:
        fname, line = _template_line(exc, template_root)
        raise DeckError(
            f"template {fname or name!r}, line {line}: refused by the sandbox: {exc}"
        ) from exc
    except UndefinedError as exc:
        fname, line = _template_line(exc, template_root)
        raise DeckError(f"template {fname or name!r}, line {line}: {exc}") from exc
    except TemplateNotFound as exc:
        fname, line = _template_line(exc, template_root)
        raise DeckError(
            f"template {fname or name!r}, line {line}: included template {exc.name!r} not found"
        ) from exc
    except TemplateSyntaxError as exc:
        raise DeckError(
            f"template {exc.filename or name!r}, line {exc.lineno}: syntax error: {exc.message}"
        ) from exc
    except Exception as exc:  # noqa: BLE001 - any error inside user template code
        fname, line = _template_line(exc, template_root)
        raise DeckError(
            f"template {fname or name!r}, line {line}: {type(exc).__name__}: {exc}"
        ) from exc


def _template_name(entry: str, template_root: Path) -> str:
    path = Path(entry)
    if path.is_absolute():
        root = template_root.resolve()
        try:
            rel = path.resolve().relative_to(root)
        except ValueError:
            raise DeckError(
                f"template {entry!r} is outside the template root {root}; "
                "give templates relative to the template root"
            ) from None
        return rel.as_posix()
    fix = "; move the template under the template root, or use a root that holds it"
    return str(_validate_relative(entry, what=f"template {entry!r}", fix=fix))


def _source_and_dest(entry: str, template_root: Path, what: str) -> tuple[Path, PurePosixPath]:
    path = Path(entry)
    if path.is_absolute():
        source, dest = path, PurePosixPath(path.name)
    else:
        name = PurePosixPath(entry.replace("\\", "/")).name
        fix = (
            f"; give its absolute path, {os.path.normpath(template_root.absolute() / entry)!r} "
            f"(staged as {name!r}), or move it under the template root {str(template_root)!r}"
        )
        dest = _validate_relative(entry, what=f"{what} {entry!r}", fix=fix)
        source = template_root / entry
    if not source.exists():
        raise FileNotFoundError(f"{what} {entry!r}: source file {source} does not exist")
    return source, dest


def setup_digest(decks: DeckSpec, command: Sequence[str], template_root: Path | str) -> str:
    """Digest (hex) of everything but the point that goes into a run key.

    The template sources and staged copies by content, the links by target, the constants,
    the formats and the solver command. Run ids end in its first 6 digits
    (:func:`run_id_for`), so a changed template or solver setting gives new run folders
    (a study changed that way can always be run again) while the run key still decides
    which finished runs are reused.

    Parameters
    ----------
    decks : DeckSpec
    command : sequence of str
        The solver argv as given to :func:`render_run`.
    template_root : path
        Folder the templates and relative copies/links are found in.
    """
    if not isinstance(decks, DeckSpec):
        raise TypeError(f"decks must be a DeckSpec, got {type(decks).__name__}")
    root = Path(template_root)
    templates = {}
    for entry in decks.templates:
        name = _template_name(entry, root)
        source = root / name
        templates[name] = _sha256_file(source) if source.is_file() else None
    copies = {
        str(d): _sha256_file(s)
        for s, d in (_source_and_dest(e, root, "copy") for e in decks.copies)
    }
    links = {
        str(d): str(s.resolve())
        for s, d in (_source_and_dest(e, root, "link") for e in decks.links)
    }
    return setup_digest_of(
        {
            "templates": templates,
            "copies": copies,
            "links": links,
            "constants": dict(decks.constants),
            "formats": dict(decks.formats),
            "command": list(_validate_command(command)),
        }
    )


def _fill_argv(
    argv: tuple[str, ...],
    run_dir: Path,
    run_id: str,
    decks: list[PurePosixPath],
    config_dir: Path | None = None,
) -> tuple[str, ...]:
    by_name = {str(d): d for d in decks}

    def sub(match: re.Match[str]) -> str:
        kind, arg = match.group(1), match.group(2)
        if kind == "config_dir":
            if config_dir is None:
                raise DeckError(
                    "command placeholder {config_dir}: the config file's folder is not known "
                    "here; read the config with load_config (or parse_config(..., "
                    "config_dir=...)), or give render_run(config_dir=...)"
                )
            return str(config_dir)
        if kind == "run_dir":
            return str(run_dir)
        if kind == "run_id":
            return run_id
        if arg is None:
            return str(run_dir.joinpath(*decks[0].parts))
        if arg not in by_name:
            raise ValueError(
                f"command placeholder {{deck:{arg}}} names no rendered deck; "
                f"rendered decks: {sorted(by_name)}"
            )
        return str(run_dir.joinpath(*by_name[arg].parts))

    return tuple(_PLACEHOLDER.sub(sub, a) for a in argv)


def _render_files(
    decks: DeckSpec, context: dict[str, Any], template_root: Path
) -> tuple[
    dict[PurePosixPath, bytes], list[tuple[Path, PurePosixPath]], list[tuple[Path, PurePosixPath]]
]:
    """Render every template in memory and check the copies and links; nothing is written.

    Returns the rendered decks by relative path, and the (source, destination) pairs of the
    copies and of the links.
    """
    env = _environment(template_root.resolve())
    rendered: dict[PurePosixPath, bytes] = {}
    for entry in decks.templates:
        name = _template_name(entry, template_root)
        out_name = name[:-3] if name.endswith(".j2") else name
        dest = _validate_relative(out_name, what=f"template {entry!r}")
        if dest in rendered:
            raise DeckError(f"template {entry!r}: two templates render to the same path {dest}")
        rendered[dest] = _render_one(env, name, context, template_root).encode("utf-8")
    copies = [_source_and_dest(e, template_root, "copy") for e in decks.copies]
    links = [_source_and_dest(e, template_root, "link") for e in decks.links]
    seen = set(rendered)
    for _, dest in copies + links:
        if dest in seen:
            raise DeckError(f"path {str(dest)!r} is produced twice (templates, copies, links)")
        seen.add(dest)
    for _, dest in links:
        # Nothing may be written below a linked folder: it would land outside the run folder.
        inside = sorted(str(p) for p in seen if dest in p.parents)
        if inside:
            raise DeckError(
                f"link {str(dest)!r}: paths {inside} would be written through this link, "
                "out of the run folder"
            )

    return rendered, copies, links


def _assemble(
    run_root: Path,
    rid: str,
    rendered: Mapping[PurePosixPath, bytes],
    copies: Sequence[tuple[Path, PurePosixPath]],
    links: Sequence[tuple[Path, PurePosixPath]],
    manifest: dict[str, Any],
) -> None:
    """Write the run folder under a temporary name, then move it into place.

    A render killed half-way leaves only a ``.<id>.partial-*`` folder, removed by the next
    render of that id; the run folder itself is either complete or absent.
    """
    run_dir = run_root / rid
    run_root.mkdir(parents=True, exist_ok=True)
    for stale in run_root.glob(f".{rid}.partial-*"):
        # Left by a render that was killed before its folder was moved into place.
        shutil.rmtree(stale, ignore_errors=True)
    tmp_dir = Path(tempfile.mkdtemp(prefix=f".{rid}.partial-", dir=run_root))
    try:
        for dest, data in rendered.items():
            target = _confined(tmp_dir, dest, what=f"deck {str(dest)!r}")
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(data)
        for source, dest in copies:
            target = _confined(tmp_dir, dest, what=f"copy {str(dest)!r}")
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(source, target)
        for source, dest in links:
            target = _confined(tmp_dir, dest, what=f"link {str(dest)!r}")
            target.parent.mkdir(parents=True, exist_ok=True)
            os.symlink(source.resolve(), target)
        write_json_atomic(tmp_dir / MANIFEST_NAME, manifest)
        if run_dir.exists():
            shutil.rmtree(run_dir)
        os.replace(tmp_dir, run_dir)
    except BaseException:
        shutil.rmtree(tmp_dir, ignore_errors=True)
        raise


# long: parameter checks, context and spec of one run; the writing is in _render_files/_assemble
def render_run(
    params: Mapping[str, float],
    *,
    run_id: str | None = None,
    point_index: int,
    weight: float,
    run_root: Path | str,
    decks: DeckSpec,
    command: Sequence[str],
    template_root: Path | str,
    provenance: Mapping[str, str] | None = None,
    config_dir: Path | str | None = None,
) -> RunSpec:
    """Render the run folder of one point and return its :class:`RunSpec`.

    Everything is rendered and checked in memory first; nothing is written when a template,
    a path or the command is bad. The folder is then assembled under a temporary name and
    moved into place, so a run folder is either complete or absent.

    An existing folder of the same id is handled as follows: with a journalled success under
    the same key it is left untouched (resume); without a journalled success (half-written,
    killed mid-run, failed) it is removed and rendered again; a journalled success under a
    *different* key (the decks or the command changed) is an error, so no finished run is
    ever overwritten.

    Parameters
    ----------
    params : dict of str to float
        Finite parameter values in the user's units.
    run_id : str, optional
        Folder name; default :func:`run_id_for` the point and the solver setup
        (:func:`setup_digest`), so a changed template or command gets a new folder.
    point_index : int
        Row index of the point in the chain.
    weight : float
        The point's weight in the selection.
    run_root : path
        Folder holding all run folders.
    decks : DeckSpec
    command : sequence of str
        Solver argv with placeholders ``{deck}`` (first rendered deck), ``{deck:<name>}``
        (rendered deck by relative name), ``{run_dir}``, ``{run_id}`` and ``{config_dir}``.
        It runs in the run folder: a relative file in it must be one the decks stage.
    template_root : path
        Folder the templates and relative copies/links are found in.
    provenance : dict of str to str, optional
        Ids of the study, chain, selection, ... recorded in the manifest.
    config_dir : path, optional
        Value of ``{config_dir}`` (made absolute); a study config read by ``load_config``
        has it filled in already. A command that uses it without one is a
        :class:`DeckError`.

    Returns
    -------
    RunSpec
    """
    clean = _validate_params(params)
    if isinstance(weight, bool) or not isinstance(weight, numbers.Real):
        raise TypeError(f"weight must be a real number, got {weight!r}")
    weight = float(weight)
    if not math.isfinite(weight) or weight < 0:
        raise ValueError(f"weight must be finite and >= 0, got {weight!r}")
    if not isinstance(decks, DeckSpec):
        raise TypeError(f"decks must be a DeckSpec, got {type(decks).__name__}")
    argv_template = _validate_command(command)
    if run_id is not None and (
        not isinstance(run_id, str) or not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9._-]*", run_id)
    ):
        raise ValueError(f"run_id must be letters, digits, '.', '_' or '-', got {run_id!r}")
    unknown = sorted(set(decks.formats) - set(clean))
    if unknown:
        raise ValueError(
            f"DeckSpec.formats names parameters {unknown} that are not in params {sorted(clean)}"
        )
    clash = sorted(set(clean) & (RESERVED_VARIABLES | set(decks.constants)))
    if clash:
        raise ValueError(
            f"parameter names {clash} clash with constants or reserved template variables"
        )
    prov = {str(k): str(v) for k, v in (provenance or {}).items()}
    template_root = Path(template_root)
    if not template_root.is_dir():
        raise FileNotFoundError(f"template_root {template_root} is not a folder")
    if run_id is None:
        rid = run_id_for(point_index, clean, setup_digest(decks, command, template_root))
    else:
        rid = run_id
    run_root = Path(run_root).absolute()
    run_dir = run_root / rid

    # --- render everything in memory -----------------------------------------------------
    numbers_ = {
        name: _DeckNumber(v, format_number(v, decks.formats.get(name))) for name, v in clean.items()
    }
    context: dict[str, Any] = dict(decks.constants)
    context.update(numbers_)
    context.update(
        run_id=rid,
        point_id=rid,
        point_index=int(point_index),
        chain_index=int(point_index),
        weight=_DeckNumber(weight, format_number(weight)),
        run_dir=str(run_dir),
        params=dict(numbers_),
    )
    rendered, copies, links = _render_files(decks, context, template_root)
    deck_hashes = {str(p): hashlib.sha256(b).hexdigest() for p, b in rendered.items()}
    for source, dest in copies:
        if source.is_dir():
            raise DeckError(f"copy {str(dest)!r}: source {source} is a folder; link it instead")
        deck_hashes[str(dest)] = _sha256_file(source)
    cdir = None if config_dir is None else Path(config_dir).absolute()
    argv = _fill_argv(argv_template, run_dir, rid, list(rendered), cdir)
    key = run_key(deck_hashes, argv, run_dir)
    spec = RunSpec(
        run_id=rid,
        point_index=int(point_index),
        params=clean,
        weight=weight,
        run_dir=run_dir,
        argv=argv,
        deck_hashes=deck_hashes,
        key=key,
    )

    # --- an existing folder ------------------------------------------------------------------
    if run_dir.is_symlink():
        raise DeckError(f"run folder {run_dir} is a symbolic link; refusing to write through it")
    if run_dir.exists():
        journal = _read_outcome_state(run_dir)
        if journal is not None and journal[0] == "succeeded":
            if journal[1] == key:
                return spec
            raise ValueError(
                f"run folder {run_dir} holds a finished run under another key (the decks or "
                "the command changed); use a new run root or move that folder away"
            )

    manifest = {
        "format": MANIFEST_FORMAT,
        "version": MANIFEST_VERSION,
        "run_id": rid,
        "point_index": int(point_index),
        "weight": repr(weight),
        "params": {k: repr(v) for k, v in clean.items()},
        "argv": list(argv),
        "deck_hashes": deck_hashes,
        "links": {str(d): str(s.resolve()) for s, d in links},
        "key": key,
        "provenance": prov,
    }
    _assemble(run_root, rid, rendered, copies, links, manifest)
    return spec

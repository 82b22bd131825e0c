"""Loading a study config: YAML to validated models, with messages naming file and field."""

from __future__ import annotations

import contextlib
import difflib
import hashlib
import re
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any, get_args

import yaml
from pydantic import (
    BaseModel,
    ValidationError,
)

# loading
from ._base import _NAME_PATTERN, ConfigError
from ._dispatch import _RUNNER_TAGS
from ._study import StudyConfig

# --------------------------------------------------------------------------------------------
# lists whose entries the messages name by their 'name' key instead of their position
_NAMED_LISTS = {("parameters",), ("collect", "qoi")}


def _entry_label(entry: Any, index: int) -> str:
    name = entry.get("name") if isinstance(entry, dict) else None
    if isinstance(name, str) and name:
        return f"[{name}]" if re.match(_NAME_PATTERN, name) else f"[{name!r}]"
    return f"[{index}]"


def _field_path(loc: Sequence[Any], data: Any) -> str:
    """``parameters.0.prior`` as ``parameters[log10_T].prior``, using the config's names."""
    out = ""
    node = data
    for i, part in enumerate(loc):
        head = tuple(p for p in loc[:i] if not isinstance(p, int))
        if isinstance(part, int) and head in _NAMED_LISTS:
            entry = node[part] if isinstance(node, list) and 0 <= part < len(node) else None
            out += _entry_label(entry, part)
        else:
            out += ("." if out else "") + str(part)
        if isinstance(node, dict):
            node = node.get(part)
        elif isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node):
            node = node[part]
        else:
            node = None
    return out


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """The pydantic models an annotation can hold (through Optional, unions, lists, Annotated)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    found: list[type[BaseModel]] = []
    for arg in get_args(annotation):
        found.extend(m for m in _models_in(arg) if m not in found)
    return found


def _keys_at(loc: Sequence[Any]) -> list[str]:
    """Keys the config accepts in the mapping at ``loc`` (aliases as written in YAML)."""
    models: list[type[BaseModel]] = [StudyConfig]
    for part in loc:
        if isinstance(part, int):
            continue
        nxt: list[type[BaseModel]] = []
        for m in models:
            for name, f in m.model_fields.items():
                if part in (name, f.alias):
                    nxt.extend(_models_in(f.annotation))
        models = nxt
        if not models:
            return []
    keys: list[str] = []
    for m in models:
        keys.extend(f.alias or name for name, f in m.model_fields.items())
    return sorted(set(keys))


def _unknown_key_hint(loc: Sequence[Any]) -> str:
    """A suggestion for a misspelt key ("; did you mean 'units'?"), else the accepted keys."""
    key = loc[-1] if loc else None
    if not isinstance(key, str):
        return ""
    keys = _keys_at(loc[:-1])
    if not keys:
        return ""
    close = difflib.get_close_matches(key, keys, n=3, cutoff=0.6)
    if close:
        return "; did you mean " + " or ".join(repr(k) for k in close) + "?"
    return f"; expected one of: {', '.join(keys)}"


def _value_at(data: Any, loc: Sequence[Any]) -> Any:
    for part in loc:
        if isinstance(data, dict):
            data = data.get(part)
        elif isinstance(data, list) and isinstance(part, int) and 0 <= part < len(data):
            data = data[part]
        else:
            return None
    return data


def _as_inputs(value: Any, stage: str) -> str:
    files = value if isinstance(value, list) else [value]
    if stage == "copy":
        entries = [f"{{file: {f}}}" for f in files]
    else:
        entries = [f"{{file: {f}, stage: {stage}}}" for f in files]
    return f"inputs: [{', '.join(entries)}]"


#: Keys of winnow 0.1 renamed since (issue 17 item 18): location -> (new key, what to write
#: instead). For one release the old key is refused with a message naming the new one; then
#: drop the entry and the plain unknown-key message takes over.
_RENAMED: dict[tuple[str, ...], tuple[str, Callable[[Any], str]]] = {
    ("work_dir",): ("run_root", lambda v: f"run_root: {v}"),
    ("dispatch", "copy"): ("inputs", lambda v: _as_inputs(v, "copy")),
    ("dispatch", "link"): ("inputs", lambda v: _as_inputs(v, "link")),
}


def _renamed_message(loc: tuple[Any, ...], data: Any) -> str | None:
    """The message for a key of an earlier release, or None when ``loc`` is no such key."""
    if loc not in _RENAMED:
        return None
    new, write = _RENAMED[loc]
    return f"this key of winnow 0.1 was renamed (now '{new}'); write {write(_value_at(data, loc))}"


def format_validation_error(exc: ValidationError, source: str, data: Any = None) -> str:
    """One line per problem: ``source: field.path: message (got value)``.

    ``data`` is the mapping that was validated: with it, entries of ``parameters`` and
    ``collect.qoi`` are named by their ``name`` (``parameters[log10_T].prior``) instead of
    their position. An unknown key gets the closest accepted keys as a suggestion.
    """
    lines = []
    errors = exc.errors(include_url=False)
    # an old key that was renamed: its message says what to write, so the new key's
    # "Field required" beside it would only repeat it
    renamed = {
        _RENAMED[tuple(e["loc"])][0]
        for e in errors
        if e["type"] == "extra_forbidden" and tuple(e["loc"]) in _RENAMED
    }
    for err in errors:
        if err["type"] == "missing" and len(err["loc"]) == 1 and err["loc"][0] in renamed:
            continue
        if err["type"] == "extra_forbidden":
            moved = _renamed_message(tuple(err["loc"]), data)
            if moved is not None:
                lines.append(f"{source}: {_field_path(list(err['loc']), data)}: {moved}")
                continue
        parts = list(err["loc"])
        # a tagged union adds its tag to the path (runner.dask.dask...); drop the repeat
        parts = [
            p
            for i, p in enumerate(parts)
            if not (i and parts[i - 1] == "runner" and p in _RUNNER_TAGS)
        ]
        loc = _field_path(parts, data)
        msg = err["msg"].removeprefix("Value error, ")
        got = err.get("input")
        shown = "" if err["type"] == "missing" or isinstance(got, dict) else f" (got {got!r})"
        hint = _unknown_key_hint(parts) if err["type"] == "extra_forbidden" else ""
        lines.append(f"{source}: {loc or '<top>'}: {msg}{shown}{hint}")
    return "\n".join(lines)


def parse_config(
    data: Any, *, source: str = "<config>", config_dir: str | Path | None = None
) -> StudyConfig:
    """Validate an already-parsed mapping; raise :class:`ConfigError` naming ``source``.

    ``config_dir``, the folder of the config file, fills in ``{config_dir}`` in
    ``dispatch.command`` (made absolute); without it the placeholder is left as it is.
    """
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source}: expected a mapping of settings at the top level, got {type(data).__name__}"
        )
    context = None if config_dir is None else {"config_dir": str(Path(config_dir).resolve())}
    try:
        return StudyConfig.model_validate(data, context=context)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, source, data)) from None


def load_config(
    path: str | Path, *, preprocess: Callable[[Any], Any] | None = None
) -> tuple[StudyConfig, str]:
    """Read and validate a study config file.

    Parameters
    ----------
    path : str or Path
        YAML file.
    preprocess : callable, optional
        Applied to the parsed YAML before validation (the command line uses it to expand
        references to saved Prefect blocks); a ``ValueError`` it raises becomes a
        :class:`ConfigError`.

    Returns
    -------
    config : StudyConfig
        With ``{config_dir}`` in ``dispatch.command`` replaced by the file's folder.
    text : str
        The file's text as read (it is stored, and hashed, in the run store).

    Raises
    ------
    ConfigError
        The file is missing, is not YAML, or does not validate; the message names the file,
        the field path and what was expected.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except (IsADirectoryError, UnicodeDecodeError, PermissionError) as exc:
        raise ConfigError(f"{path}: cannot read the config file ({exc})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: not valid YAML: {exc}") from None
    if preprocess is not None:
        try:
            data = preprocess(data)
        except ValueError as exc:
            raise ConfigError(str(exc)) from None
    return parse_config(data, source=str(path), config_dir=path.resolve().parent), text


def config_hash(text: str) -> str:
    """SHA-256 of a config's text (hex)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def config_schema() -> dict[str, Any]:
    """The JSON Schema of a study config."""
    return StudyConfig.model_json_schema(by_alias=True)


def resolve(config_path: str | Path, relative: str) -> Path:
    """A path from a config, resolved against the config file's folder."""
    p = Path(relative).expanduser()
    return p if p.is_absolute() else (Path(config_path).resolve().parent / p)


@contextlib.contextmanager
def importable(folder: Path) -> Iterator[None]:
    """Put ``folder`` first on the import path for the duration (user reader functions)."""
    added = str(folder) not in sys.path
    if added:
        sys.path.insert(0, str(folder))
    try:
        yield
    finally:
        if added:
            sys.path.remove(str(folder))


def model_search_path(config: StudyConfig, base_dir: Path) -> Path:
    """The folder the cheap model and user reader modules are imported from."""
    m = config.sample.model
    return resolve(base_dir / "x", m.search_path) if m is not None else Path(base_dir)

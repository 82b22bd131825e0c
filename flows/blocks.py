"""Prefect blocks: saved solver settings and run-store locations that configs can name.

Register them with ``prefect block register -m winnow.flows.blocks``. A study config may then
name a saved block instead of repeating its settings::

    dispatch: {block: cluster-fem-solver}
    store: {block: team-store}

:func:`expand_blocks` replaces such references with the saved values before the config is
validated, so a block holds exactly what the config section would.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, ClassVar

from prefect.blocks.core import Block
from pydantic import Field

from winnow.tasks.config import DispatchSettings, InputFile, StudyConfig, load_config

__all__ = ["LOGO_FILE", "RunStoreLocation", "SolverSettings", "expand_blocks", "load_study"]

_DOCS = "https://pypi.org/project/winnow/"
#: The blocks' logo ships with the package (``flows/assets/winnow-logo.png``, 256x256 px).
#: Prefect wants an http(s) address for it; set ``_logo_url`` to where it is hosted once the
#: package is published. Until then the UI shows its default icon.
LOGO_FILE = Path(__file__).with_name("assets") / "winnow-logo.png"


_DISPATCH = DispatchSettings.model_fields


def _default(name: str) -> Any:
    """The ``dispatch`` section's default for a field, so the block cannot drift from it."""
    return _DISPATCH[name].default


class SolverSettings(Block):
    """Settings of a costly solver: templates, command, runner and limits.

    Holds the same fields as the ``dispatch`` section of a study config
    (:class:`~winnow.tasks.config.DispatchSettings`; a test checks the two agree).
    :meth:`as_config` gives every field back under the section's own keys.
    """

    _block_type_name: ClassVar[str] = "winnow solver"
    _block_type_slug: ClassVar[str] = "winnow-solver"
    _documentation_url: ClassVar[str] = _DOCS
    _description: ClassVar[str] = (
        "Input deck templates, solver command, runner and limits of a costly solver run by "
        "winnow studies."
    )
    _code_example: ClassVar[str] = """
    from winnow.flows.blocks import SolverSettings

    solver = SolverSettings.load("BLOCK_NAME")
    dispatch_section = solver.as_config()
    """

    # Required here, unlike in a config (default "."): a saved solver is used by studies in
    # many folders, and "next to whichever config names the block" is never what is meant.
    template_dir: str = Field(
        description="Folder of the deck templates and of the input files (an absolute path, "
        "or relative to the study config)."
    )
    templates: list[str] = Field(
        description="Deck templates (Jinja2) relative to template_dir, rendered into every "
        "run folder."
    )
    command: list[str] = Field(
        description="Solver command as an argument list with {deck}, {run_dir} and {python} "
        "placeholders."
    )
    inputs: list[InputFile] = Field(
        default_factory=list,
        description="Files put unchanged into every run folder, each {file, stage: copy | link}.",
    )
    constants: dict[str, Any] = Field(
        default_factory=dict, description="User constants available in the templates."
    )
    formats: dict[str, str] = Field(
        default_factory=dict,
        description="Format spec per parameter for fixed-width decks, e.g. {'log10_T': "
        "'.6e'}; shortest round-trip text by default.",
    )
    env: dict[str, str] = Field(
        default_factory=dict, description="Extra environment variables for the solver."
    )
    outputs: list[str] = Field(
        default_factory=list, description="Output files a successful run must leave."
    )
    timeout: float = Field(
        _default("timeout"), gt=0, description="Wall-time limit of one attempt, in s."
    )
    retries: int = Field(
        _default("retries"), ge=0, description="Extra attempts after a failed one."
    )
    retry_delay: float = Field(
        _default("retry_delay"), ge=0, description="Pause before a retry, in s."
    )
    concurrency: int = Field(_default("concurrency"), ge=1, description="Runs at the same time.")
    runner: Any = Field(
        _default("runner"),
        description="Where runs go: 'local', {dask: {address | local_cluster}} or "
        "{batch: {submit, template, directives, poll_interval, max_wait, cancel}}.",
    )

    def as_config(self) -> dict[str, Any]:
        """The block as a ``dispatch`` config section (validated with the study config).

        Every field of :class:`~winnow.tasks.config.DispatchSettings` is given, under the key
        a config file uses for it.
        """
        data = self.model_dump(include=set(_DISPATCH))
        return {(_DISPATCH[name].alias or name): data[name] for name in _DISPATCH}


class RunStoreLocation(Block):
    """Where a study's HDF5 run store and run folders live."""

    _block_type_name: ClassVar[str] = "winnow run store"
    _block_type_slug: ClassVar[str] = "winnow-run-store"
    _documentation_url: ClassVar[str] = _DOCS
    _description: ClassVar[str] = (
        "Location of a winnow study's HDF5 run store and of its run folders."
    )
    _code_example: ClassVar[str] = """
    from winnow.flows.blocks import RunStoreLocation

    location = RunStoreLocation.load("BLOCK_NAME")
    print(location.store, location.run_root)
    """

    store: str = Field(description="Path of the HDF5 run store file.")
    run_root: str = Field(description="Folder holding one run folder per chosen point.")


def expand_blocks(data: Any, *, source: str = "<config>") -> Any:
    """Replace ``{block: NAME}`` references in a parsed config with the saved block values.

    ``dispatch: {block: NAME}`` loads a :class:`SolverSettings` block; ``store: {block: NAME}``
    loads a :class:`RunStoreLocation` block and sets both ``store`` and ``run_root``.

    Raises
    ------
    ValueError
        A reference names no saved block, or is not a mapping with only ``block``.
    """
    if not isinstance(data, dict):
        return data
    out = dict(data)
    d = out.get("dispatch")
    if isinstance(d, dict) and "block" in d:
        if set(d) != {"block"}:
            raise ValueError(
                f"{source}: dispatch: a block reference takes only 'block', got {sorted(d)}"
            )
        out["dispatch"] = _load(SolverSettings, d["block"], f"{source}: dispatch.block").as_config()
    s = out.get("store")
    if isinstance(s, dict):
        if set(s) != {"block"}:
            raise ValueError(
                f"{source}: store: expected a path or {{block: NAME}}, got keys {sorted(s)}"
            )
        loc = _load(RunStoreLocation, s["block"], f"{source}: store.block")
        out["store"] = loc.store
        out.setdefault("run_root", loc.run_root)
    return out


def _has_block_refs(data: Any) -> bool:
    return isinstance(data, dict) and any(
        isinstance(data.get(k), dict) and "block" in data[k] for k in ("dispatch", "store")
    )


def load_study(path: str | Path) -> tuple[StudyConfig, str]:
    """Read and validate a study config, expanding references to saved blocks.

    Raises
    ------
    winnow.tasks.config.ConfigError
        Naming the file and the field (or the block) at fault.
    """
    named: dict[str, Any] = {}

    def expand(data: Any) -> Any:
        if not _has_block_refs(data):
            return data
        named.update(
            {k: data[k]["block"] for k in ("dispatch", "store") if isinstance(data.get(k), dict)}
        )
        named["resolved"] = expand_blocks(data, source=str(path))
        return named["resolved"]

    config, text = load_config(path, preprocess=expand)
    if named:
        text = resolved_text(text, named.pop("resolved"), named, source=str(path))
    return config, text


def resolved_text(text: str, resolved: Any, blocks: dict[str, Any], *, source: str) -> str:
    """The config text a study records when its config names saved blocks (issue 18 item 5).

    The blocks' values at the time of the run, not their names, decide what ran: the
    recorded text is the config with every block reference replaced by the block's values
    (so editing a block makes a new revision, and a rerun repeats what was recorded), then
    the file as written, as comments.
    """
    import yaml

    names = ", ".join(f"{k}: block {v!r}" for k, v in sorted(blocks.items()))
    head = f"# winnow: {Path(source).name} with the saved blocks it names resolved ({names})\n"
    written = "".join(f"# {line}\n" for line in text.splitlines())
    body = yaml.safe_dump(resolved, sort_keys=False, allow_unicode=True)
    return f"{head}{body}# --- {Path(source).name} as written ---\n{written}"


def _load(cls: type[Block], name: Any, where: str) -> Any:
    if not isinstance(name, str) or not name:
        raise ValueError(f"{where}: expected a saved block name, got {name!r}")
    try:
        return cls.load(name)
    except ValueError as exc:
        raise ValueError(
            f"{where}: no saved {cls.get_block_type_slug()} block named {name!r} ({exc})"
        ) from None

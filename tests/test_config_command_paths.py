"""Config checks of the solver command's files and of the staging lists (tasks/config/_dispatch.py).

The solver runs with its run folder as working folder (tasks/dispatch/_process.py, ``cwd=run_dir``);
Python's subprocess documentation ("Popen constructor", ``cwd``) states that a relative
program path, and a relative file handed to it (``python solver.py``), is then taken
relative to that folder. So a relative file named in ``dispatch.command`` must be one the
decks stage into the run folder (templates, inputs) or one the solver writes
(``outputs``); the contract of the error (field, index, a fix) is issue 17 item 5.
Through the command line (exit 2, nothing written) see tests/test_bad_input.py.
"""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml
from pydantic import ValidationError

from winnow.tasks.config import DispatchSettings, load_config, parse_config


def _dispatch(command, **kw):
    return DispatchSettings(templates=kw.pop("templates", ["deck.in.j2"]), command=command, **kw)


@pytest.mark.parametrize(
    ("command", "kw"),
    [
        # a rendered template loses its .j2; copies keep their relative name
        (["{python}", "run.py", "{deck}"], {"templates": ["deck.in.j2", "run.py.j2"]}),
        (["{python}", "scripts/run.py"], {"inputs": ["scripts/run.py"]}),
        (["{python}", "./scripts/run.py"], {"inputs": [{"file": "scripts/run.py"}]}),
        # an absolute input (copied or linked) is staged under its base name
        (["bash", "run.sh"], {"inputs": ["/opt/tools/run.sh"]}),
        # a file inside a linked folder, and a folder that holds staged files
        (["solver", "--mesh", "mesh/grid.msh"], {"inputs": [{"file": "mesh", "stage": "link"}]}),
        (["solver", "sub/"], {"templates": ["sub/a.in.j2"]}),
        # written by the solver
        (["solver", "{deck}", "out/result.h5"], {"outputs": ["out/result.h5"]}),
        # not files in the run folder: modules, options, placeholders, absolute paths,
        # programs on PATH, code for -c, URLs
        (["{python}", "-m", "pkg.solver", "{deck}"], {}),
        (["solver", "-v", "{deck}", "{run_dir}/out", "{config_dir}/x.py"], {}),
        (["/usr/bin/env", "python3", "/abs/solver.py"], {}),
        (["solver.py", "{deck}"], {}),  # entry 0 without a separator: looked up on PATH
        (["python3", "-c", "import sys; print(sys.argv[1:])", "{deck}"], {}),
        (["fetch", "https://example.org/a/b.py"], {}),
    ],
)
def test_staged_or_not_a_file_is_accepted(command, kw):
    assert _dispatch(command, **kw).command == command


@pytest.mark.parametrize(
    ("command", "kw", "index", "path"),
    [
        (["{python}", "solver.py", "{deck}"], {}, 1, "solver.py"),  # the case of issue 17
        (["./solver", "{deck}"], {}, 0, "solver"),
        (["bin/solver", "{deck}"], {"inputs": ["bin/other"]}, 0, "bin/solver"),
        (["solver", "--mesh=grid/a.msh"], {}, 1, "grid/a.msh"),
        (["{python}", "../solver.py"], {}, 1, "../solver.py"),
        (["bash", "run.sh"], {"templates": ["deck.in.j2"], "inputs": ["run.sh.j2"]}, 1, "run.sh"),
    ],
)
def test_unstaged_relative_file_names_command_index_and_fix(command, kw, index, path):
    with pytest.raises(ValidationError) as exc:
        _dispatch(command, **kw)
    msg = str(exc.value)
    assert f"dispatch.command[{index}]" in msg, msg
    assert "run folder" in msg and f"{{config_dir}}/{path}" in msg, msg
    assert "inputs: [{file: " in msg, msg


@pytest.mark.parametrize("stage", ["copy", "link"])
def test_dotdot_in_inputs_names_its_field_index_and_fix(tmp_path, stage):
    entry = {"file": "../shared/mesh.msh", "stage": stage}
    data = _study(tmp_path, {"inputs": ["data/ok.txt", entry]})
    with pytest.raises(ValueError) as exc:
        load_config(data)
    msg = str(exc.value)
    assert "dispatch.inputs[1].file" in msg and "dispatch.templates" not in msg, msg
    # the fix: the file's absolute path (template_dir is "tpl" under the config's folder),
    # with the entry's own stage kept
    absolute = str(tmp_path.resolve() / "shared" / "mesh.msh")
    fix = f"{{file: {absolute}}}" if stage == "copy" else f"{{file: {absolute}, stage: link}}"
    assert f"inputs: [{fix}] (staged as 'mesh.msh')" in msg, msg
    assert "inside the run folder" in msg, msg


def test_dotdot_in_templates_names_its_index_and_fix(tmp_path):
    with pytest.raises(ValueError) as exc:
        load_config(_study(tmp_path, {"templates": ["deck.in.j2", "../up.j2"]}))
    msg = str(exc.value)
    assert "dispatch.templates[1]" in msg and "move 'up.j2' under template_dir" in msg, msg


def test_config_dir_placeholder_is_the_config_folder_absolute(tmp_path):
    cfg_path = _study(tmp_path, {"command": ["{python}", "{config_dir}/solver.py", "{deck}"]})
    cfg, _ = load_config(cfg_path)
    folder = tmp_path.resolve()
    assert cfg.dispatch.command == ["{python}", f"{folder}/solver.py", "{deck}"]
    assert Path(cfg.dispatch.command[1]).is_absolute()
    # read without its file (e.g. the text stored in a run store) it stays a placeholder
    raw = parse_config(yaml.safe_load(cfg_path.read_text()))
    assert raw.dispatch.command[1] == "{config_dir}/solver.py"
    again = parse_config(yaml.safe_load(cfg_path.read_text()), config_dir=tmp_path)
    assert again.dispatch.command == cfg.dispatch.command


def test_absolute_template_inside_root_counts_as_staged(tmp_path):
    # an absolute template path inside template_dir renders under its path there
    tpl = tmp_path / "tpl"
    command = ["{python}", "sub/run.py"]
    ok = _study(tmp_path, {"templates": [str(tpl / "sub" / "run.py.j2")], "command": command})
    assert load_config(ok)[0].dispatch.command == command
    bad = _study(tmp_path, {"templates": [str(tpl / "run.py.j2")], "command": command})
    with pytest.raises(ValueError, match=r"dispatch\.command\[1\]"):
        load_config(bad)


def _study(folder: Path, dispatch: dict) -> Path:
    """A minimal valid study config in ``folder`` with ``dispatch`` settings merged in."""
    data = {
        "study": {"name": "paths"},
        "store": "s.h5",
        "run_root": "runs",
        "budget": 2,
        "parameters": [
            {"name": "x", "units": "m", "prior": {"dist": "uniform", "low": 0, "high": 1}}
        ],
        "sample": {"import_chain": {"file": "c.npy"}},
        "dispatch": {
            "template_dir": "tpl",
            "templates": ["deck.in.j2"],
            "command": ["solver", "{deck}"],
            **dispatch,
        },
        "collect": {
            "qoi": [{"name": "q", "units": "m", "reader": {"json": {"file": "o.json", "key": "q"}}}]
        },
    }
    path = folder / "study.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path

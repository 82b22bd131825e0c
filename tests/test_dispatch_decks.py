"""Input decks: sandboxed rendering, exact numbers, confined paths, manifest, stable ids."""

from __future__ import annotations

import hashlib
import json
import math
import os
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jinja2.exceptions import SecurityError, UndefinedError

from winnow.tasks.dispatch import (
    MANIFEST_NAME,
    DeckError,
    DeckSpec,
    format_number,
    point_of_run,
    point_run_id,
    read_manifest,
    render_run,
    run_id_for,
    run_key,
    setup_digest,
    write_outcome,
)
from winnow.tasks.records import RunOutcome

COMMAND = [sys.executable, "solver.py", "{deck}"]


@pytest.fixture
def tpl(tmp_path: Path) -> Path:
    root = tmp_path / "templates"
    root.mkdir()
    (root / "main.in.j2").write_text("k = {{ k }}\nid = {{ run_id }}\nw = {{ weight }}\n")
    return root


def _render(tpl: Path, run_root: Path, params=None, **kw):
    decks = kw.pop("decks", DeckSpec(["main.in.j2"]))
    return render_run(
        params if params is not None else {"k": 1.5e-4},
        point_index=kw.pop("point_index", 3),
        weight=kw.pop("weight", 0.25),
        run_root=run_root,
        decks=decks,
        command=kw.pop("command", COMMAND),
        template_root=tpl,
        **kw,
    )


# --------------------------------------------------------------------------------------------
# sandbox and strict undefined
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "body",
    [
        "{{ ''.__class__.__mro__ }}",
        "{{ k.__class__.__subclasses__() }}",
        "{{ params.items.__self__ }}",
    ],
)
def test_sandbox_blocks_attribute_tricks(tpl, tmp_path, body):
    # Jinja2 docs, "Sandbox": attributes starting with an underscore and internal attributes of
    # functions/methods are unsafe; using them raises jinja2.exceptions.SecurityError.
    (tpl / "evil.j2").write_text(body)
    with pytest.raises(DeckError, match="sandbox") as info:
        _render(tpl, tmp_path / "runs", decks=DeckSpec(["evil.j2"]))
    assert isinstance(info.value.__cause__, SecurityError)
    assert "evil.j2" in str(info.value)
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())


def test_undefined_name_reports_template_line_and_name(tpl, tmp_path):
    (tpl / "typo.in.j2").write_text("a = {{ k }}\nb = 1\nc = {{ kk }}\n")
    with pytest.raises(DeckError) as info:
        _render(tpl, tmp_path / "runs", decks=DeckSpec(["main.in.j2", "typo.in.j2"]))
    msg = str(info.value)
    assert isinstance(info.value.__cause__, UndefinedError)
    assert "typo.in.j2" in msg and "line 3" in msg and "'kk'" in msg
    # Nothing written: the first template rendered fine but no folder may appear.
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())


def test_syntax_error_reports_template_and_line(tpl, tmp_path):
    (tpl / "bad.j2").write_text("ok\n{% if k %}\nno endif\n")
    with pytest.raises(DeckError, match=r"bad\.j2.*line \d+.*syntax error"):
        _render(tpl, tmp_path / "runs", decks=DeckSpec(["bad.j2"]))


def test_include_stays_inside_template_root(tpl, tmp_path):
    (tmp_path / "secret.txt").write_text("secret")
    (tpl / "inc.j2").write_text("{% include '../secret.txt' %}")
    with pytest.raises(DeckError, match="not found"):
        _render(tpl, tmp_path / "runs", decks=DeckSpec(["inc.j2"]))


# --------------------------------------------------------------------------------------------
# numbers
# --------------------------------------------------------------------------------------------
@settings(max_examples=200, deadline=None)
@given(st.floats(allow_nan=False, allow_infinity=False))
def test_numbers_round_trip_exactly(value):
    # Python docs (tutorial "Floating-Point Arithmetic", repr of float): repr gives the
    # shortest string that reads back as the same float.
    text = format_number(value)
    assert float(text) == value
    assert math.copysign(1.0, float(text)) == math.copysign(1.0, value)


@settings(max_examples=60, deadline=None)
@given(st.floats(allow_nan=False, allow_infinity=False, min_value=-1e300, max_value=1e300))
def test_rendered_deck_reproduces_value(tmp_path_factory, value):
    root = tmp_path_factory.mktemp("tpl")
    (root / "d.j2").write_text("{{ k }}")
    spec = render_run(
        {"k": value},
        point_index=0,
        weight=1.0,
        run_root=root / "runs",
        decks=DeckSpec(["d.j2"]),
        command=["solver", "{deck}"],
        template_root=root,
    )
    assert float((spec.run_dir / "d").read_text()) == value


def test_format_spec_per_parameter_and_arithmetic(tpl, tmp_path):
    (tpl / "fmt.j2").write_text("{{ k }} {{ e }} {{ (e * 2) }}")
    spec = _render(
        tpl,
        tmp_path / "runs",
        params={"k": 0.1, "e": 2.5},
        decks=DeckSpec(["fmt.j2"], formats={"k": "12.4e"}),
    )
    # format(0.1, "12.4e") == "  1.0000e-01" (Python format-spec mini-language)
    assert (spec.run_dir / "fmt").read_text() == "  1.0000e-01 2.5 5.0"


@pytest.mark.parametrize(
    ("params", "exc"),
    [
        ({"k": float("nan")}, ValueError),
        ({"k": float("inf")}, ValueError),
        ({"k": "1.0"}, TypeError),
        ({"k": True}, TypeError),
        ({}, ValueError),
    ],
)
def test_parameters_must_be_finite_numbers(tpl, tmp_path, params, exc):
    with pytest.raises(exc, match="param"):
        _render(tpl, tmp_path / "runs", params=params)
    assert not (tmp_path / "runs").exists()


def test_bad_format_spec_is_refused():
    with pytest.raises(ValueError, match="format spec"):
        DeckSpec(["a.j2"], formats={"k": "d"})
    with pytest.raises(ValueError, match="does not read back"):
        format_number(1.0, "%")


# --------------------------------------------------------------------------------------------
# paths
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("entry", ["../main.in.j2", "sub/../../x.j2"])
def test_template_path_with_dotdot_is_refused(tpl, tmp_path, entry):
    with pytest.raises(DeckError, match=r"\.\.") as info:
        _render(tpl, tmp_path / "runs", decks=DeckSpec([entry]))
    assert entry in str(info.value)


@pytest.mark.parametrize("kind", ["copies", "links"])
def test_copy_or_link_with_dotdot_is_refused_with_the_absolute_path_as_fix(tpl, tmp_path, kind):
    # issue 17 item 5: the message says what to write instead (an absolute path is staged
    # under its base name, see DeckSpec)
    (tmp_path / "mesh.msh").write_text("1 2 3")
    decks = DeckSpec(["main.in.j2"], **{kind: ["../mesh.msh"]})
    with pytest.raises(DeckError, match=r"contains '\.\.'") as info:
        _render(tpl, tmp_path / "runs", decks=decks)
    msg = str(info.value)
    assert msg.startswith({"copies": "copy", "links": "link"}[kind] + " '../mesh.msh'"), msg
    assert f"{str(tmp_path / 'mesh.msh')!r} (staged as 'mesh.msh')" in msg, msg
    assert not (tmp_path / "runs").exists()
    # the suggested form renders, and stages the file under its base name
    fixed = DeckSpec(["main.in.j2"], **{kind: [str(tmp_path / "mesh.msh")]})
    spec = _render(tpl, tmp_path / "runs", decks=fixed)
    assert (spec.run_dir / "mesh.msh").read_text() == "1 2 3"


def test_config_dir_placeholder(tpl, tmp_path):
    command = [sys.executable, "{config_dir}/solver.py", "--in={deck}"]
    spec = _render(tpl, tmp_path / "runs", command=command, config_dir=tmp_path / "cfg")
    assert spec.argv[1] == f"{(tmp_path / 'cfg').absolute()}/solver.py"
    assert spec.argv[2] == f"--in={spec.run_dir / 'main.in'}"
    # without the folder the placeholder cannot be filled: refused, nothing written
    with pytest.raises(DeckError, match=r"\{config_dir\}.*config_dir=") as info:
        _render(tpl, tmp_path / "other", command=command)
    assert "not known" in str(info.value)
    assert not (tmp_path / "other").exists()


def test_absolute_template_outside_root_is_refused(tpl, tmp_path):
    outside = tmp_path / "outside.j2"
    outside.write_text("x")
    with pytest.raises(DeckError, match="outside the template root"):
        _render(tpl, tmp_path / "runs", decks=DeckSpec([str(outside)]))


def test_writing_through_a_linked_folder_is_refused(tpl, tmp_path):
    (tpl / "mesh").mkdir()
    (tpl / "mesh" / "grid.dat").write_text("1 2 3")
    (tpl / "mesh" / "bc.j2").write_text("{{ k }}")
    decks = DeckSpec(["main.in.j2", "mesh/bc.j2"], links=["mesh"])
    with pytest.raises(DeckError, match="out of the run folder") as info:
        _render(tpl, tmp_path / "runs", decks=decks)
    assert "mesh/bc" in str(info.value)
    assert not (tpl / "mesh" / "bc").exists()


def test_reserved_output_name_is_refused(tpl, tmp_path):
    (tpl / f"{MANIFEST_NAME}.j2").write_text("{}")
    with pytest.raises(DeckError, match="reserved"):
        _render(tpl, tmp_path / "runs", decks=DeckSpec([f"{MANIFEST_NAME}.j2"]))


def test_single_string_command_is_refused_with_argv_hint(tpl, tmp_path):
    with pytest.raises(TypeError, match=r"argv list.*\['solver', '-i', 'deck.in'\]"):
        _render(tpl, tmp_path / "runs", command="solver -i deck.in")


# --------------------------------------------------------------------------------------------
# run folder, manifest, key
# --------------------------------------------------------------------------------------------
COMMAND_FOR_MANIFEST = ["solver", "{deck}", "--cfg", "{deck:sub/extra.cfg}", "--out", "{run_dir}/o"]


def test_run_folder_contents_and_manifest(tpl, tmp_path):
    (tpl / "sub").mkdir()
    (tpl / "sub" / "extra.cfg.j2").write_text("n = {{ n_cells }} idx = {{ point_index }}")
    (tpl / "table.csv").write_text("a,b\n1,2\n")
    (tpl / "mesh.dat").write_text("mesh")
    decks = DeckSpec(
        ["main.in.j2", "sub/extra.cfg.j2"],
        copies=["table.csv"],
        links=["mesh.dat"],
        constants={"n_cells": 40},
    )
    spec = _render(
        tpl,
        tmp_path / "runs",
        decks=decks,
        command=COMMAND_FOR_MANIFEST,
        provenance={"selection": "sel-7"},
    )
    setup = setup_digest(decks, COMMAND_FOR_MANIFEST, tpl)
    assert spec.run_id == run_id_for(3, {"k": 1.5e-4}, setup)
    assert spec.run_id == f"{point_run_id(3, {'k': 1.5e-4})}-s{setup[:6]}"
    assert point_of_run(spec.run_id) == point_run_id(3, {"k": 1.5e-4})
    assert spec.run_dir == (tmp_path / "runs" / spec.run_id).absolute()
    main = (spec.run_dir / "main.in").read_text()
    assert main == f"k = 0.00015\nid = {spec.run_id}\nw = 0.25\n"
    assert (spec.run_dir / "sub" / "extra.cfg").read_text() == "n = 40 idx = 3"
    assert (spec.run_dir / "table.csv").read_text() == "a,b\n1,2\n"
    assert (spec.run_dir / "mesh.dat").is_symlink()
    assert spec.argv == (
        "solver",
        str(spec.run_dir / "main.in"),
        "--cfg",
        str(spec.run_dir / "sub" / "extra.cfg"),
        "--out",
        f"{spec.run_dir}/o",
    )
    # Deck hashes checked against hashlib (reference library) over the written bytes.
    for rel in ("main.in", "sub/extra.cfg", "table.csv"):
        expected = hashlib.sha256((spec.run_dir / rel).read_bytes()).hexdigest()
        assert spec.deck_hashes[rel] == expected
    assert "mesh.dat" not in spec.deck_hashes
    manifest = read_manifest(spec.run_dir)
    assert manifest["key"] == spec.key
    assert manifest["params"] == {"k": "0.00015"}
    assert manifest["provenance"] == {"selection": "sel-7"}
    assert manifest["deck_hashes"] == spec.deck_hashes
    assert spec.key == run_key(spec.deck_hashes, spec.argv, spec.run_dir)
    # No temporary folders left behind.
    assert sorted(p.name for p in (tmp_path / "runs").iterdir()) == [spec.run_id]


def test_key_ignores_study_location_but_follows_decks_and_command(tpl, tmp_path):
    a = _render(tpl, tmp_path / "a", command=["solver", "{deck}", "{run_dir}"])
    b = _render(tpl, tmp_path / "b", command=["solver", "{deck}", "{run_dir}"])
    assert a.key == b.key and a.argv != b.argv
    c = _render(tpl, tmp_path / "c", command=["solver", "-v", "{deck}", "{run_dir}"])
    d = _render(tpl, tmp_path / "d", params={"k": 1.5000000000000001e-4 * 2})
    assert len({a.key, c.key, d.key}) == 3


def test_run_folders_follow_the_solver_setup_and_keep_finished_runs(tpl, tmp_path):
    # issue 18 item 5: a changed template, constant, format, staged input or command gives
    # the point a new run folder; the finished run of the old setup stays where it was
    runs = tmp_path / "runs"
    (tpl / "table.csv").write_text("a\n1\n")
    base = DeckSpec(["main.in.j2"], copies=["table.csv"], constants={"c": 1})
    first = _render(tpl, runs, decks=base)
    _journal(first, "succeeded")
    again = _render(tpl, runs, decks=base)
    assert again.run_id == first.run_id and again.key == first.key  # same setup, same folder
    ids = {first.run_id}
    variants = [
        dict(decks=DeckSpec(["main.in.j2"], copies=["table.csv"], constants={"c": 2})),
        dict(
            decks=DeckSpec(
                ["main.in.j2"], copies=["table.csv"], constants={"c": 1}, formats={"k": ".3e"}
            )
        ),
        dict(decks=base, command=["solver", "-v", "{deck}"]),
    ]
    for kw in variants:
        spec = _render(tpl, runs, **kw)
        assert point_of_run(spec.run_id) == point_of_run(first.run_id)
        ids.add(spec.run_id)
    (tpl / "table.csv").write_text("a\n2\n")  # staged input edited
    ids.add(_render(tpl, runs, decks=base).run_id)
    (tpl / "main.in.j2").write_text("k = {{ k }}\n")  # template edited
    ids.add(_render(tpl, runs, decks=base).run_id)
    assert len(ids) == 6
    # the finished run of the first setup is untouched
    assert read_manifest(first.run_dir)["key"] == first.key
    assert (first.run_dir / "table.csv").read_text() == "a\n1\n"


def test_point_run_id_is_stable_and_distinct():
    a = point_run_id(12, {"x": 0.1, "y": 2.0})
    assert a == point_run_id(12, {"y": 2.0, "x": 0.1})
    assert a.startswith("p000012-") and len(a) == len("p000012-") + 8
    assert a != point_run_id(12, {"x": 0.1 + 2**-55, "y": 2.0})
    assert a != point_run_id(13, {"x": 0.1, "y": 2.0})


def _journal(spec, state: str) -> None:
    write_outcome(RunOutcome(spec.run_id, spec.key, state, (), spec.run_dir))


def test_rerender_keeps_finished_run_and_cleans_the_rest(tpl, tmp_path):
    spec = _render(tpl, tmp_path / "runs")
    (spec.run_dir / "result.txt").write_text("42")
    _journal(spec, "succeeded")
    again = _render(tpl, tmp_path / "runs")
    assert again == spec
    assert (spec.run_dir / "result.txt").read_text() == "42"  # untouched

    _journal(spec, "failed")
    _render(tpl, tmp_path / "runs")
    assert not (spec.run_dir / "result.txt").exists()  # failed run folder rendered afresh
    assert not (spec.run_dir / "winnow-outcome.json").exists()

    (spec.run_dir / "partial.out").write_text("half")  # killed mid-run: no outcome file
    stale = tmp_path / "runs" / f".{spec.run_id}.partial-x1"  # a render killed mid-way
    stale.mkdir()
    _render(tpl, tmp_path / "runs")
    assert not (spec.run_dir / "partial.out").exists()
    assert not stale.exists()
    assert json.loads((spec.run_dir / MANIFEST_NAME).read_text())["key"] == spec.key


def test_finished_run_under_another_key_is_never_overwritten(tpl, tmp_path):
    spec = _render(tpl, tmp_path / "runs")
    _journal(spec, "succeeded")
    # a caller naming the folder itself gets a refusal, never an overwrite
    with pytest.raises(ValueError, match="another key"):
        _render(tpl, tmp_path / "runs", command=["other-solver", "{deck}"], run_id=spec.run_id)
    assert os.path.exists(spec.run_dir / "winnow-outcome.json")
    # the default id follows the setup: the other command gets its own folder
    other = _render(tpl, tmp_path / "runs", command=["other-solver", "{deck}"])
    assert other.run_dir != spec.run_dir and os.path.exists(spec.run_dir / "winnow-outcome.json")

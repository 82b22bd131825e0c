"""The aquifer solver as a program: deck template, argv forms, result file, deck validation."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import jinja2
import numpy as np
import pytest
from jinja2 import StrictUndefined
from jinja2.sandbox import SandboxedEnvironment

import winnow.examples.aquifer as aquifer_pkg
from winnow.examples.aquifer import solver, theis
from winnow.examples.aquifer.solver import DeckError, ModelConfig, main, parse_deck, simulate

TEMPLATE = Path(aquifer_pkg.__file__).parent / "templates" / "aquifer.deck.j2"
SOLVER_FILE = Path(solver.__file__)

SCENARIO = {
    "log10_T": -2.30103,
    "log10_S": -3.69897,
    "pumping_rate": theis.SUPPLY_PUMPING_RATE_M3S,
    "t_end": 5 * 86400.0,
    "spring_x": theis.SPRING_X_M,
    "spring_y": theis.SPRING_Y_M,
    "river_distance": theis.RIVER_DISTANCE_M,
    "grid": "coarse",
}


def render(**variables) -> str:
    env = SandboxedEnvironment(undefined=StrictUndefined, keep_trailing_newline=True)
    return env.from_string(TEMPLATE.read_text(encoding="utf-8")).render(**variables)


@pytest.fixture
def deck(tmp_path: Path) -> Path:
    p = tmp_path / "run" / "aquifer.deck"
    p.parent.mkdir()
    p.write_text(render(**SCENARIO), encoding="utf-8")
    return p


# --------------------------------------------------------------------------------------------
# template
# --------------------------------------------------------------------------------------------
def test_template_converts_log10_values_and_needs_all_scenario_variables(deck: Path) -> None:
    cfg = parse_deck(deck)
    assert cfg.transmissivity == pytest.approx(10**-2.30103, rel=1e-14)
    assert cfg.storativity == pytest.approx(10**-3.69897, rel=1e-14)
    assert cfg.river is True and cfg.grid == "coarse" and cfg.well_radius == 0.1
    assert (cfg.spring_x, cfg.spring_y, cfg.river_distance) == (400.0, 300.0, 800.0)
    # numpy scalars render as plain numbers
    text = render(**{**SCENARIO, "log10_T": np.float64(-2.5)})
    assert f"transmissivity = {10**-2.5}" in text
    for name in ("log10_T", "log10_S", "pumping_rate", "t_end", "spring_x", "river_distance"):
        partial = {k: v for k, v in SCENARIO.items() if k != name}
        with pytest.raises(jinja2.UndefinedError, match=name):
            render(**partial)


# --------------------------------------------------------------------------------------------
# program runs (separate processes)
# --------------------------------------------------------------------------------------------
def test_module_form_writes_result_next_to_the_deck(deck: Path) -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "winnow.examples.aquifer.solver", deck.name],
        cwd=deck.parent, capture_output=True, text=True, timeout=120,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    doc = json.loads((deck.parent / "result.json").read_text())
    assert set(doc) == {"qoi", "time_series", "meta"}
    value = doc["qoi"]["drawdown_spring"]
    # The log line carries the same number.
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("drawdown_spring = ")]
    assert len(line) == 1 and float(line[0].split("=")[1]) == pytest.approx(value, rel=1e-9)
    # Same as the in-process run, and close to the image-well solution (Ferris et al. 1962).
    assert value == simulate(parse_deck(deck)).drawdown_spring
    ref = theis.theis_with_river(400.0, 300.0, 5 * 86400.0, 10**-2.30103, 10**-3.69897,
                                 0.02, 800.0)  # fmt: skip
    assert value == pytest.approx(ref, rel=0.02)
    ts = doc["time_series"]
    assert ts["t_s"][-1] == 5 * 86400.0 and ts["drawdown_spring_m"][-1] == value
    assert len(ts["t_s"]) == len(ts["river_inflow_m3s"]) == doc["meta"]["time"]["n_steps"]
    assert abs(doc["meta"]["mass_balance_m3"]["relative_imbalance"]) < 1e-8
    assert sorted(p.name for p in deck.parent.iterdir()) == ["aquifer.deck", "result.json"]


def test_file_path_form_with_out_folder(deck: Path, tmp_path: Path) -> None:
    out = tmp_path / "elsewhere"
    out.mkdir()
    proc = subprocess.run(
        [sys.executable, str(SOLVER_FILE), str(deck), "--out", str(out)],
        capture_output=True, text=True, timeout=120, cwd=tmp_path,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    assert (out / "result.json").is_file()
    assert not (deck.parent / "result.json").exists()


def test_bad_deck_in_a_separate_process_exits_2_naming_file_line_and_key(deck: Path) -> None:
    deck.write_text(deck.read_text() + "porosity = 0.2\n")
    n_lines = len(deck.read_text().splitlines())
    proc = subprocess.run(
        [sys.executable, "-m", "winnow.examples.aquifer.solver", str(deck)],
        capture_output=True, text=True, timeout=120,
    )  # fmt: skip
    assert proc.returncode == 2
    assert f"{deck}:{n_lines}:" in proc.stderr and "'porosity'" in proc.stderr
    assert not (deck.parent / "result.json").exists()


# --------------------------------------------------------------------------------------------
# deck validation (in-process main(), same code path)
# --------------------------------------------------------------------------------------------
def _replace(text: str, key: str, new_line: str | None) -> str:
    out = []
    for line in text.splitlines():
        if line.split("=")[0].strip() == key:
            if new_line is not None:
                out.append(new_line)
        else:
            out.append(line)
    return "\n".join(out) + "\n"


BAD_DECKS = [
    # (key to replace, replacement line or None to drop it, key named in message, reason)
    ("storativity", "storativity = 2e-4\nstoragecoef = 1", "storagecoef", "unknown key"),
    ("storativity", None, "storativity", "missing required key"),
    ("transmissivity", "transmissivity = nan", "transmissivity", "finite"),
    ("t_end", "t_end = inf", "t_end", "finite"),
    ("pumping_rate", "pumping_rate = -inf", "pumping_rate", "finite"),
    ("t_end", "t_end = 1 day", "t_end", "expected a number"),
    ("transmissivity", "transmissivity = -0.005", "transmissivity", "positive"),
    ("storativity", "storativity = 1.5", "storativity", "(0, 1]"),
    ("river", "river = yes", "river", "one of"),
    ("grid", "grid = ultra", "grid", "one of"),
    ("spring_x", "spring_x = 900", "spring_x", "aquifer side of the river"),
    ("pumping_rate", "pumping_rate = 0.02\npumping_rate = 0.03", "pumping_rate", "duplicated"),
    ("t_end", "t_end =", "t_end", "missing value"),
]


@pytest.mark.parametrize(("key", "line", "named", "reason"), BAD_DECKS)
def test_bad_decks_exit_2_and_name_file_and_key(deck, capsys, key, line, named, reason) -> None:
    deck.write_text(_replace(deck.read_text(), key, line))
    assert main([str(deck)]) == 2
    err = capsys.readouterr().err
    assert str(deck) in err and f"key '{named}'" in err and reason in err
    assert not (deck.parent / "result.json").exists()


def test_line_number_is_reported(deck: Path) -> None:
    text = _replace(deck.read_text(), "transmissivity", "transmissivity = nan")
    deck.write_text(text)
    lineno = 1 + [ln.split("=")[0].strip() for ln in text.splitlines()].index("transmissivity")
    with pytest.raises(DeckError) as info:
        parse_deck(deck)
    assert info.value.line == lineno and info.value.key == "transmissivity"
    assert str(info.value).startswith(f"{deck}:{lineno}: key 'transmissivity':")


def test_syntax_error_and_missing_file(tmp_path: Path, capsys) -> None:
    bad = tmp_path / "bad.deck"
    bad.write_text("# comment only\ntransmissivity 0.005\n")
    assert main([str(bad)]) == 2
    assert f"{bad}:2: expected 'key = value'" in capsys.readouterr().err
    assert main([str(tmp_path / "absent.deck")]) == 2
    assert "absent.deck: cannot read the deck" in capsys.readouterr().err
    assert main([str(bad), "--out", str(tmp_path / "nope")]) == 2  # deck error reported first
    assert list(tmp_path.iterdir()) == [bad]


def test_missing_run_folder_is_an_input_error(deck: Path, tmp_path: Path, capsys) -> None:
    assert main([str(deck), "--out", str(tmp_path / "nope")]) == 2
    assert "run folder" in capsys.readouterr().err
    assert not (tmp_path / "nope").exists()


def test_comments_blank_lines_and_optional_keys(tmp_path: Path) -> None:
    p = tmp_path / "min.deck"
    p.write_text(
        "# minimal deck\n\ntransmissivity=0.005  # m2/s\nstorativity = 2e-4\n"
        "pumping_rate = 0.01\nt_end = 3600\nspring_x = -50\nspring_y = 0\n"
        "river = off\nriver_distance = 1\n"
    )
    cfg = parse_deck(p)
    assert cfg == ModelConfig(0.005, 2e-4, 0.01, 3600.0, -50.0, 0.0, False, 1.0)
    assert cfg.grid == "standard" and cfg.initial_head == 100.0

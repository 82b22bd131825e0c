"""Study config loading: valid files load, bad ones name the file and the field, exit 2.

The expectations here are the project's own contract (documented in the README's config
reference); there is no outside source for a config format of our own.
"""

from __future__ import annotations

import copy
import json
import os
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from winnow.flows.cli import app
from winnow.tasks.config import ConfigError, config_schema, load_config, parse_config

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "aquifer_demo.yaml"


def demo_data() -> dict:
    return yaml.safe_load(DEMO.read_text())


def test_demo_config_loads():
    cfg, text = load_config(DEMO)
    assert cfg.study.name == "aquifer-demo"
    assert cfg.names == ("log10_T", "log10_S")
    assert cfg.budget == 12
    assert cfg.dispatch.runner == "local"
    assert cfg.collect.qoi[0].reader == {
        "json": {"file": "result.json", "key": "qoi.drawdown_spring"}
    }
    assert text == DEMO.read_text()


def _mutated(path: tuple, value) -> dict:
    data = demo_data()
    node = data
    for p in path[:-1]:
        node = node[p]
    if value is _DELETE:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return data


_DELETE = object()

BAD = [
    # (where, value, field path expected in the message, words expected in the message)
    (("bogus",), 1, "bogus", "Extra inputs are not permitted"),
    (("thin", "colour"), "red", "thin.colour", "Extra inputs"),
    (("budget",), "twelve", "budget", "valid integer"),
    (("budget",), 0, "budget", "greater than 0"),
    (("budget",), -3, "budget", "greater than 0"),
    (("budget",), _DELETE, "budget", "Field required"),
    (("store",), _DELETE, "store", "Field required"),
    (("parameters", 0, "prior", "low"), 5.0, "parameters[log10_T].prior", "low must be < high"),
    (
        ("parameters", 1, "prior"),
        {"dist": "normal", "mu": 0.0},
        "parameters[log10_S].prior",
        "sigma",
    ),
    (("thin", "kernel"), "cosine", "thin.kernel", "'gaussian', 'laplace'"),
    (("thin", "method"), "best", "thin.method", "'greedy', 'swap', 'genetic'"),
    (("thin", "features"), 0, "thin.features", "positive"),
    (("dispatch", "command"), "python solver.py deck.txt", "dispatch.command", "list of arguments"),
    (("dispatch", "runner"), {"dask": {}}, "dispatch.runner.dask", "exactly one of"),
    (("dispatch", "runner"), {"cloud": 1}, "dispatch.runner", "expected 'local'"),
    (("dispatch", "timeout"), -1, "dispatch.timeout", "greater than 0"),
    (("collect", "quantiles"), [0.5, 1.5], "collect.quantiles", "in (0, 1)"),
    (
        ("collect", "qoi", 0, "reader"),
        {"xml": {}},
        "collect.qoi[drawdown_spring].reader",
        "exactly one reader",
    ),
    (("sample", "model"), {"forward": "not a path"}, "sample.model.forward", "pattern"),
]


@pytest.mark.parametrize(("where", "value", "field", "words"), BAD)
def test_bad_config_names_file_and_field(where, value, field, words):
    with pytest.raises(ConfigError) as err:
        parse_config(_mutated(where, value), source="study.yaml")
    msg = str(err.value)
    assert msg.startswith("study.yaml: ")
    assert f": {field}" in msg, msg
    assert words in msg, msg


def test_duplicate_parameter_names_refused():
    data = demo_data()
    data["parameters"][1]["name"] = "log10_T"
    with pytest.raises(ConfigError, match="repeated: \\['log10_T'\\]"):
        parse_config(data, source="s.yaml")


def test_not_yaml_and_missing_file(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("study: [unclosed\n")
    with pytest.raises(ConfigError, match="bad.yaml: not valid YAML"):
        load_config(bad)
    with pytest.raises(ConfigError, match="config file not found"):
        load_config(tmp_path / "nope.yaml")
    top = tmp_path / "list.yaml"
    top.write_text("- 1\n- 2\n")
    with pytest.raises(ConfigError, match="expected a mapping"):
        load_config(top)


def _walk_properties(schema: dict, defs: dict, seen: set, out: list):
    for name, prop in schema.get("properties", {}).items():
        out.append((schema.get("title", "?"), name, prop))
        for sub in [prop, *prop.get("anyOf", []), *prop.get("oneOf", []), prop.get("items", {})]:
            ref = sub.get("$ref") if isinstance(sub, dict) else None
            if ref and ref not in seen:
                seen.add(ref)
                _walk_properties(defs[ref.split("/")[-1]], defs, seen, out)


def test_schema_describes_every_field():
    schema = config_schema()
    out: list = []
    _walk_properties(schema, schema.get("$defs", {}), set(), out)
    assert len(out) > 60  # every section is reached
    undocumented = [f"{model}.{name}" for model, name, prop in out if not prop.get("description")]
    assert undocumented == []


def test_schema_command_prints_json():
    result = CliRunner().invoke(app, ["schema"])
    assert result.exit_code == 0
    schema = json.loads(result.stdout)
    assert schema["title"] == "StudyConfig"
    assert "budget" in schema["required"]


def test_run_with_bad_config_exits_2_and_writes_nothing(tmp_path):
    data = demo_data()
    data["budget"] = 0
    data["store"] = str(tmp_path / "study.h5")
    data["run_root"] = str(tmp_path / "runs")
    cfg = tmp_path / "study.yaml"
    cfg.write_text(yaml.safe_dump(data))
    before = sorted(os.listdir(tmp_path))
    result = CliRunner().invoke(app, ["run", str(cfg)])
    assert result.exit_code == 2
    assert f"{cfg}: budget: Input should be greater than 0" in result.stderr
    assert sorted(os.listdir(tmp_path)) == before


def _refused_by_run(tmp_path: Path, data: dict, command: str = "run", *, in_file=True) -> str:
    """``winnow run`` (or ``command``) on ``data`` written as a config: exit 2, nothing
    written; the message (which starts with the config file's name when ``in_file``: the
    loader's errors do, the checks of the files a config names start with the field)."""
    data["store"] = str(tmp_path / "study.h5")
    data["run_root"] = str(tmp_path / "runs")
    cfg = tmp_path / "study.yaml"
    cfg.write_text(yaml.safe_dump(data, sort_keys=False))
    before = sorted(os.listdir(tmp_path))
    result = CliRunner().invoke(app, [command, str(cfg)])
    assert result.exit_code == 2, result.output
    assert sorted(os.listdir(tmp_path)) == before
    assert result.stderr.startswith(f"winnow: error: {cfg}: " if in_file else "winnow: error: ")
    return result.stderr


def test_parameter_fields_are_named_by_the_parameter_name(tmp_path):
    """Issue 17 item 10 (b): parameters[log10_S].prior.dist, not parameters.1.prior.dist."""
    data = demo_data()
    data["parameters"][1]["prior"]["dist"] = "beta"
    data["collect"]["qoi"][0]["reader"] = {"xml": {}}
    err = _refused_by_run(tmp_path, data)
    assert "parameters[log10_S].prior.dist: Input should be 'uniform'" in err, err
    assert "collect.qoi[drawdown_spring].reader: give exactly one reader" in err, err
    assert "parameters.1" not in err and "qoi.0" not in err
    # an entry without a usable name keeps its position
    data = demo_data()
    del data["parameters"][0]["name"]
    with pytest.raises(ConfigError) as exc:
        parse_config(data, source="s.yaml")
    assert "s.yaml: parameters[0].name: Field required" in str(exc.value)


@pytest.mark.parametrize(
    ("field", "value"),
    [
        ("noise", {"column": "sigma"}),
        ("target", "drawdown"),
        ("inputs", ["t_s", "time"]),
    ],
)
def test_missing_observation_column_names_its_field(tmp_path, field, value):
    """Issue 17 item 10 (a): a column the file lacks is named with the field that asks for
    it and the columns the file has (examples/aquifer/data/observations.csv)."""
    data = demo_data()
    obs = ROOT / "examples" / "aquifer" / "data" / "observations.csv"
    data["sample"]["observations"]["file"] = str(obs)
    data["dispatch"]["template_dir"] = str(ROOT / "examples" / "aquifer" / "templates")
    data["sample"]["observations"][field] = value
    header = obs.read_text().splitlines()[0].split(",")
    assert {"sigma", "drawdown", "time"}.isdisjoint(header)
    where, bad = {
        "noise": ("sample.observations.noise.column", "sigma"),
        "target": ("sample.observations.target", "drawdown"),
        "inputs": ("sample.observations.inputs[1]", "time"),
    }[field]
    for command in ("validate", "run"):
        err = _refused_by_run(tmp_path, copy.deepcopy(data), command, in_file=False)
        assert f"{where}: {bad!r} is not a column of {obs} (columns: {', '.join(header)})" in err
        assert "missing column" not in err


@pytest.mark.parametrize(
    ("where", "key", "expected"),
    [
        ((), "budjet", "budjet: Extra inputs are not permitted (got 1); did you mean 'budget'?"),
        (
            ("parameters", 1),
            "unit",
            "parameters[log10_S].unit: Extra inputs are not permitted (got 1); "
            "did you mean 'units'?",
        ),
        (
            ("sample", "observations", "noise"),
            "colum",
            "sample.observations.noise.colum: Extra inputs are not permitted (got 1); "
            "did you mean 'column'?",
        ),
        (
            ("dispatch", "runner", "dask"),
            "adress",
            "dispatch.runner.dask.adress: Extra inputs are not permitted (got 1); "
            "did you mean 'address'?",
        ),
        (  # a key inside the dispatch section
            ("dispatch",),
            "inptus",
            "dispatch.inptus: Extra inputs are not permitted (got 1); did you mean 'inputs'?",
        ),
        (  # nothing close: the keys accepted there
            ("thin",),
            "colour",
            "thin.colour: Extra inputs are not permitted (got 1); expected one of: bandwidth, "
            "exact_max_rows, feature_map, features, kernel, method, replace_unweighted, weights",
        ),
    ],
    ids=["top", "parameter", "noise", "dask runner", "dispatch", "no close key"],
)
def test_unknown_key_gets_a_suggestion(tmp_path, where, key, expected):
    """Issue 17 item 10 (c): difflib.get_close_matches over the keys accepted at that place."""
    data = demo_data()
    data["dispatch"]["runner"] = {"dask": {"address": "tcp://127.0.0.1:8786"}}
    node = data
    for p in where:
        node = node[p]
    node[key] = 1
    err = _refused_by_run(tmp_path, data)
    assert expected in err, err


# --------------------------------------------------------------------------------------------
# property-based: any config either loads or raises ConfigError, never another exception
# --------------------------------------------------------------------------------------------
_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-5, 10**6),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
)
_values = st.recursive(
    _scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=8), inner, max_size=3)
    ),
    max_leaves=6,
)


def _paths(node, prefix=()):
    yield prefix
    if isinstance(node, dict):
        for k, v in node.items():
            yield from _paths(v, (*prefix, k))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from _paths(v, (*prefix, i))


_ALL_PATHS = [p for p in _paths(demo_data()) if p]


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    edits=st.lists(
        st.tuples(st.sampled_from(_ALL_PATHS), st.one_of(st.just(_DELETE), _values)),
        min_size=1,
        max_size=3,
    )
)
def test_random_configs_load_or_raise_config_error(edits):
    data = demo_data()
    for path, value in edits:
        node = data
        try:
            for p in path[:-1]:
                node = node[p]
            if value is _DELETE:
                del node[path[-1]]
            else:
                node[path[-1]] = copy.deepcopy(value)
        except (KeyError, IndexError, TypeError):
            continue  # an earlier edit removed or replaced this path
    try:
        cfg = parse_config(data, source="random.yaml")
    except ConfigError as exc:
        assert str(exc).startswith("random.yaml")
    else:
        assert cfg.budget > 0 and len(cfg.parameters) >= 1

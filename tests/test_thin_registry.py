"""The thin stage's names and settings, each declared once (issue 15).

* kernels, selectors and feature maps live in one registry each (``KERNELS``, ``SELECTORS``,
  ``FEATURE_MAPS``); the settings' ``Literal`` choices are held equal to them here (the config
  package imports no stage, so a test checks them instead of an import);
* the ``winnow thin`` options are generated from ``ThinSettings``: every field has one, with
  the field's default and choices;
* a selection records its settings as the model's dump and edits read them back through the
  model: a record from before (no ``report["settings"]``) or one missing a field gets the
  model's defaults.

Oracle: the project contract of issue 15 ("every option declared once"), checked against
the registries and the model themselves.
"""

from __future__ import annotations

import dataclasses
from typing import get_args

import numpy as np
import pytest
import typer

from winnow.tasks.config import (
    FeatureMapName,
    KernelName,
    MethodName,
    ThinOptions,
    ThinSettings,
    validate_settings,
)
from winnow.tasks.errors import InputError
from winnow.tasks.thin import (
    FEATURE_MAPS,
    KERNELS,
    SELECTORS,
    Selector,
    extend,
    get_kernel,
    get_selector,
    reweight,
    thin,
)


def _choices(field: str) -> tuple[str, ...]:
    return get_args(ThinSettings.model_fields[field].annotation)


def _banana(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, 2))
    return np.c_[z[:, 0], z[:, 1] + 0.5 * z[:, 0] ** 2 - 0.5]


def test_settings_choices_equal_the_registries():
    assert _choices("kernel") == get_args(KernelName) == tuple(KERNELS)
    assert _choices("method") == get_args(MethodName) == tuple(SELECTORS)
    assert _choices("feature_map") == get_args(FeatureMapName) == tuple(FEATURE_MAPS)
    for name, kernel in KERNELS.items():
        assert kernel.name == name
    for name, cls in SELECTORS.items():
        assert issubclass(cls, Selector) and cls.name == name
    # the baselines are not asked to replace points without weight (see _refill_off)
    assert [n for n, cls in SELECTORS.items() if not cls.refills] == ["random", "stride"]


def test_unknown_names_list_the_registry():
    with pytest.raises(InputError, match=r"kernel must be one of \['gaussian', 'laplace'"):
        get_kernel("cosine")
    with pytest.raises(InputError, match=r"method must be one of \['genetic', 'greedy'"):
        get_selector("annealing")
    x = _banana(40, seed=1)
    with pytest.raises(InputError, match="feature_map must be one of 'rff', 'orf' or 'qmc'"):
        thin(x, 3, feature_map="fastfood")
    # a keyword that is neither a setting nor an option of the selector
    with pytest.raises(TypeError, match=r"unknown option\(s\) \['colour'\] .*settings of thin"):
        thin(x, 3, features=16, colour=1)
    with pytest.raises(TypeError, match="unknown setting 'colour'; valid: bandwidth, chunk"):
        validate_settings(ThinOptions, {"colour": 1}, strict=True)


def _thin_command_params() -> dict[str, object]:
    from winnow.flows._cmd_thin import register

    app = typer.Typer()
    register(app)
    app.command("other")(lambda: None)  # two commands: typer keeps the group
    cmd = typer.main.get_command(app).commands["thin"]
    return {p.name: p for p in cmd.params}


def test_every_thin_setting_has_a_command_line_option_with_its_default_and_choices():
    params = _thin_command_params()
    for name, field in ThinSettings.model_fields.items():
        assert name in params, f"ThinSettings.{name} has no `winnow thin` option"
        option = params[name]
        assert option.default == field.default, (name, option.default, field.default)
        for choice in get_args(field.annotation):
            if isinstance(choice, str) and len(get_args(field.annotation)) > 1:
                assert choice in option.help, (name, choice)
    assert "--exact-rows" in params["exact_max_rows"].opts  # the README's name stays


def test_selection_records_its_settings_and_edits_read_them_back():
    x = _banana(400, seed=2)
    given = ThinSettings(kernel="laplace", features=32, exact_max_rows=300)
    sel = thin(x, 6, rng=1, settings=given, workers=1, precision="double")
    want = ThinOptions(**given.model_dump(), workers=1, precision="double")
    assert sel.report["settings"] == want.model_dump(mode="json")
    more = extend(x, sel, 2)
    rec = ThinOptions.model_validate(more.report["settings"])
    assert (rec.kernel, rec.workers, rec.precision, rec.exact_max_rows) == (
        "laplace", 1, "double", 300,
    )  # fmt: skip
    # the feature count and bandwidth are the selection's own (the same features again)
    assert rec.features == sel.n_features and rec.bandwidth == pytest.approx(sel.bandwidth)


def test_an_old_record_reads_back_with_the_models_defaults():
    x = _banana(400, seed=3)
    sel = thin(x, 6, rng=4, n_features=32, workers=1, exact_max_rows=200)
    # as stored before report["settings"]: a few settings under their old report keys
    old_report = {k: v for k, v in sel.report.items() if k != "settings"}
    old_report.update(workers=1, mmd_exact_max_rows=200)
    old = dataclasses.replace(sel, report=old_report)
    more = extend(x, old, 2)
    rec = more.report["settings"]
    assert rec["workers"] == 1 and rec["exact_max_rows"] == 200  # from the old keys
    defaults = ThinOptions()
    assert rec["precision"] == defaults.precision and rec["features_tol"] == defaults.features_tol
    # a record missing a field (written before the field existed) takes its default
    partial = {k: v for k, v in sel.report["settings"].items() if k != "replace_unweighted"}
    again = reweight(
        x, dataclasses.replace(sel, report={**sel.report, "settings": partial}), [0, 1]
    )
    assert again.report["settings"]["replace_unweighted"] is defaults.replace_unweighted

"""The convergence gate of the sample stage (``sample.checks``, tasks/sample/_stage.py).

A chain that fails a threshold stops the study before thinning (``on_failure: stop``, the
default) with a :class:`~winnow.tasks.sample.ConvergenceError` naming the parameter, the
measured value and the threshold; with ``on_failure: warn`` the study goes on and the failure
is recorded in the chain's diagnostics (``Chain.diagnostics.messages``, stored with the chain
and shown by the report); a chain that passes goes on silently.

What the code does today (checked here, issue 13):

* ``warn`` raises no Python warning and logs nothing: the record's messages are the warning.
* ``stop`` under the study flow leaves the store with the revision that ``new_revision``
  made before sampling (sections ``config``, ``inputs``, ``provenance``, plus
  ``observations`` when the study has any) and no stage output; a sampler's last
  ``checkpoints`` entry is left in place (it is cleared only after the chain is written), so
  running the same config again resumes that revision from it and stops again. No second
  revision is made, no run folder is rendered, no solver is started.

Chains: a deliberately non-converged imported chain (4 chains of 500 iid normal draws, the
last chain of ``x`` shifted by 1.5 sd, so that its between-chain variance is large), the
same chain without the shift (converged), and tiny sampler runs.

Outside references:
* arviz (general-purpose reference library): ``az.rhat(method="rank")`` and
  ``az.ess(method="bulk")`` (Vehtari et al. 2021, Bayesian Analysis 16(2), the definitions
  tasks/sample/_diagnostics.py implements) give the values the messages must quote, to the digits
  printed.
* closed form: an ESS estimate with Geyer's truncation and the antithetic cap of Vehtari et
  al. (2021, Sec. 3.2; arviz does the same) is at most ``N log10 N`` for ``N`` draws, so a
  threshold above that cannot be met: 4 x 20 kept draws give at most 80 log10 80 = 152 < 400,
  4 x 300 give at most 1200 log10 1200 = 3695 < 5000.
"""

from __future__ import annotations

import math
import re
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from fault_solvers.kit import calls, make_study
from typer.testing import CliRunner

from winnow.tasks import sample as D
from winnow.tasks.config import load_config
from winnow.tasks.sample import ConvergenceError, sample_stage

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # arviz prints a FutureWarning about its refactor
    import arviz as az

sys.path.insert(0, str(Path(__file__).parent / "study_models"))

N_CHAINS, N_DRAWS = 4, 500
SHIFT = 1.5  # sd; gives rank R-hat 1.195 on the seed below (arviz agrees)


def _draws(shift: float) -> np.ndarray:
    """(4, 500, 2) iid standard normal draws; the last chain of x moved by ``shift``."""
    x = np.random.default_rng(21).normal(size=(N_CHAINS, N_DRAWS, 2))
    x[-1, :, 0] += shift
    return x


def _one(value) -> float:
    # arviz returns a scalar, or a one-element array when numba is installed
    return float(np.asarray(value).item())


def _imported_study(folder: Path, draws: np.ndarray, *, on_failure=None, **checks) -> Path:
    """The fault kit's small study importing ``draws`` (chain after chain) as chain.npy.

    ``burn_in: 0`` is stated, so that the values checked are those of all draws whatever the
    default burn-in of an imported chain is.
    """
    folder.mkdir(parents=True, exist_ok=True)
    np.save(folder / "chain.npy", draws.reshape(-1, draws.shape[-1]))
    if on_failure is not None:
        checks["on_failure"] = on_failure
    sample = {"import_chain": {"file": "chain.npy", "chains": N_CHAINS}, "burn_in": 0}
    if checks:
        sample["checks"] = checks
    return make_study(folder, sample=sample)


def _config(path: Path):
    cfg, _ = load_config(path)
    return cfg


# Two ways to fail: R-hat of x only (ESS thresholds low enough to pass), bulk ESS of both
# parameters only (iid draws: about 2000, R-hat near 1).
FAILURES = {
    "rhat": (SHIFT, {"ess_bulk_min": 10.0, "ess_tail_min": 10.0}),
    "ess": (0.0, {"ess_bulk_min": 4000.0, "ess_tail_min": 10.0}),
}


def _expected_failures(kind: str, draws: np.ndarray) -> list[tuple[str, str, float, float]]:
    """(parameter, quantity, arviz's value, threshold) of each failing check."""
    if kind == "rhat":
        return [("x", "R-hat", _one(az.rhat(draws[..., 0], method="rank")), 1.01)]
    return [
        (name, "bulk ESS", _one(az.ess(draws[..., j], method="bulk")), 4000.0)
        for j, name in enumerate(("x", "y"))
    ]


def _assert_names_value_and_threshold(text: str, expected) -> None:
    """Each failure's line names the parameter, the measured value (to the printed digits)
    and the threshold."""
    for name, quantity, value, threshold in expected:
        m = re.search(
            rf"^\s*{name}: {quantity} ([0-9.]+) is not (?:below|above) the threshold "
            rf"{threshold:g}$",
            text,
            flags=re.M,
        )
        assert m, (name, quantity, text)
        printed = float(m.group(1))
        digits = len(m.group(1).split(".")[1]) if "." in m.group(1) else 0
        # the value printed is arviz's, rounded to the digits shown (half a unit of the
        # last digit, plus arviz's agreement with winnow, relative 1e-9 in
        # test_sample_diagnostics.py)
        assert printed == pytest.approx(value, abs=0.5 * 10.0**-digits + 1e-9 * value)
        if quantity == "R-hat":
            assert printed > threshold
        else:
            assert printed < threshold


# --------------------------------------------------------------------------------------------
# the plain stage function
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", list(FAILURES))
def test_stop_raises_naming_parameter_value_and_threshold(tmp_path, kind):
    shift, checks = FAILURES[kind]
    draws = _draws(shift)
    cfg = _config(_imported_study(tmp_path, draws, **checks))  # on_failure: stop by default
    assert cfg.sample.checks.on_failure == "stop"
    with pytest.raises(ConvergenceError) as err:
        sample_stage(cfg, tmp_path)
    text = str(err.value)
    assert "no costly run was started" in text
    expected = _expected_failures(kind, draws)
    _assert_names_value_and_threshold(text, expected)
    if kind == "rhat":  # y converged: not named
        assert not re.search(r"^\s*y:", text, flags=re.M), text


def test_stop_on_a_tiny_sampler_run(tmp_path):
    # 4 chains x 40 draws, half kept: bulk ESS <= 80 log10 80 = 152 < 400 (closed form,
    # module notes), so the default thresholds cannot be met.
    from make_study import make_study as make_line_study

    path = make_line_study(
        tmp_path, **{"sample.draws": 40, "sample.checks": {"on_failure": "stop"}}
    )
    cfg = _config(path)
    with pytest.raises(ConvergenceError) as err:
        sample_stage(cfg, tmp_path)
    text = str(err.value)
    for name in ("a", "b"):
        m = re.search(
            rf"^\s*{name}: bulk ESS ([0-9.]+) is not above the threshold 400$", text, flags=re.M
        )
        assert m and float(m.group(1)) <= 80 * math.log10(80), text


@pytest.mark.parametrize("kind", list(FAILURES))
def test_warn_goes_on_and_records_parameter_value_and_threshold(tmp_path, kind):
    shift, checks = FAILURES[kind]
    draws = _draws(shift)
    cfg = _config(_imported_study(tmp_path, draws, on_failure="warn", **checks))
    chain = sample_stage(cfg, tmp_path)  # no exception: the study goes on
    d = chain.diagnostics
    assert d is not None and not d.passed
    assert chain.samples.shape == (N_CHAINS * N_DRAWS, 2)  # the whole chain, for thinning
    _assert_names_value_and_threshold("\n".join(d.messages), _expected_failures(kind, draws))
    assert len(d.messages) == len(_expected_failures(kind, draws))


@pytest.mark.parametrize("on_failure", ["stop", "warn"])
def test_passing_chain_goes_on_silently(tmp_path, on_failure):
    draws = _draws(0.0)
    # default thresholds: R-hat < 1.01, bulk and tail ESS > 400; arviz's values clear them
    assert max(_one(az.rhat(draws[..., j], method="rank")) for j in range(2)) < 1.01
    assert min(_one(az.ess(draws[..., j], method="bulk")) for j in range(2)) > 400
    cfg = _config(_imported_study(tmp_path, draws, on_failure=on_failure))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        chain = sample_stage(cfg, tmp_path)
    assert [str(w.message) for w in caught] == []
    assert chain.diagnostics.passed and chain.diagnostics.messages == ()
    ref = D.diagnose(draws, ["x", "y"], burn_in=0)
    assert chain.diagnostics.parameters == ref.parameters  # the same function on equal draws


# --------------------------------------------------------------------------------------------
# through the study flow and the command line
# --------------------------------------------------------------------------------------------
def _sections(store: Path, revision: str = "r0001") -> set[str]:
    from winnow.tasks.store import RunStore

    with RunStore.open_read(store) as r:
        assert r.revisions() == [revision]
        return set(r.sections(revision))


@pytest.mark.slow
def test_cli_run_stops_before_thinning_and_writes_only_the_revision(tmp_path, prefect_harness):
    from winnow.flows.cli import app
    from winnow.tasks.store import check

    draws = _draws(SHIFT)
    cfg = _imported_study(tmp_path, draws)  # default thresholds, on_failure: stop
    runner = CliRunner()
    for attempt in (1, 2):  # the same config again resumes the revision and stops again
        res = runner.invoke(app, ["run", str(cfg)])
        assert res.exit_code == 1, (attempt, res.output, res.exception)
        assert "winnow: the chain did not converge; no costly run was started" in res.stderr
        _assert_names_value_and_threshold(res.stderr, _expected_failures("rhat", draws))
        # new_revision's sections and the failed chain, stored for inspection (issue 17
        # item 12): no selection, runs or results (imported chain: no observations, no
        # sampler checkpoint)
        assert _sections(tmp_path / "study.h5") == {"config", "inputs", "provenance", "chain"}
        assert not (tmp_path / "runs").exists()  # no deck rendered
        assert calls(tmp_path) == []  # no solver started
        assert check(tmp_path / "study.h5").ok


@pytest.mark.slow
def test_flow_stops_a_sampler_study_and_keeps_its_failed_chain(tmp_path, prefect_harness):
    # 4 chains x 600 draws (300 kept): bulk ESS <= 1200 log10 1200 = 3695 < 5000 (closed
    # form, module notes). The sampler checkpoints at iteration 500 (sampling.sample's
    # checkpoint_every default).
    from make_study import make_study as make_line_study

    from winnow.flows.study import study_flow

    path = make_line_study(
        tmp_path,
        **{"sample.draws": 600, "sample.checks": {"ess_bulk_min": 5000, "on_failure": "stop"}},
    )
    text = path.read_text()
    cfg = _config(path)
    messages = []
    for _ in range(2):  # again: resumes r0001 from its stored chain, same verdict
        with pytest.raises(ConvergenceError) as err:
            study_flow(cfg, base_dir=str(tmp_path), config_text=text, config_path=str(path))
        messages.append(str(err.value))
        # the failed chain is stored for inspection (issue 17 item 12); its sampler
        # checkpoint is cleared once the chain is written
        assert _sections(tmp_path / "study.h5") - {"checkpoints"} == {
            "config",
            "inputs",
            "provenance",
            "observations",
            "chain",
        }
        assert not (tmp_path / "runs").exists()
    assert messages[0] == messages[1]
    for name in ("a", "b"):
        assert re.search(
            rf"^\s*{name}: bulk ESS [0-9.]+ is not above the threshold 5000$",
            messages[0],
            flags=re.M,
        ), messages[0]

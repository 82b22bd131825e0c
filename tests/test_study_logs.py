"""What the study flow writes to its Prefect run log and progress artifacts (issue 18
items 3 and 5).

The records are taken from Prefect's flow-run and task-run loggers (``get_run_logger``), the
loggers whose records the API handler ships to the server, while the study runs through the
engine on the session's test server.
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent / "study_models"))
from make_study import make_study  # noqa: E402

# Imported at collection: the first import of the flows configures Prefect's logging, which
# replaces the handlers of its loggers (the fixture's among them).
from winnow.flows.study import study_flow  # noqa: E402
from winnow.tasks.config import load_config  # noqa: E402

pytestmark = pytest.mark.slow


class _Records(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)

    def lines(self, level: int) -> list[str]:
        return [r.getMessage() for r in self.records if r.levelno == level]


@pytest.fixture
def run_log():
    """Records of the flow-run and task-run loggers at INFO and above."""
    handler = _Records()
    loggers = [logging.getLogger(n) for n in ("prefect.flow_runs", "prefect.task_runs")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.addHandler(handler)
        lg.setLevel(logging.INFO)
    try:
        yield handler
    finally:
        for lg, level in zip(loggers, levels, strict=True):
            lg.removeHandler(handler)
            lg.setLevel(level)


def test_failed_convergence_and_failed_runs_are_logged_as_warnings(
    prefect_harness, tmp_path, run_log
):
    folder = tmp_path / "s"
    # an ESS threshold no chain of 600 draws can meet: the check fails, on_failure is warn
    path = make_study(
        folder,
        budget=6,
        **{"sample.draws": 600, "sample.checks.ess_bulk_min": 1e9, "collect.bootstrap": 0},
    )
    (folder / "runs").mkdir(parents=True)
    (folder / "runs" / "FLAKY").touch()  # a deterministic share of the solver runs fail
    cfg, text = load_config(path)
    result = study_flow(cfg, base_dir=str(folder), config_text=text, config_path=str(path))
    assert result.counts.get("failed", 0) > 0  # the test's premise

    warnings = run_log.lines(logging.WARNING)
    infos = run_log.lines(logging.INFO)
    assert any("convergence check failed" in w and "ess" in w.lower() for w in warnings), warnings
    assert any("did not converge" in w for w in warnings), warnings
    n_failed = result.counts["failed"]
    assert any(f"{n_failed} run(s) left out" in w for w in warnings), warnings
    assert any(f"{n_failed} of 6 runs did not succeed" in w for w in warnings), warnings
    # one summary line per stage
    for stage in ("sample:", "thin:", "dispatch:", "collect: y2:"):
        assert any(i.startswith(stage) for i in infos), (stage, infos)

    # item 5: sample and thin report their steps in the log and in progress artifacts
    assert any(i.startswith("sample: ") and i.endswith("%)") for i in infos), infos
    assert any(i.startswith("thin: ") and i.endswith("%)") for i in infos), infos
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey

    with get_client(sync_client=True) as client:
        for stage in ("sample", "thin"):
            key = f"line-test-{stage}-progress"
            (art,) = client.read_latest_artifacts(
                artifact_filter=ArtifactFilter(key=ArtifactFilterKey(any_=[key]))
            )
            assert art.type == "progress" and float(art.data) == 100.0, (key, art.data)

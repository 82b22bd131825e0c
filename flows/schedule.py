"""Scheduled studies: a flow that rereads its config file on every run.

``winnow serve CONFIG --cron "0 6 * * *"`` serves :func:`scheduled_study` with the config's
absolute path as its parameter. Each scheduled run reads the file again, so new observations
(or an edited config) are picked up; the study flow makes a new revision only when the config
text or an input file's content changed, and otherwise reports that the study is up to date.
"""

from pathlib import Path

from prefect import flow

from winnow.flows.study import StudyResult, study_flow

__all__ = ["scheduled_study"]


@flow(
    name="winnow-scheduled-study",
    flow_run_name="scheduled-{config_path}",
    description="Reread a study config and run the study; a new revision is made only when the "
    "config or its input files changed.",
)
def scheduled_study(config_path: str) -> StudyResult:
    """Run the study of ``config_path`` as it is now (see :func:`study_flow`)."""
    from winnow.flows.blocks import load_study
    from winnow.tasks.preflight import preflight

    path = Path(config_path).resolve()
    cfg, text = load_study(path)
    preflight(cfg, path.parent)
    return study_flow(cfg, base_dir=str(path.parent), config_text=text, config_path=str(path))

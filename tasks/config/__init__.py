"""Study configuration: one YAML file per study, validated by pydantic models.

Every model forbids unknown keys and every field carries a description (with its units where
it has any), so ``winnow schema`` prints a JSON Schema that documents the whole file. Relative
paths in a config are relative to the folder of the config file.

Use :func:`load_config` to read a file: a bad file raises :class:`ConfigError`, whose message
names the file, the field path and what was expected.
"""

from __future__ import annotations

from ._base import ConfigError
from ._collect import CollectSettings, QoISettings
from ._dispatch import (
    CONFIG_DIR_PLACEHOLDER,
    BatchRunner,
    BatchSettings,
    DaskRunner,
    DaskSettings,
    DispatchSettings,
    LocalClusterSettings,
)
from ._load import (
    config_hash,
    config_schema,
    format_validation_error,
    importable,
    load_config,
    model_search_path,
    parse_config,
    resolve,
)
from ._sample import (
    CheckSettings,
    ImportSettings,
    ModelSettings,
    ObservationSettings,
    Parameter,
    Prior,
    SampleSettings,
)
from ._study import StudyConfig, StudySettings
from ._thin import ThinSettings

__all__ = [
    "BatchRunner",
    "BatchSettings",
    "CONFIG_DIR_PLACEHOLDER",
    "CheckSettings",
    "CollectSettings",
    "ConfigError",
    "DaskRunner",
    "DaskSettings",
    "DispatchSettings",
    "ImportSettings",
    "LocalClusterSettings",
    "ModelSettings",
    "ObservationSettings",
    "Parameter",
    "Prior",
    "QoISettings",
    "SampleSettings",
    "StudyConfig",
    "StudySettings",
    "ThinSettings",
    "config_hash",
    "config_schema",
    "format_validation_error",
    "importable",
    "load_config",
    "model_search_path",
    "parse_config",
    "resolve",
]

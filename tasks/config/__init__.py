"""Study configuration: one YAML file per study, validated by pydantic models.

Every model forbids unknown keys and every field carries a description (with its units where
it has any), so ``winnow schema`` prints a JSON Schema that documents the whole file. Relative
paths in a config are relative to the folder of the config file.

Use :func:`load_config` to read a file: a bad file raises :class:`ConfigError`, whose message
names the file, the field path and what was expected.
"""

from __future__ import annotations

from ._base import ConfigError
from ._collect import (
    READERS,
    AxisSpec,
    CollectSettings,
    CsvReader,
    FunctionReader,
    Hdf5Reader,
    JsonReader,
    QoISettings,
    ReaderOptions,
    RegexReader,
    RowWhere,
    check_qoi_spec,
    parse_reader,
)
from ._dispatch import (
    CONFIG_DIR_PLACEHOLDER,
    BatchRunner,
    BatchSettings,
    DaskRunner,
    DaskSettings,
    DispatchSettings,
    InputFile,
    LocalClusterSettings,
)
from ._levels import LevelPairing, LevelSettings, LevelsSettings
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
from ._thin import (
    FeatureMapName,
    KernelName,
    MethodName,
    SettingTypeError,
    ThinOptions,
    ThinSettings,
    WeightsRule,
    validate_settings,
)

__all__ = [
    "READERS",
    "AxisSpec",
    "BatchRunner",
    "BatchSettings",
    "CONFIG_DIR_PLACEHOLDER",
    "CheckSettings",
    "CollectSettings",
    "ConfigError",
    "CsvReader",
    "DaskRunner",
    "DaskSettings",
    "DispatchSettings",
    "FeatureMapName",
    "FunctionReader",
    "Hdf5Reader",
    "ImportSettings",
    "InputFile",
    "JsonReader",
    "KernelName",
    "LevelPairing",
    "LevelSettings",
    "LevelsSettings",
    "LocalClusterSettings",
    "MethodName",
    "ModelSettings",
    "ObservationSettings",
    "Parameter",
    "Prior",
    "QoISettings",
    "ReaderOptions",
    "RegexReader",
    "RowWhere",
    "SampleSettings",
    "StudyConfig",
    "StudySettings",
    "SettingTypeError",
    "ThinOptions",
    "ThinSettings",
    "WeightsRule",
    "check_qoi_spec",
    "config_hash",
    "config_schema",
    "format_validation_error",
    "importable",
    "load_config",
    "model_search_path",
    "parse_reader",
    "parse_config",
    "resolve",
    "validate_settings",
]

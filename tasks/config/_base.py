"""Shared pieces of the config models: the error type and the frozen base model."""

from __future__ import annotations

import re
from typing import Any

from pydantic import (
    BaseModel,
    ConfigDict,
)

from winnow.tasks.errors import InputError


class ConfigError(InputError):
    """A study config that cannot be used; the message names the file and the field."""


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, validate_default=True)


def _units(units: str) -> dict[str, Any]:
    return {"units": units}


_NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]*$"
_CALLABLE = re.compile(r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$")

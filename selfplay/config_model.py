"""The base of every configuration section: the input rules all of them share.

- unknown keys are refused (``extra="forbid"``);
- a float field refuses ``inf``, ``-inf`` and ``nan`` (TOML can write all three);
- a number field refuses a boolean: TOML's ``true`` is not the number 1 (pydantic's lax mode
  would read it as 1).

Sections subclass :class:`ConfigModel` and may add their own ``model_config`` keys (pydantic
merges them with these).
"""

from __future__ import annotations

import types
import typing
from typing import Any

from pydantic import BaseModel, ConfigDict, ValidationInfo, field_validator


def _wants_number(annotation: Any) -> bool:
    """True for ``int``, ``float`` and optional/union forms of them that do not also take bool."""
    if annotation in (int, float):
        return True
    origin = typing.get_origin(annotation)
    if origin in (typing.Union, types.UnionType):
        args = typing.get_args(annotation)
        return bool not in args and any(a in (int, float) for a in args)
    if origin is typing.Annotated:
        return _wants_number(typing.get_args(annotation)[0])
    return False


class ConfigModel(BaseModel):
    """A configuration section: unknown keys, non-finite floats and booleans-as-numbers refused."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    @field_validator("*", mode="before")
    @classmethod
    def _no_boolean_numbers(cls, value: Any, info: ValidationInfo) -> Any:
        if isinstance(value, bool) and info.field_name is not None:
            field = cls.model_fields.get(info.field_name)
            if field is not None and _wants_number(field.annotation):
                raise ValueError("must be a number, not a boolean (true/false)")
        return value

"""The field types job files and workspace settings share: text, durations, identifiers, a strict model."""

from __future__ import annotations

from datetime import timedelta
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field

from runner.model.timeutil import BadValue, parse_duration
from runner.model.yamlfile import source_text


def _text(value: Any) -> Any:
    return source_text(value)


def _duration(value: Any) -> timedelta:
    try:
        return parse_duration(value)
    except BadValue as exc:
        raise ValueError(str(exc)) from None


Text = Annotated[str, BeforeValidator(_text)]


Duration = Annotated[
    timedelta,
    BeforeValidator(_duration),
    Field(json_schema_extra={"type": "string", "examples": ["10m", "1h", "7d", "PT10M"]}),
]


Identifier = Annotated[Text, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$")]


class Model(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True, frozen=True, defer_build=True)

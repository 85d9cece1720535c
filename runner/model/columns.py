"""A declared input column (`schema:` of an input): its type and the rules each value must meet."""

from __future__ import annotations

import difflib
import re
from typing import Any

from pydantic import Field, field_validator

from runner.model.fields import Model, Text
from runner.model.timeutil import BadValue, zone

_TYPE = re.compile(
    r"^(?:str|int|float|bool|date|datetime(?:\((?P<tz>[^)]+)\))?|decimal\((?P<p>\d+)\s*,\s*(?P<s>\d+)\))$"
)


class Column(Model):
    """One declared input column: its type and the rules each value must meet."""

    type: Text = Field(
        description="str, int, float, bool, date, datetime, datetime(ZONE) or decimal(P,S)"
    )
    nullable: bool = True
    values: list[Any] | None = Field(default=None, description="the allowed values")
    min: Any = None
    max: Any = None
    pattern: Text | None = Field(default=None, description="a regular expression each value must match")

    @field_validator("type")
    @classmethod
    def _known_type(cls, value: str) -> str:
        value = value.strip()
        m = _TYPE.match(value)
        if not m:
            choices = ["str", "int", "float", "bool", "date", "datetime", "decimal(12,2)"]
            close = difflib.get_close_matches(value, choices, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise ValueError(
                f"unknown column type {value!r}{hint}; use str, int, float, bool, date, "
                "datetime, datetime(ZONE) or decimal(P,S)"
            )
        if m.group("tz"):
            try:
                zone(m.group("tz").strip())
            except BadValue as exc:
                raise ValueError(str(exc)) from None
        if m.group("p") and not (1 <= int(m.group("p")) <= 38 and 0 <= int(m.group("s")) <= int(m.group("p"))):
            raise ValueError("decimal(P,S) needs 1 <= P <= 38 and 0 <= S <= P")
        return value

    @field_validator("pattern")
    @classmethod
    def _regex(cls, value: str | None) -> str | None:
        if value is not None:
            try:
                re.compile(value)
            except re.error as exc:
                raise ValueError(f"bad regular expression: {exc}") from None
        return value

    @field_validator("values", mode="before")
    @classmethod
    def _value_texts(cls, value: Any) -> Any:
        return value


def text_encoding(name: str) -> str:
    """A declared encoding, checked to be a text encoding Python's codecs know."""
    import codecs

    try:
        info = codecs.lookup(name.strip())
    except LookupError:
        raise ValueError(f"unknown encoding {name!r}; use a name Python's codecs know, e.g. utf-8, latin-1, "
                         "cp1252, utf-16") from None
    if not getattr(info, "_is_text_encoding", True):
        raise ValueError(f"{name!r} is not a text encoding")
    return name.strip()


def column_value(value: Any) -> Any:
    if isinstance(value, str):
        return {"type": value}
    return value

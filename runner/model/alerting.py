"""The `alerts:` part of the workspace settings file `jobs/_settings.yaml` (pure models).

```yaml
alerts:
  destinations:
    on_call:                                   # a name of your choosing
      command: /usr/local/bin/page-data-team   # run with sh -c; the event as JSON on stdin
      events: [window_failed, window_overdue]  # default: every kind
    team_chat:
      webhook: https://chat.bikes.example/hooks/weir
      secret_env: WEIR_ALERT_SECRET            # the secret's environment variable, never the secret
```

`AlertSettings` is the model the settings loader embeds under `alerts:`;
`load_alert_settings` validates that part of a loaded file on its own and
reports every problem as `FILE:LINE:COL: key.path: message`. Delivery lives
in `runner.engine.alerts`; the keys are documented in docs/alerts.md.
"""

from __future__ import annotations

import difflib
import re
from datetime import timedelta
from enum import StrEnum
from typing import Any
from urllib.parse import urlsplit

from pydantic import (
    BaseModel,
    Field,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from runner.errors import Problem, SpecProblems
from runner.model.fields import Duration, Identifier, Model, Text
from runner.model.loading import allowed_keys
from runner.model.timeutil import short_duration
from runner.model.yamlfile import Marked, dotted


class EventKind(StrEnum):
    """What an alert is about. The values are what `events:` lists and what the JSON body says."""

    WINDOW_FAILED = "window_failed"  # a window failed after its reruns
    SWAP_REFUSED = "swap_refused"  # an output check refused to replace the output
    WINDOW_OVERDUE = "window_overdue"  # a window is past its deadline and not done
    ROWS_OVER_LIMIT = "rows_over_limit"  # too many bad or dropped rows
    WINDOW_RECOVERED = "window_recovered"  # a window that had failed is done again
    TEST = "test"  # sent on request to every destination, to try the set-up


_ENV_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
# keys that only make sense for a webhook
_WEBHOOK_ONLY = ("tries", "backoff", "budget", "secret_env")


class Destination(Model):
    """Where alerts go: a shell command or an HTTP webhook (exactly one), and which events."""

    command: Text | None = Field(
        default=None, description="a command line run with sh -c; the event as JSON on stdin and in WEIR_EVENT_* variables"
    )
    webhook: Text | None = Field(default=None, description="an http:// or https:// URL; the event is POSTed as JSON")
    events: list[EventKind] | None = Field(default=None, description="the kinds of event to send; default: every kind")
    timeout: Duration = Field(
        default=timedelta(seconds=10), description="webhook: the most one try may take; command: the most it may run"
    )
    tries: int = Field(default=3, ge=1, le=10, description="webhook: tries per sending, the first included")
    backoff: Duration = Field(
        default=timedelta(seconds=1), description="webhook: the wait before the second try; doubles, with jitter"
    )
    budget: Duration = Field(
        default=timedelta(seconds=30), description="webhook: the most all tries of one sending take together"
    )
    secret_env: Text | None = Field(
        default=None, description="webhook: the environment variable holding the signing secret"
    )
    again_after: Duration = Field(
        default=timedelta(minutes=5), description="after a failed sending, try again this long after"
    )
    keep_trying: Duration = Field(
        default=timedelta(days=1), description="give up on an event this old; also the oldest event a new destination gets"
    )

    @field_validator("command")
    @classmethod
    def _command(cls, value: str | None) -> str | None:
        if value is not None and not value.strip():
            raise ValueError("the command is empty")
        return value

    @field_validator("webhook")
    @classmethod
    def _url(cls, value: str | None) -> str | None:
        if value is None:
            return None
        parts = urlsplit(value.strip())
        if parts.scheme not in ("http", "https") or not parts.hostname:
            raise ValueError(f"bad webhook URL {value!r}: write http://HOST/PATH or https://HOST/PATH")
        return value.strip()

    @field_validator("events")
    @classmethod
    def _events(cls, value: list[EventKind] | None) -> list[EventKind] | None:
        if value is None:
            return None
        if not value:
            raise ValueError("list at least one kind of event, or leave events out to send every kind")
        if EventKind.TEST in value:
            raise ValueError("test events go to every destination; do not list them")
        return value

    @field_validator(*_WEBHOOK_ONLY)
    @classmethod
    def _webhook_only(cls, value: Any, info: ValidationInfo) -> Any:
        if info.data.get("command") is not None:
            raise ValueError(f"{info.field_name} applies to webhooks only")
        return value

    @field_validator("secret_env")
    @classmethod
    def _env_name(cls, value: str | None) -> str | None:
        if value is not None and not _ENV_NAME.match(value):
            raise ValueError(
                f"secret_env names an environment variable (like WEIR_ALERT_SECRET), never the secret itself; "
                f"got {value!r}"
            )
        return value

    @field_validator("timeout", "budget", "again_after", "keep_trying")
    @classmethod
    def _positive(cls, value: timedelta, info: ValidationInfo) -> timedelta:
        if value <= timedelta(0):
            raise ValueError(f"{info.field_name} must be more than 0")
        return value

    @model_validator(mode="after")
    def _one_target(self) -> Destination:
        if (self.command is None) == (self.webhook is None):
            raise ValueError("give exactly one of command: or webhook:")
        if self.webhook is not None and self.budget < self.timeout:
            raise ValueError(f"budget {short_duration(self.budget)} is less than one try's timeout {short_duration(self.timeout)}")
        return self

    @property
    def limit(self) -> timedelta:
        """The most one sending to this destination may take: a command's timeout, a webhook's budget."""
        return self.timeout if self.command is not None else self.budget

    def wants(self, kind: EventKind) -> bool:
        """Whether this destination is sent events of `kind` (test events go everywhere)."""
        return kind is EventKind.TEST or self.events is None or kind in self.events


class AlertSettings(Model):
    """The `alerts:` mapping of the workspace settings file."""

    destinations: dict[Identifier, Destination] = Field(
        default_factory=dict, description="destination name -> a command or a webhook"
    )


# ---------------------------------------------------------------- located validation


def load_alert_settings(marked: Marked, shown: str, at: tuple[str | int, ...] = ("alerts",)) -> AlertSettings:
    """Validate the part of a loaded settings file at key path `at` (absent: no destinations).

    Raises SpecProblems carrying every problem, each located at its key or value.
    """
    node: Any = marked.data
    for part in at:
        node = node.get(part) if isinstance(node, dict) else None
    if node is None:
        return AlertSettings()
    try:
        return AlertSettings.model_validate(node)
    except ValidationError as exc:
        raise SpecProblems(located(exc, marked, shown, at, AlertSettings)) from None


def located(
    exc: ValidationError, marked: Marked, shown: str, at: tuple[str | int, ...], root: type[BaseModel]
) -> list[Problem]:
    """One Problem per pydantic error of a model validated from the YAML found at `at`."""
    out: set[Problem] = set()
    for error in exc.errors(include_url=False):
        loc = tuple(error["loc"])
        message = error["msg"].removeprefix("Value error, ")
        where, on_key = at + loc, False
        if error["type"] == "extra_forbidden":
            on_key, name = True, str(loc[-1])
            allowed = sorted(allowed_keys(loc[:-1], root))
            close = difflib.get_close_matches(name, allowed, n=1, cutoff=0.6)
            hint = f"did you mean {close[0]!r}?" if close else f"allowed: {', '.join(allowed)}"
            message = f"unknown key {name!r} ({hint})"
        elif error["type"] == "enum":
            message = f"{message}; got {error.get('input')!r}"
        elif error["type"] in ("model_type", "dict_type"):
            message = "must be a mapping (key: value lines)"
        if loc and loc[-1] == "[key]":  # a bad name: point at the key itself
            loc, where, on_key = loc[:-1], where[:-1], True
            message = "a name is letters, digits and _, and does not start with a digit"
        line, col = marked.where(where, key=on_key)
        out.add(Problem(shown, line, col, dotted(at + loc), message))
    return sorted(out)

"""The `alerts:` part of jobs/_settings.yaml: defaults, and one located line per mistake.

Problems render as `FILE:LINE:COL: key.path: message`; lines and columns
(1-based) were counted by hand from each case's YAML text.
"""

from __future__ import annotations

import re
import textwrap
from datetime import timedelta
from pathlib import Path

import pytest

from runner.errors import SpecProblems
from runner.model.alerting import AlertSettings, Destination, EventKind, load_alert_settings
from runner.model.yamlfile import load_marked

ROOT = Path(__file__).resolve().parent.parent
FILE = "jobs/_settings.yaml"


def load(text: str) -> AlertSettings:
    return load_alert_settings(load_marked(textwrap.dedent(text)), FILE)


def problems(text: str) -> list[str]:
    with pytest.raises(SpecProblems) as caught:
        load(text)
    return [p.render() for p in caught.value.problems]


def test_a_settings_file_without_alerts_has_no_destinations():
    assert load("other_setting: 1\n") == AlertSettings()
    assert load("").destinations == {}


def test_destinations_get_their_documented_defaults():
    settings = load("""\
        alerts:
          destinations:
            pager: {command: /usr/local/bin/page-data-team}
            chat: {webhook: "https://chat.bikes.example/hooks/weir", secret_env: WEIR_ALERT_SECRET}
        """)
    pager, chat = settings.destinations["pager"], settings.destinations["chat"]
    assert pager.command == "/usr/local/bin/page-data-team" and pager.webhook is None
    assert chat.webhook == "https://chat.bikes.example/hooks/weir" and chat.secret_env == "WEIR_ALERT_SECRET"
    # the defaults docs/alerts.md states
    assert (chat.timeout, chat.tries, chat.backoff, chat.budget) == (
        timedelta(seconds=10), 3, timedelta(seconds=1), timedelta(seconds=30))
    assert (chat.again_after, chat.keep_trying) == (timedelta(minutes=5), timedelta(days=1))
    assert pager.limit == timedelta(seconds=10) and chat.limit == timedelta(seconds=30)
    assert all(pager.wants(kind) for kind in EventKind)


def test_a_destination_listing_events_wants_those_and_test_events_only():
    only = Destination.model_validate({"command": "true", "events": ["window_failed", "window_overdue"]})
    assert [k for k in EventKind if only.wants(k)] == [
        EventKind.WINDOW_FAILED, EventKind.WINDOW_OVERDUE, EventKind.TEST]


CASES = [
    (
        "unknown key, with the close one",
        """\
        alerts:
          destinations:
            chat:
              webhook: https://chat.bikes.example/hooks/weir
              secret: hunter2
        """,
        "jobs/_settings.yaml:5:7: alerts.destinations.chat.secret: unknown key 'secret' (did you mean 'secret_env'?)",
    ),
    (
        "unknown key under alerts",
        "alerts:\n  destination: {}\n",
        "jobs/_settings.yaml:2:3: alerts.destination: unknown key 'destination' (did you mean 'destinations'?)",
    ),
    (
        "a webhook-only key on a command",
        """\
        alerts:
          destinations:
            pager:
              command: page-me
              tries: 5
        """,
        "jobs/_settings.yaml:5:14: alerts.destinations.pager.tries: tries applies to webhooks only",
    ),
    (
        "neither command nor webhook",
        "alerts:\n  destinations:\n    pager: {events: [window_failed]}\n",
        "jobs/_settings.yaml:3:12: alerts.destinations.pager: give exactly one of command: or webhook:",
    ),
    (
        "both command and webhook",
        "alerts:\n  destinations:\n    x: {command: a, webhook: 'http://h.example/'}\n",
        "jobs/_settings.yaml:3:8: alerts.destinations.x: give exactly one of command: or webhook:",
    ),
    (
        "a URL that is not http",
        "alerts:\n  destinations:\n    x: {webhook: 'ftp://files.example/in'}\n",
        "jobs/_settings.yaml:3:18: alerts.destinations.x.webhook: bad webhook URL 'ftp://files.example/in': "
        "write http://HOST/PATH or https://HOST/PATH",
    ),
    (
        "the secret itself where its variable's name goes",
        "alerts:\n  destinations:\n    x: {webhook: 'https://h.example/', secret_env: 's3cr3t-42!'}\n",
        "jobs/_settings.yaml:3:52: alerts.destinations.x.secret_env: secret_env names an environment variable "
        "(like WEIR_ALERT_SECRET), never the secret itself; got 's3cr3t-42!'",
    ),
    (
        "an unknown kind of event",
        "alerts:\n  destinations:\n    x:\n      command: a\n      events: [window_failed, window_late]\n",
        "jobs/_settings.yaml:5:31: alerts.destinations.x.events.1: Input should be 'window_failed', "
        "'swap_refused', 'window_overdue', 'rows_over_limit', 'window_recovered' or 'test'; got 'window_late'",
    ),
    (
        "an empty list of events",
        "alerts:\n  destinations:\n    x: {command: a, events: []}\n",
        "jobs/_settings.yaml:3:29: alerts.destinations.x.events: list at least one kind of event, "
        "or leave events out to send every kind",
    ),
    (
        "a duration without a unit",
        "alerts:\n  destinations:\n    x: {command: a, timeout: 30}\n",
        "jobs/_settings.yaml:3:30: alerts.destinations.x.timeout: bad duration 30: add a unit (s, m, h, d, w), "
        "like 30m",
    ),
    (
        "a budget shorter than one try",
        "alerts:\n  destinations:\n    x: {webhook: 'http://h.example/', timeout: 20s, budget: 10s}\n",
        "jobs/_settings.yaml:3:8: alerts.destinations.x: budget 10s is less than one try's timeout 20s",
    ),
    (
        "a destination name that is not a name",
        "alerts:\n  destinations:\n    on-call: {command: a}\n",
        "jobs/_settings.yaml:3:5: alerts.destinations.on-call: a name is letters, digits and _, "
        "and does not start with a digit",
    ),
    (
        "alerts as a list",
        "alerts:\n  - command: a\n",
        "jobs/_settings.yaml:2:3: alerts: must be a mapping (key: value lines)",
    ),
]


@pytest.mark.parametrize(("text", "expected"), [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_each_mistake_is_one_located_line(text, expected):
    assert problems(text) == [expected]


def test_every_mistake_in_the_file_is_reported_at_once():
    found = problems("""\
        alerts:
          destinations:
            pager: {command: a, backoff: 2s}
            chat: {webhook: 'https://h.example/', tmeout: 3s}
        """)
    assert [re.match(r"\S+:(\d+):(\d+):", line).groups() for line in found] == [("3", "34"), ("4", "43")]


def test_docs_alerts_md_names_every_settings_key():
    text = (ROOT / "docs" / "alerts.md").read_text()
    documented = set(re.findall(r"`([a-z_]+)`", text))
    keys = {info.alias or name for model in (AlertSettings, Destination) for name, info in model.model_fields.items()}
    kinds = {str(kind) for kind in EventKind}
    assert not (keys | kinds) - documented

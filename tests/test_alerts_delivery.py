"""Alert delivery against real receivers: an HTTP server on 127.0.0.1 (tests/servers.py), and `sh -c` commands.

Backoff and retry times run on an injected clock that only moves when the
injected sleep is called, so no test sleeps on the wall clock for a backoff.
Where a test needs real time (a server or a command that hangs), the bound it
asserts is generous (timeout + 5 s): a hang guard, not a speed test.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import re
import shlex
import socket
import threading
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from servers import receiving

from runner.engine.alerts import (
    Delivery,
    Event,
    EventKind,
    MemoryAlertStore,
    body,
    deliver,
    deliver_pending,
    new_event,
    send_test_event,
)
from runner.model.alerting import Destination

ROOT = Path(__file__).resolve().parent.parent
T0 = datetime(2026, 3, 25, 3, 0, tzinfo=UTC)
SECRET = "correct horse battery staple"
HANG_BOUND = 5.0  # seconds beyond a timeout that a loaded machine may need to hand back


@pytest.fixture(autouse=True)
def _no_proxies(monkeypatch: pytest.MonkeyPatch) -> None:
    """urllib honours *_proxy variables; these tests talk to loopback only."""
    for name in ("http_proxy", "https_proxy", "all_proxy", "HTTP_PROXY", "HTTPS_PROXY", "ALL_PROXY"):
        monkeypatch.delenv(name, raising=False)


class FakeTime:
    """A clock that moves only when `sleep` is called; safe to share between threads."""

    def __init__(self, start: datetime = T0) -> None:
        self._now = start
        self._lock = threading.Lock()
        self.slept: list[float] = []

    def clock(self) -> datetime:
        with self._lock:
            return self._now

    def sleep(self, seconds: float) -> None:
        with self._lock:
            self.slept.append(seconds)
            self._now += timedelta(seconds=seconds)


def real_clock() -> datetime:
    return datetime.now(UTC)


def closed_port() -> int:
    """A loopback port nothing listens on (bound, then released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def webhook(url: str, **keys: object) -> Destination:
    return Destination.model_validate({"webhook": url, **keys})


def command(line: str, **keys: object) -> Destination:
    return Destination.model_validate({"command": line, **keys})


def failed(window: str = "2026-03-25T02:00+00:00", run: str = "41", when: datetime = T0) -> Event:
    return new_event(
        EventKind.WINDOW_FAILED, job="rides_hourly", window=window, when=when,
        summary=f"rides_hourly {window} failed after 2 reruns", details={"run_id": run, "reruns": 2}, key=run,
    )


def overdue(window: str, when: datetime = T0) -> Event:
    return new_event(
        EventKind.WINDOW_OVERDUE, job="rides_daily", window=window, when=when,
        summary=f"rides_daily {window} is overdue",
    )


# ---------------------------------------------------------------- the webhook


def test_each_event_reaches_the_webhook_in_exactly_one_signed_post_with_the_documented_body(monkeypatch):
    monkeypatch.setenv("WEIR_TEST_ALERT_SECRET", SECRET)
    events = [failed("2026-03-25T01:00+00:00", "40", T0), failed("2026-03-25T02:00+00:00", "41", T0 + timedelta(minutes=1))]
    store = MemoryAlertStore()
    store.add(events)
    time_ = FakeTime()
    with receiving() as server:
        hook = {"chat": webhook(server.url, secret_env="WEIR_TEST_ALERT_SECRET")}
        first = deliver_pending(store, hook, clock=time_.clock, sleep=time_.sleep, budget=timedelta(seconds=30))
        again = deliver_pending(store, hook, clock=time_.clock, sleep=time_.sleep, budget=timedelta(seconds=30))
    assert [(d.event_id, d.ok, d.tries) for d in first] == [(e.id, True, 1) for e in events]
    assert again == []
    posts = server.posts()
    assert len(posts) == 2
    # the times the events were raised, in RFC 3339 UTC, written by hand
    for event, when, (headers, raw) in zip(events, ["2026-03-25T03:00:00Z", "2026-03-25T03:01:00Z"], posts,
                                           strict=True):
        # the signature, recomputed with the standard library's hmac (RFC 2104) over the raw bytes received
        expected = "sha256=" + hmac.new(SECRET.encode(), raw, hashlib.sha256).hexdigest()
        assert hmac.compare_digest(headers["Weir-Signature"], expected)
        assert headers["Weir-Event-Id"] == event.id
        assert headers["Weir-Event-Kind"] == "window_failed"
        assert headers["Content-Type"].startswith("application/json")
        document = json.loads(raw)
        assert document == {
            "schema_version": 1,
            "id": event.id,
            "kind": "window_failed",
            "job": "rides_hourly",
            "window": event.window,
            "when": when,
            "summary": event.summary,
            "details": {"run_id": event.details["run_id"], "reruns": 2},
        }
    assert [path for _, path, _, _ in server.requests] == ["/hooks/weir", "/hooks/weir"]


def test_the_body_has_the_fields_docs_alerts_md_shows_in_its_example():
    text = (ROOT / "docs" / "alerts.md").read_text()
    example = json.loads(re.search(r"```json\n(.*?)```", text, re.S).group(1))
    sent = json.loads(body(failed()))
    assert list(example) == list(sent)
    assert {k: type(v) for k, v in example.items()} == {k: type(v) for k, v in sent.items()}
    # RFC 3339 UTC instant with Z, as the docs promise; datetime.fromisoformat reads it back (Python 3.11+)
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", example["when"])
    assert datetime.fromisoformat(sent["when"]) == T0


def test_a_webhook_answering_500_is_tried_again_after_the_backoff_and_the_second_try_succeeds():
    time_ = FakeTime()
    with receiving(500, 200) as server:
        outcome = deliver(failed(), "chat", webhook(server.url, backoff="2s"),
                          clock=time_.clock, sleep=time_.sleep, rand=lambda: 1.0)
    assert outcome.ok and outcome.tries == 2 and outcome.reason == ""
    assert time_.slept == [2.0]  # the first wait is `backoff` when the jitter factor is at its top (1.0)
    (h1, b1), (h2, b2) = server.posts()
    assert b1 == b2 and h1["Weir-Event-Id"] == h2["Weir-Event-Id"]  # a receiver can drop the repeat


@pytest.mark.parametrize(("rand", "waits"), [(1.0, [1.0, 2.0, 4.0]), (0.0, [0.5, 1.0, 2.0])])
def test_waits_between_tries_double_and_jitter_takes_at_most_half_of_each(rand, waits):
    # waits computed by hand: backoff 1 s doubling (1, 2, 4); jitter scales each by 0.5 .. 1.0
    time_ = FakeTime()
    with receiving(503, 503, 503, 200) as server:
        outcome = deliver(failed(), "chat", webhook(server.url, tries=4, backoff="1s"),
                          clock=time_.clock, sleep=time_.sleep, rand=lambda: rand)
    assert outcome.ok and outcome.tries == 4
    assert time_.slept == waits
    assert len(server.posts()) == 4


def test_tries_stop_when_the_next_wait_would_pass_the_budget():
    # budget 5 s, backoff 2 s: after try 1 wait 2 s (t=2), after try 2 the wait of 4 s would end at t=6 > 5
    time_ = FakeTime()
    with receiving(500, 500, 500, 500, 500) as server:
        outcome = deliver(failed(), "chat", webhook(server.url, tries=5, backoff="2s", budget="5s", timeout="2s"),
                          clock=time_.clock, sleep=time_.sleep, rand=lambda: 1.0)
    assert not outcome.ok and outcome.tries == 2
    assert time_.slept == [2.0]
    assert "HTTP 500" in outcome.reason and "no time left" in outcome.reason
    assert len(server.posts()) == 2
    assert outcome.retry_at == T0 + timedelta(seconds=2) + timedelta(minutes=5)


def test_a_client_error_is_not_tried_again_within_the_sending_but_is_later():
    time_ = FakeTime()
    with receiving(404) as server:
        outcome = deliver(failed(), "chat", webhook(server.url), clock=time_.clock, sleep=time_.sleep)
    assert not outcome.ok and outcome.tries == 1 and outcome.reason == "HTTP 404 Not Found"
    assert outcome.retry_at == T0 + timedelta(minutes=5)
    assert len(server.posts()) == 1


def test_a_redirect_is_reported_and_not_followed():
    """urllib would turn a redirected POST into a GET without the alert and call that success."""
    time_ = FakeTime()
    with receiving(302) as server:
        outcome = deliver(failed(), "chat", webhook(server.url), clock=time_.clock, sleep=time_.sleep)
    assert not outcome.ok and "HTTP 302" in outcome.reason and "/elsewhere" in outcome.reason
    assert [method for method, *_ in server.requests] == ["POST"]


def test_a_hanging_webhook_costs_at_most_its_timeout():
    with receiving("hang", "hang", "hang") as server:
        started = time.monotonic()
        outcome = deliver(failed(), "chat", webhook(server.url, timeout="1s", budget="1s", tries=3),
                          clock=real_clock, sleep=time.sleep)
        took = time.monotonic() - started
    assert outcome.tries == 1 and not outcome.ok
    assert "within 1 s" in outcome.reason or "timed out" in outcome.reason
    assert took < 1 + HANG_BOUND  # hang guard: the call came back


def test_a_webhook_answering_a_byte_at_a_time_costs_at_most_its_timeout():
    """The socket timeout bounds each read, not the whole answer: a trickle would hold it for ever."""
    with receiving("trickle") as server:
        started = time.monotonic()
        outcome = deliver(failed(), "chat", webhook(server.url, timeout="1s", budget="1s"),
                          clock=real_clock, sleep=time.sleep)
        took = time.monotonic() - started
    assert not outcome.ok and "no answer from" in outcome.reason
    assert took < 1 + HANG_BOUND  # hang guard: the call came back


def test_a_down_port_gives_a_failed_delivery_with_the_reason_and_a_retry_time_from_the_clock():
    port = closed_port()
    time_ = FakeTime()
    outcome = deliver(failed(), "chat", webhook(f"http://127.0.0.1:{port}/x", tries=2, backoff="1s",
                                                again_after="10m"),
                      clock=time_.clock, sleep=time_.sleep, rand=lambda: 1.0)
    assert not outcome.ok and outcome.tries == 2
    assert f"cannot reach 127.0.0.1:{port}" in outcome.reason
    assert outcome.at == T0 + timedelta(seconds=1)  # one wait of 1 s between the two tries
    assert outcome.retry_at == T0 + timedelta(seconds=1) + timedelta(minutes=10)


def test_a_missing_secret_sends_nothing_rather_than_an_unsigned_post(monkeypatch):
    monkeypatch.delenv("WEIR_TEST_ABSENT_SECRET", raising=False)
    time_ = FakeTime()
    with receiving() as server:
        outcome = deliver(failed(), "chat", webhook(server.url, secret_env="WEIR_TEST_ABSENT_SECRET"),
                          clock=time_.clock, sleep=time_.sleep)
    assert not outcome.ok and outcome.tries == 0
    assert "WEIR_TEST_ABSENT_SECRET" in outcome.reason
    assert server.requests == []


# ---------------------------------------------------------------- the command


def test_a_command_gets_the_event_as_json_on_stdin_and_in_environment_variables(tmp_path):
    got_json, got_env = tmp_path / "event.json", tmp_path / "event.env"
    line = (f"cat > {shlex.quote(str(got_json))}; "
            f"env | grep '^WEIR_EVENT_' | sort > {shlex.quote(str(got_env))}")
    event = failed()
    time_ = FakeTime()
    outcome = deliver(event, "pager", command(line), clock=time_.clock, sleep=time_.sleep)
    assert outcome == Delivery(event.id, "pager", True, 1, T0)
    assert got_json.read_bytes() == body(event)
    assert json.loads(got_json.read_text())["id"] == event.id
    assert got_env.read_text().splitlines() == [
        f"WEIR_EVENT_ID={event.id}",
        "WEIR_EVENT_JOB=rides_hourly",
        "WEIR_EVENT_KIND=window_failed",
        "WEIR_EVENT_SUMMARY=rides_hourly 2026-03-25T02:00+00:00 failed after 2 reruns",
        "WEIR_EVENT_WHEN=2026-03-25T03:00:00Z",
        "WEIR_EVENT_WINDOW=2026-03-25T02:00+00:00",
    ]


def test_a_failing_command_is_a_failed_delivery_with_its_status_and_last_error_line():
    time_ = FakeTime()
    outcome = deliver(failed(), "pager", command("echo starting >&2; echo mailbox full >&2; exit 3"),
                      clock=time_.clock, sleep=time_.sleep)
    assert not outcome.ok
    assert outcome.reason == "command exited with status 3: mailbox full"
    assert outcome.retry_at == T0 + timedelta(minutes=5)


def _ended(pid: int) -> bool:
    """Whether a process is gone or a zombie nobody has reaped yet (/proc/PID/stat, Linux)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except FileNotFoundError:
        return True
    return stat.rsplit(")", 1)[1].split()[0] == "Z"


def test_a_hanging_command_and_what_it_started_are_stopped_at_its_timeout(tmp_path):
    pid_file = tmp_path / "child.pid"
    line = f"sleep 60 & echo $! > {shlex.quote(str(pid_file))}; wait"
    started = time.monotonic()
    outcome = deliver(failed(), "pager", command(line, timeout="1s"), clock=real_clock, sleep=time.sleep)
    took = time.monotonic() - started
    assert not outcome.ok and "did not finish within 1 s" in outcome.reason
    assert took < 1 + HANG_BOUND  # hang guard: the call came back
    child = int(pid_file.read_text())
    give_up = time.monotonic() + HANG_BOUND
    while not _ended(child) and time.monotonic() < give_up:
        time.sleep(0.05)
    assert _ended(child), "the command's own child outlived the timeout"


# ---------------------------------------------------------------- events, the store, the pass


def test_the_store_keeps_an_event_once_when_it_is_added_twice():
    store = MemoryAlertStore()
    event = overdue("2026-03-24")
    assert store.add([event]) == [event]
    # a second runner raising the same event later gives it the same id
    same = overdue("2026-03-24", when=T0 + timedelta(minutes=3))
    assert same.id == event.id
    assert store.add([same, event]) == []
    assert list(store.events) == [event.id]
    assert store.pending("chat", kinds=None, since=T0 - timedelta(days=1), now=T0, limit=10) == [event]


def test_events_of_other_runs_or_windows_get_other_ids():
    ids = {failed(run="41").id, failed(run="42").id, failed(window="2026-03-25T01:00+00:00").id,
           overdue("2026-03-25T02:00+00:00").id}
    assert len(ids) == 4


def test_a_down_destination_defers_all_its_pending_events_to_one_retry_time():
    store = MemoryAlertStore()
    events = [failed(run=str(n), when=T0 + timedelta(minutes=n)) for n in range(3)]
    store.add(events)
    time_ = FakeTime(T0 + timedelta(minutes=5))
    hook = {"chat": webhook(f"http://127.0.0.1:{closed_port()}/x", tries=1)}
    made = deliver_pending(store, hook, clock=time_.clock, sleep=time_.sleep, budget=timedelta(seconds=30))
    assert [(d.event_id, d.ok, d.tries) for d in made] == [(e.id, False, 1 if i == 0 else 0)
                                                             for i, e in enumerate(events)]
    retry = T0 + timedelta(minutes=10)
    assert {d.retry_at for d in made} == {retry}
    assert store.deliveries == made
    kw = {"kinds": None, "since": T0 - timedelta(days=1), "limit": 10}
    assert store.pending("chat", now=retry - timedelta(seconds=1), **kw) == []
    assert store.pending("chat", now=retry, **kw) == events


def test_a_destination_gets_only_the_kinds_it_lists_and_nothing_older_than_keep_trying():
    store = MemoryAlertStore()
    old = failed(run="1", when=T0 - timedelta(hours=3))
    recent_failed, recent_overdue = failed(run="2"), overdue("2026-03-24")
    store.add([old, recent_failed, recent_overdue])
    time_ = FakeTime()
    with receiving() as server:
        hooks = {"failures": webhook(server.url, events=["window_failed"], keep_trying="2h")}
        made = deliver_pending(store, hooks, clock=time_.clock, sleep=time_.sleep, budget=timedelta(seconds=30))
    assert [d.event_id for d in made] == [recent_failed.id]
    assert [json.loads(raw)["id"] for _, raw in server.posts()] == [recent_failed.id]


def test_a_hanging_webhook_does_not_hold_back_a_command_and_the_pass_keeps_its_budget(tmp_path):
    store = MemoryAlertStore()
    event = failed(when=real_clock())  # on the real clock, so that it is not past keep_trying
    store.add([event])
    out = tmp_path / "paged.json"
    with receiving("hang") as server:
        destinations = {
            "a_chat": webhook(server.url, timeout="2s", budget="2s"),
            "b_pager": command(f"cat > {shlex.quote(str(out))}"),
        }
        started = time.monotonic()
        made = deliver_pending(store, destinations, clock=real_clock, sleep=time.sleep,
                               budget=timedelta(seconds=3))
        took = time.monotonic() - started
    by_name = {d.destination: d for d in made}
    assert by_name["b_pager"].ok and out.read_bytes() == body(event)
    assert not by_name["a_chat"].ok
    assert took < 3 + HANG_BOUND  # hang guard: the pass came back


def test_the_test_event_goes_to_every_destination_whatever_it_lists(tmp_path):
    out = tmp_path / "test.json"
    time_ = FakeTime()
    with receiving() as server:
        destinations = {
            "chat": webhook(server.url, events=["window_overdue"]),
            "pager": command(f"cat > {shlex.quote(str(out))}", events=["window_failed"]),
        }
        made = send_test_event(destinations, clock=time_.clock, sleep=time_.sleep)
    assert [(d.destination, d.ok) for d in made] == [("chat", True), ("pager", True)]
    ((_, raw),) = server.posts()
    sent = json.loads(raw)
    assert sent["kind"] == "test" and sent["job"] is None and sent["window"] is None
    assert json.loads(out.read_text()) == sent


def test_the_signature_check_in_docs_alerts_md_accepts_weirs_signature_and_rejects_a_changed_body():
    text = (ROOT / "docs" / "alerts.md").read_text()
    (snippet,) = [block for block in re.findall(r"```python\n(.*?)```", text, re.S) if "def verified" in block]
    scope: dict[str, object] = {}
    exec(snippet, scope)
    verified = scope["verified"]
    time_ = FakeTime()
    with receiving() as server:
        assert deliver(failed(), "chat", webhook(server.url, secret_env="SECRET_FOR_DOCS"),
                       clock=time_.clock, sleep=time_.sleep, environ={"SECRET_FOR_DOCS": SECRET}).ok
    ((headers, raw),) = server.posts()
    assert verified(raw, headers["Weir-Signature"], SECRET)
    assert not verified(raw.replace(b"rides_hourly", b"rides_hourlx"), headers["Weir-Signature"], SECRET)
    assert not verified(raw, headers["Weir-Signature"], SECRET + "!")


def test_a_command_that_leaves_something_running_in_the_background_is_done_when_it_exits():
    """Its background child keeps the inherited standard error open; weir must not wait for it."""
    time_ = FakeTime()
    outcome = deliver(failed(), "pager", command("sleep 20 & exit 0", timeout="5s"),
                      clock=time_.clock, sleep=time_.sleep)
    assert outcome.ok and outcome.tries == 1 and outcome.reason == ""

"""Alert events and their delivery to shell commands and HTTP webhooks.

An `Event` says that something needs a person: a window failed after its
reruns, an output check refused a swap, a window is overdue, too many rows
were bad or dropped, a failed window recovered. Its id is derived from what
it is about (`new_event`), so two runners, or one runner before and after a
restart, that raise the same event give it the same id, and a store that
keeps events by id keeps it once.

Delivery is *at least once, deduplicated by event id*: an event is sent to a
destination until one sending succeeds; the id travels in the body and in the
`Weir-Event-Id` header so that a receiver can drop a repeat. `deliver` makes
one sending (a command run with a time limit, or a webhook POST with a
timeout, tries, exponential backoff with jitter, all within a budget) and
never raises: a destination that is down gives a failed `Delivery` with the
reason and when to try again. `deliver_pending` sends what a store holds,
each destination in its own thread, and returns within its budget whatever
the destinations do. The JSON body is documented in docs/alerts.md; its
`schema_version` changes only when a field changes meaning or goes away.

Only the standard library: urllib for HTTP, hmac and hashlib for signatures,
subprocess for commands.
"""

from __future__ import annotations

import contextlib
import hashlib
import hmac
import json
import os
import queue
import random
import signal
import socket
import subprocess
import tempfile
import threading
import urllib.error
import urllib.request
import uuid
from collections.abc import Callable, Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from types import MappingProxyType
from typing import Any, Protocol
from urllib.parse import urlsplit

from runner import __version__
from runner.core.fingerprints import canonical_json, digest
from runner.model.alerting import Destination, EventKind
from runner.model.timeutil import format_utc

__all__ = [
    "SCHEMA_VERSION", "EVENT_ID_HEADER", "EVENT_KIND_HEADER", "SIGNATURE_HEADER",
    "AlertStore", "Delivery", "Event", "EventKind", "MemoryAlertStore",
    "body", "deliver", "deliver_pending", "event_environment", "new_event", "send_test_event", "sign",
]

SCHEMA_VERSION = 1
EVENT_ID_HEADER = "Weir-Event-Id"
EVENT_KIND_HEADER = "Weir-Event-Kind"
SIGNATURE_HEADER = "Weir-Signature"

Clock = Callable[[], datetime]
Sleep = Callable[[float], None]
Random = Callable[[], float]

_READ_LIMIT = 64 * 1024  # bytes of a webhook's answer read (and ignored)
_PENDING_BATCH = 100  # events per destination per pass
_GRACE = 1.0  # seconds a pass waits beyond its budget for a sending to hand back its result


# ---------------------------------------------------------------- events


@dataclass(frozen=True)
class Event:
    """One alert. `when` is an aware instant; `window` the window's local ISO 8601 id (or None)."""

    id: str
    kind: EventKind
    job: str | None
    window: str | None
    when: datetime
    summary: str
    details: Mapping[str, Any] = field(default_factory=dict, hash=False)

    def __post_init__(self) -> None:
        if self.when.tzinfo is None:
            raise ValueError("an event's time must carry its offset")
        object.__setattr__(self, "kind", EventKind(self.kind))
        object.__setattr__(self, "details", MappingProxyType(dict(self.details)))


def new_event(
    kind: EventKind, *, job: str | None, window: str | None, when: datetime, summary: str,
    details: Mapping[str, Any] | None = None, key: str = "",
) -> Event:
    """An event whose id depends on (kind, job, window, key) only, not on when it was raised.

    `key` tells apart events that may happen more than once for the same window
    (the run id of a failed run, say); leave it empty for what happens once per
    window (overdue).
    """
    ident = digest(canonical_json([str(kind), job, window, key]))
    return Event(ident, kind, job, window, when, summary, details or {})


def body(event: Event) -> bytes:
    """The JSON document sent for an event (UTF-8, indented, newline at the end)."""
    document = {
        "schema_version": SCHEMA_VERSION,
        "id": event.id,
        "kind": str(event.kind),
        "job": event.job,
        "window": event.window,
        "when": format_utc(event.when),
        "summary": event.summary,
        "details": dict(event.details),
    }
    return (json.dumps(document, ensure_ascii=False, indent=2, default=str) + "\n").encode()


def sign(data: bytes, secret: str) -> str:
    """The `Weir-Signature` value: `sha256=` and the hex HMAC-SHA256 of the body with the secret."""
    return "sha256=" + hmac.new(secret.encode(), data, hashlib.sha256).hexdigest()


def event_environment(event: Event) -> dict[str, str]:
    """The WEIR_EVENT_* variables a command destination gets (empty text for an absent job or window)."""
    return {
        "WEIR_EVENT_ID": event.id,
        "WEIR_EVENT_KIND": str(event.kind),
        "WEIR_EVENT_JOB": event.job or "",
        "WEIR_EVENT_WINDOW": event.window or "",
        "WEIR_EVENT_WHEN": format_utc(event.when),
        "WEIR_EVENT_SUMMARY": event.summary,
    }


# ---------------------------------------------------------------- one sending


@dataclass(frozen=True)
class Delivery:
    """The outcome of one sending of an event to a destination.

    `tries` counts the requests or command runs made (0: none was made, because the
    destination had just failed or a secret was missing). A failed delivery has a
    `reason` and `retry_at`, the earliest time to try again (None only for a test
    event that gave no result in time).
    """

    event_id: str
    destination: str
    ok: bool
    tries: int
    at: datetime
    reason: str = ""
    retry_at: datetime | None = None


def deliver(
    event: Event, name: str, destination: Destination, *, clock: Clock, sleep: Sleep,
    within: timedelta | None = None, rand: Random = random.random, environ: Mapping[str, str] | None = None,
) -> Delivery:
    """Send `event` to the destination called `name`, once (with the webhook's tries); never raises.

    Takes at most the destination's limit (a command's timeout, a webhook's budget),
    or `within` when that is shorter. `environ` stands for the process environment
    (the command's base environment, where `secret_env` is looked up).
    """
    limit = destination.limit if within is None else min(destination.limit, within)
    env = os.environ if environ is None else environ
    try:
        if destination.command is not None:
            ok, tries, reason = _run_command(event, destination.command, limit, env)
        else:
            ok, tries, reason = _post(event, destination, limit, env, clock, sleep, rand)
    except Exception as exc:  # the contract: an alert never breaks the run that raised it
        ok, tries, reason = False, 0, f"internal error: {exc!r}"
    end = clock()
    if ok:
        return Delivery(event.id, name, True, tries, end)
    return Delivery(event.id, name, False, tries, end, reason, end + destination.again_after)


def _run_command(event: Event, command: str, limit: timedelta, env: Mapping[str, str]) -> tuple[bool, int, str]:
    seconds = limit.total_seconds()
    # standard error goes to a file, not a pipe: something the command leaves running in the
    # background would hold a pipe open, and weir would wait for it until the timeout
    with tempfile.TemporaryFile() as err:
        try:
            process = subprocess.Popen(
                ["sh", "-c", command], stdin=subprocess.PIPE, stdout=subprocess.DEVNULL, stderr=err,
                env={**env, **event_environment(event)}, start_new_session=True,
            )
        except OSError as exc:
            return False, 0, f"cannot start the command: {exc}"
        try:
            process.communicate(body(event), timeout=seconds)
        except subprocess.TimeoutExpired:
            _stop(process)
            return False, 1, f"command did not finish within {_seconds(seconds)} s and was stopped"
        if process.returncode == 0:
            return True, 1, ""
        err.seek(0)
        said = err.read().decode(errors="replace").strip().splitlines()
    tail = f": {said[-1][:300]}" if said else ""
    if process.returncode < 0:
        return False, 1, f"command was ended by signal {-process.returncode}{tail}"
    return False, 1, f"command exited with status {process.returncode}{tail}"


def _stop(process: subprocess.Popen[bytes]) -> None:
    """Kill the command and everything it started (its own session), then reap it."""
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(process.pid, signal.SIGKILL)
    process.kill()
    process.wait()
    if process.stdin is not None:
        with contextlib.suppress(OSError):
            process.stdin.close()


def _post(
    event: Event, destination: Destination, limit: timedelta, env: Mapping[str, str],
    clock: Clock, sleep: Sleep, rand: Random,
) -> tuple[bool, int, str]:
    assert destination.webhook is not None
    data = body(event)
    headers = {
        "Content-Type": "application/json; charset=utf-8",
        "User-Agent": f"weir/{__version__}",
        EVENT_ID_HEADER: event.id,
        EVENT_KIND_HEADER: str(event.kind),
    }
    if destination.secret_env is not None:
        secret = env.get(destination.secret_env)
        if not secret:
            return False, 0, f"environment variable {destination.secret_env} (secret_env) is not set; not sent unsigned"
        headers[SIGNATURE_HEADER] = sign(data, secret)
    deadline = clock() + limit
    timeout = destination.timeout.total_seconds()
    reason = ""
    for attempt in range(1, destination.tries + 1):
        left = (deadline - clock()).total_seconds()
        if left <= 0:
            return False, attempt - 1, reason or "no time left to send"
        ok, again, reason = _post_once(destination.webhook, data, headers, min(timeout, left))
        if ok:
            return True, attempt, ""
        if not again or attempt == destination.tries:
            return False, attempt, reason
        wait = destination.backoff.total_seconds() * 2 ** (attempt - 1) * (0.5 + 0.5 * rand())
        if clock() + timedelta(seconds=wait) >= deadline:
            return False, attempt, f"{reason}; no time left for another try"
        sleep(wait)
    raise AssertionError("unreachable: the last try returns")  # pragma: no cover


def _post_once(url: str, data: bytes, headers: Mapping[str, str], seconds: float) -> tuple[bool, bool, str]:
    """One POST, (ok, worth trying again, reason), in at most `seconds` even if the server trickles."""
    answer: list[tuple[bool, bool, str]] = []
    thread = threading.Thread(
        target=lambda: answer.append(_exchange(url, data, headers, seconds)), daemon=True, name="weir-webhook"
    )
    thread.start()
    thread.join(seconds)
    if not answer:  # the socket timeout bounds each read, not the whole answer
        return False, True, f"no answer from {urlsplit(url).netloc} within {_seconds(seconds)} s"
    return answer[0]


def _seconds(value: float) -> str:
    """Seconds for a message, to a tenth (`1`, `2.5`)."""
    return f"{value:.1f}".removesuffix(".0")


class _NoRedirects(urllib.request.HTTPRedirectHandler):
    """A redirected POST would come back as a GET without the alert: refuse to follow."""

    def redirect_request(self, *args: Any, **kwargs: Any) -> None:
        return None


def _exchange(url: str, data: bytes, headers: Mapping[str, str], seconds: float) -> tuple[bool, bool, str]:
    request = urllib.request.Request(url, data=data, headers=dict(headers), method="POST")
    opener = urllib.request.build_opener(_NoRedirects)
    try:
        with opener.open(request, timeout=seconds) as response:
            response.read(_READ_LIMIT)
        return True, False, ""
    except urllib.error.HTTPError as exc:
        with exc:
            if 300 <= exc.code < 400:
                target = exc.headers.get("Location", "?")
                return False, False, f"HTTP {exc.code}: redirected to {target}; set the webhook to the final URL"
            again = exc.code >= 500 or exc.code in (408, 429)
            return False, again, f"HTTP {exc.code} {exc.reason}"
    except urllib.error.URLError as exc:
        return False, True, f"cannot reach {urlsplit(url).netloc}: {exc.reason}"
    except OSError as exc:  # timeouts and resets while reading the answer
        return False, True, f"cannot reach {urlsplit(url).netloc}: {exc}"


# ---------------------------------------------------------------- the store and the pass


class AlertStore(Protocol):
    """Where events and delivery records are kept (the ledger; `MemoryAlertStore` in tests)."""

    def add(self, events: Iterable[Event]) -> list[Event]:
        """Keep each event whose id is new; return those (an id already kept is ignored)."""
        ...

    def pending(
        self, destination: str, *, kinds: Collection[EventKind] | None, since: datetime, now: datetime, limit: int,
    ) -> list[Event]:
        """Oldest first, at most `limit`: events at or after `since` (of `kinds`; None: all) that
        `destination` has not been sent successfully and whose last failed sending asked to try
        again at or before `now`."""
        ...

    def record(self, delivery: Delivery) -> None:
        """Keep the outcome of one sending."""
        ...


class MemoryAlertStore:
    """An AlertStore in memory, for tests and for one process's lifetime."""

    def __init__(self) -> None:
        self.events: dict[str, Event] = {}
        self.deliveries: list[Delivery] = []

    def add(self, events: Iterable[Event]) -> list[Event]:
        new = []
        for event in events:
            if event.id not in self.events:
                self.events[event.id] = event
                new.append(event)
        return new

    def pending(
        self, destination: str, *, kinds: Collection[EventKind] | None, since: datetime, now: datetime, limit: int,
    ) -> list[Event]:
        last: dict[str, Delivery] = {}
        sent: set[str] = set()
        for delivery in self.deliveries:
            if delivery.destination == destination:
                last[delivery.event_id] = delivery
                if delivery.ok:
                    sent.add(delivery.event_id)
        due = []
        for event in sorted(self.events.values(), key=lambda e: (e.when, e.id)):
            if event.when < since or event.id in sent or (kinds is not None and event.kind not in kinds):
                continue
            previous = last.get(event.id)
            if previous is not None and (previous.retry_at is None or previous.retry_at > now):
                continue
            due.append(event)
        return due[:limit]

    def record(self, delivery: Delivery) -> None:
        self.deliveries.append(delivery)


def deliver_pending(
    store: AlertStore, destinations: Mapping[str, Destination], *, clock: Clock, sleep: Sleep,
    budget: timedelta, rand: Random = random.random,
) -> list[Delivery]:
    """Send every pending event to every destination that wants it, and record each outcome.

    Destinations are served side by side, each its events oldest first; when one
    fails, its other pending events are recorded as not tried with the same
    `retry_at`, so a destination that is down costs one sending per `again_after`.
    Returns within `budget` (plus a second of grace); what was not sent by then
    stays pending for the next pass.
    """
    start = clock()
    work: dict[str, list[Event]] = {}
    for name in sorted(destinations):
        destination = destinations[name]
        kinds = None if destination.events is None else frozenset(destination.events)
        events = store.pending(
            name, kinds=kinds, since=start - destination.keep_trying, now=start, limit=_PENDING_BATCH
        )
        if events:
            work[name] = events
    return _fan_out(work, destinations, store.record, start + budget, clock, sleep, rand)


def send_test_event(
    destinations: Mapping[str, Destination], *, clock: Clock, sleep: Sleep, rand: Random = random.random,
) -> list[Delivery]:
    """Send one test event to every destination (whatever its `events:`); one Delivery each, by name."""
    now = clock()
    event = Event(
        uuid.uuid4().hex, EventKind.TEST, None, None, now,
        "weir test alert: this destination receives weir's alerts",
        {"host": socket.gethostname(), "weir_version": __version__},
    )
    longest = max((d.limit for d in destinations.values()), default=timedelta(0))
    work = {name: [event] for name in destinations}
    got = {d.destination: d for d in _fan_out(work, destinations, None, now + longest, clock, sleep, rand)}
    return [
        got.get(name) or Delivery(event.id, name, False, 0, clock(), "no result in time", None)
        for name in sorted(destinations)
    ]


def _fan_out(
    work: Mapping[str, Sequence[Event]], destinations: Mapping[str, Destination],
    record: Callable[[Delivery], None] | None, deadline: datetime, clock: Clock, sleep: Sleep, rand: Random,
) -> list[Delivery]:
    """Send each destination its events in a thread of its own; record outcomes here, as they come."""
    results: queue.Queue[Delivery | str] = queue.Queue()

    def drain(name: str) -> None:
        try:
            events = work[name]
            for i, event in enumerate(events):
                left = deadline - clock()
                if left <= timedelta(0):
                    return
                outcome = deliver(event, name, destinations[name], clock=clock, sleep=sleep, within=left, rand=rand)
                results.put(outcome)
                if not outcome.ok:
                    for later in events[i + 1:]:
                        results.put(replace(
                            outcome, event_id=later.id, tries=0,
                            reason=f"not tried: the sending before it failed ({outcome.reason})",
                        ))
                    return
        finally:
            results.put(name)

    for name in work:
        threading.Thread(target=drain, args=(name,), daemon=True, name=f"weir-alerts-{name}").start()
    out: list[Delivery] = []
    running = set(work)
    while running:
        left = (deadline - clock()).total_seconds()
        try:
            item = results.get(timeout=max(left, 0.0) + _GRACE)
        except queue.Empty:
            break
        if isinstance(item, str):
            running.discard(item)
            continue
        if record is not None:
            record(item)
        out.append(item)
    return out

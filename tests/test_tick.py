"""`weir tick` and `weir serve`: run what is due, once, in order, one tick at a time.

The clock is injected (`--at`, `at=`). Expected instants are computed here with
zoneinfo (the IANA tz database) and plain datetime arithmetic; what ran is
read from the ledger with Python's sqlite3. The simulated day calls the
library in this process, the way `weir tick` does (runner/cli/running.py: the idle
gate first, `runner.api.tick` when it says so). The only waits are bounded
ones for a `weir serve` subprocess to start working and to stop.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import sqlite3
import threading
import uuid
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from conftest_run import cli, cli_json, spawn, wait_until
from helpers_plan import (
    LISBON,
    at_text,
    bounds_job,
    daily_job,
    done_runs,
    edit,
    gated_tick,
    hourly_job,
    hours,
    land_hour,
    ledger_file,
    local_midnight,
    query,
    use_modules_of,
    wid,
    wkey,
    write_jobs,
)

SETTLE = timedelta(minutes=10)
HOUR = timedelta(hours=1)


# ---------------------------------------------------------------- a simulated day


def test_a_day_of_minute_ticks_runs_each_window_once_after_its_settle_time_across_spring_forward(tmp_path):
    # Lisbon 2026-03-29 has 23 local hours (IANA tz database); the simulation covers 24 hours of
    # absolute time from local midnight, plus 40 minutes for the last settle times
    from runner import api

    day0 = local_midnight(2026, 3, 29)
    root = write_jobs(tmp_path / "ws", {
        "rides_hourly": hourly_job("2026-03-29T00:00", "2026-03-31T00:00"),
        "rides_daily": daily_job(start="2026-03-29", end="2026-03-31"),
    })
    ws = api.workspace(root)
    starts = hours(day0, 24)
    # when each hour's file lands: mostly before the hour ends; a few after end + settle
    lands = {s: s + timedelta(minutes=50) for s in starts}
    lands[starts[5]] = starts[5] + HOUR + timedelta(minutes=25)
    lands[starts[13]] = starts[13] + HOUR + timedelta(minutes=70)
    lands[starts[20]] = starts[20] + HOUR + timedelta(minutes=5)
    ran_at: dict[tuple[str, str], list[datetime]] = {}
    gated = 0
    for minute in range(24 * 60 + 40):
        at = day0 + timedelta(minutes=minute)
        for s, landed in lands.items():
            if landed == at:
                land_hour(root, s)
        result = gated_tick(root, at, ws)
        if result is None:
            gated += 1
            continue
        assert result.ran
        for o in result.outcomes:
            assert o.status in ("done", "waiting"), o
            if o.status == "done":
                ran_at.setdefault((o.job, o.window), []).append(at)
    # each hourly window ran once, at the first tick at or after max(end + settle, its file landing)
    expected = {("rides_hourly", wid(s)): [max(s + HOUR + SETTLE, lands[s])] for s in starts}
    # the local day 2026-03-29 ends at the next local midnight (23:00 UTC), due 30 minutes later
    day_end = local_midnight(2026, 3, 30)
    assert day_end - day0 == timedelta(hours=23)
    expected[("rides_daily", wid(day0))] = [day_end + timedelta(minutes=30)]
    assert ran_at == expected
    # never before end + settle (implied by the equality above; stated for the record)
    due_at = {("rides_hourly", wid(s)): s + HOUR + SETTLE for s in starts}
    due_at[("rides_daily", wid(day0))] = day_end + timedelta(minutes=30)
    assert all(when >= due_at[key] for key, (when,) in ran_at.items())
    # the ledger (sqlite3) holds exactly one done run per window, nothing failed or half-done
    assert done_runs(root, "rides_hourly") == {wkey(s): 1 for s in starts}
    assert done_runs(root, "rides_daily") == {wkey(day0): 1}
    assert query(root, "SELECT COUNT(*) FROM weir_runs WHERE status != 'done'") == [(0,)]
    assert gated > 0  # idle minutes stopped at the gate


# ---------------------------------------------------------------- catching up after an outage


def test_one_tick_after_an_outage_catches_up_oldest_first_up_to_max_catch_up(tmp_path):
    start = datetime(2026, 3, 28, tzinfo=UTC)  # Lisbon at +00:00 (IANA tz database)
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T12:00",
                                                                   extra="max_catch_up: 2\n")})
    starts = hours(start, 12)
    for s in starts:
        land_hour(root, s)
    first = starts[0] + HOUR + SETTLE
    assert cli_json(root, "tick", "--at", at_text(first))["counts"] == {"done": 1}
    back = first + timedelta(hours=3, minutes=2)  # three hours later (a 3-hour outage) and two minutes
    missed = [s for s in starts[1:] if s + HOUR + SETTLE <= back]
    assert len(missed) == 3
    result = cli(root, "tick", "--at", at_text(back))
    assert result.exit_code == 0, result.stderr
    assert "done 2" in result.stdout and "held back by max_catch_up: rides_hourly 1" in result.stdout
    assert set(done_runs(root, "rides_hourly")) == {wkey(s) for s in [starts[0], *missed[:2]]}
    nxt = cli_json(root, "tick", "--at", at_text(back + timedelta(minutes=1)))
    assert [w["window"] for w in nxt["windows"]] == [wid(missed[2])] and nxt["remaining"] == {}
    assert done_runs(root, "rides_hourly") == {wkey(s): 1 for s in [starts[0], *missed]}


def test_a_longer_outage_is_caught_up_over_several_ticks_saying_how_many_remain(tmp_path):
    start = datetime(2026, 3, 28, tzinfo=UTC)
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T12:00",
                                                                   extra="max_catch_up: 2\n")})
    starts = hours(start, 12)
    for s in starts:
        land_hour(root, s)
    at = starts[4] + HOUR + SETTLE  # five windows due, none run
    due = [s for s in starts if s + HOUR + SETTLE <= at]
    ran: list[str] = []
    remaining = []
    for k in range(3):
        out = cli_json(root, "tick", "--at", at_text(at + timedelta(minutes=k)))
        ran += [w["window"] for w in out["windows"] if w["status"] == "done"]
        remaining.append(out["remaining"].get("rides_hourly", 0))
    assert ran == [wid(s) for s in due]  # oldest first
    assert remaining == [3, 1, 0]


# ---------------------------------------------------------------- one tick at a time


def test_a_second_tick_exits_at_once_with_status_0_while_another_holds_the_workspace(tmp_path):
    from runner import api
    from runner.io.ledger.leases import HeldLock
    from runner.io.ledger.store import Ledger, default_url

    start = datetime(2026, 3, 28, tzinfo=UTC)
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T02:00")})
    for s in hours(start, 2):
        land_hour(root, s)
    at = at_text(start + timedelta(hours=3))
    ledger = Ledger(default_url(root.resolve()))
    try:
        with HeldLock(ledger, "tick", "another-host:4242:1") as lock:
            assert lock.acquired
            proc = spawn(root, "tick", "--at", at)
            out, err = proc.communicate(timeout=120)
            assert proc.returncode == 0, err
            assert "another tick is running" in out and "another-host:4242:1" in out
            inproc = api.tick(root, at=start + timedelta(hours=3))
            assert not inproc.ran and inproc.holder == "another-host:4242:1" and inproc.outcomes == []
            assert query(root, "SELECT COUNT(*) FROM weir_runs") == [(0,)]
    finally:
        ledger.dispose()
    # once it is released, a tick runs the due windows
    assert cli_json(root, "tick", "--at", at)["counts"] == {"done": 2}


# ---------------------------------------------------------------- the idle-tick gate

T0 = datetime(2026, 3, 28, tzinfo=UTC)  # Lisbon at +00:00 on this day (IANA tz database)
STARTS = hours(T0, 12)
IDLE_AT = STARTS[3] + HOUR + SETTLE + timedelta(minutes=1)  # 04:11: the 00..03 windows due, h3 waiting
WAKE = STARTS[4] + HOUR + SETTLE  # 05:10: the next window's end + settle


def share_module(name: str, factor: int = 1) -> str:
    return (
        '"""Share of each zone in the hour\'s rides (a python step of the invented bike-share)."""\n'
        "import polars as pl\n\n\n"
        "def compute(hourly):\n"
        f"    total = pl.col('rides').sum() * {factor}\n"
        "    return (hourly.group_by('zone').agg(pl.col('rides').sum().alias('rides'))\n"
        "            .with_columns((pl.col('rides') / total).alias('share')).sort('zone'))\n"
    )


def share_job(module: str) -> str:
    return (
        "description: Share of each zone in the hour's rides.\n"
        "window: {every: 1h, start: 2026-03-28T00:00, end: 2026-03-28T12:00, timezone: Europe/Lisbon, "
        "settle: 10m}\n"
        "inputs:\n"
        "  hourly: {job: rides_hourly}\n"
        "steps:\n"
        f"  - python: {module}:compute\n"
        "output:\n"
        '  path: "state/warehouse/zone_share/{start:%Y-%m-%d/%H}.parquet"\n'
    )


@pytest.fixture
def gated_ws(tmp_path):
    """Hours 00..02 done for rides_hourly and its python-step consumer; hour 03 waits for its file;
    the gate was written by an idle tick at IDLE_AT and holds until WAKE."""
    module = f"zone_share_{uuid.uuid4().hex[:8]}"
    root = write_jobs(tmp_path / "ws", {
        "rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T12:00"),
        "zone_share": share_job(module),
    }, files={f"{module}.py": share_module(module)})
    for s in STARTS[:3]:
        land_hour(root, s)
    land_hour(root, STARTS[4])  # the next hour's file is there before it is due
    use_modules_of(root, module)
    first = cli_json(root, "tick", "--at", at_text(IDLE_AT - timedelta(minutes=1)))
    assert first["counts"] == {"done": 6}
    idle = cli_json(root, "tick", "--at", at_text(IDLE_AT))
    assert idle["counts"] == {} and "idle_until" not in idle  # a full tick that found nothing due
    assert (root / "state" / "tick-gate.json").exists()
    return root, module


def _answer(root: Path, at: datetime, module: str) -> tuple[set[tuple[str, str, str]], bool]:
    """A tick's answer: (job, window, status) of each window it handled, and whether the gate held."""
    use_modules_of(root, module)
    out = cli_json(root, "tick", "--at", at_text(at), expect=None)
    return {(w["job"], w["window"], w["status"]) for w in out["windows"]}, "idle_until" in out


def _full_copy(root: Path) -> Path:
    """The same workspace without its gate (shutil.copytree keeps file times): the full answer."""
    copy = root.parent / f"full-{uuid.uuid4().hex[:6]}"
    shutil.copytree(root, copy, copy_function=shutil.copy2)
    (copy / "state" / "tick-gate.json").unlink()
    return copy


def test_an_idle_tick_before_the_next_due_instant_stops_at_the_gate_without_touching_the_ledger(gated_ws):
    root, module = gated_ws
    gate = json.loads((root / "state" / "tick-gate.json").read_text())
    assert datetime.fromisoformat(gate["wake_at"]) == WAKE  # hour 04's end + settle 10m
    before = {p.name: (p.stat().st_size, p.stat().st_mtime_ns) for p in (root / "state").glob("ledger*")}
    answer, held = _answer(root, WAKE - timedelta(seconds=1), module)
    assert held and answer == set()
    after = {p.name: (p.stat().st_size, p.stat().st_mtime_ns) for p in (root / "state").glob("ledger*")}
    assert after == before


def _land_waiting_hour(root: Path, module: str) -> None:
    land_hour(root, STARTS[3])


def _rewrite_done_hour(root: Path, module: str) -> None:
    land_hour(root, STARTS[1], rows=5)


def _edit_job_sql(root: Path, module: str) -> None:
    edit(root / "jobs" / "rides_hourly.yaml", "GROUP BY zone, fare", "GROUP BY fare, zone")


def _edit_python_module(root: Path, module: str) -> None:
    (root / f"{module}.py").write_text(share_module(module, factor=100))


def _verify_after_deleting_an_output(root: Path, module: str) -> None:
    (root / "state" / "warehouse" / "rides_hourly" / f"{STARTS[0]:%Y-%m-%d/%H}.parquet").unlink()
    assert cli(root, "verify").exit_code == 1  # another command writes the ledger


def _nothing(root: Path, module: str) -> None:
    pass


CHANGES = {
    "new input file": _land_waiting_hour,
    "changed input file": _rewrite_done_hour,
    "changed job file": _edit_job_sql,
    "python step module": _edit_python_module,
    "ledger write by another command": _verify_after_deleting_an_output,
    "nothing": _nothing,
}


@pytest.mark.parametrize("change", list(CHANGES))
def test_every_change_that_matters_gets_the_same_answer_as_a_full_tick(gated_ws, change):
    root, module = gated_ws
    CHANGES[change](root, module)
    at = IDLE_AT + timedelta(minutes=5)  # still before WAKE
    full, full_held = _answer(_full_copy(root), at, module)
    gated, held = _answer(root, at, module)
    assert not full_held
    assert gated == full
    if change == "nothing":
        assert held and full == set()
    else:
        assert not held and any(status == "done" for _, _, status in full)


def test_reaching_the_next_window_end_plus_settle_opens_the_gate(gated_ws):
    root, module = gated_ws
    full, _ = _answer(_full_copy(root), WAKE, module)
    gated, held = _answer(root, WAKE, module)
    assert not held and gated == full
    assert {(j, w) for j, w, s in full if s == "done"} == {("rides_hourly", wid(STARTS[4])),
                                                          ("zone_share", wid(STARTS[4]))}


def _output_marked_missing(root: Path) -> None:
    """What `weir verify` writes for a deleted output, written by another process (sqlite3)."""
    (root / "state" / "warehouse" / "rides_hourly" / f"{STARTS[0]:%Y-%m-%d/%H}.parquet").unlink()
    conn = sqlite3.connect(ledger_file(root), timeout=30)
    try:
        with conn:
            conn.execute("UPDATE weir_windows SET output_state = 'missing' WHERE job = 'rides_hourly' "
                         "AND window_key = ?", (wkey(STARTS[0]),))
    finally:
        conn.close()


WHILE_PLANNING = {
    # a change -> the windows the next tick must run
    "a file lands": (lambda root: land_hour(root, STARTS[3]),
                     {("rides_hourly", wid(STARTS[3])), ("zone_share", wid(STARTS[3]))}),
    "another command writes the ledger": (_output_marked_missing, {("rides_hourly", wid(STARTS[0]))}),
}


@pytest.mark.parametrize("change", list(WHILE_PLANNING))
def test_a_change_while_an_idle_tick_plans_is_not_absorbed_by_the_gate(gated_ws, monkeypatch, change):
    from runner.engine import survey as surveying

    root, module = gated_ws
    (root / "state" / "tick-gate.json").unlink()
    act, expected = WHILE_PLANNING[change]
    real = surveying.survey

    def survey_then_change(*args, **kwargs):
        out = real(*args, **kwargs)
        act(root)  # after the plan was made, before the tick ends
        return out

    monkeypatch.setattr(surveying, "survey", survey_then_change)
    assert _answer(root, IDLE_AT + timedelta(minutes=1), module)[0] == set()
    monkeypatch.setattr(surveying, "survey", real)
    answer, held = _answer(root, IDLE_AT + timedelta(minutes=2), module)
    assert not held
    assert {(j, w) for j, w, s in answer if s == "done"} == expected


def test_the_gate_of_a_cron_job_waiting_for_its_first_fire_opens_when_that_window_is_due(tmp_path):
    cronsim = pytest.importorskip("cronsim")
    root = write_jobs(tmp_path / "ws", {"tally": bounds_job('cron: "30 1 * * *"', "2026-03-26", "2026-04-02",
                                                             settle="5m")})
    # cronsim's first two fires from the job's start (it yields fires after the instant given)
    fires = cronsim.CronSim("30 1 * * *", datetime(2026, 3, 26, tzinfo=LISBON) - timedelta(minutes=1))
    first, second = next(fires), next(fires)
    due = second.astimezone(UTC) + timedelta(minutes=5)
    idle = gated_tick(root, first.astimezone(UTC) - timedelta(minutes=30))  # before the first fire
    assert idle is not None and idle.outcomes == []
    assert gated_tick(root, due - timedelta(seconds=1)) is None  # the gate holds until then
    result = gated_tick(root, due)
    assert result is not None and [(o.window, o.status) for o in result.outcomes] == [(wid(first), "done")]


# ---------------------------------------------------------------- weir serve


def _slow_job(module: str) -> str:
    return hourly_job("2026-03-28T00:00", "2026-03-28T06:00").replace(
        "steps:\n", f"steps:\n  - python: {module}:pause\n    name: paused\n", 1).replace(
        "FROM rides\n", "FROM paused\n", 1)


SLOW_MODULE = '''"""A deliberately slow step, so that a stop request lands between windows."""
import time


def pause(rides):
    time.sleep(0.4)
    return rides
'''


def _lines(stream, sink: list[str]) -> None:
    for line in stream:
        sink.append(line.rstrip("\n"))


def _done_count(root: Path) -> int:
    """Done runs in the ledger so far (sqlite3); 0 while the ledger is not created yet."""
    if not ledger_file(root).exists():
        return 0  # sqlite3 would create an empty file, which weir refuses as a damaged ledger
    try:
        return query(root, "SELECT COUNT(*) FROM weir_runs WHERE status='done'")[0][0]
    except sqlite3.OperationalError:
        return 0


def serve_until(root: Path, ready) -> tuple[int, list[str], str]:
    """`weir serve --every 1s` in a subprocess until `ready(stdout lines)`, then SIGTERM.

    Returns its exit status, stdout lines and stderr.
    """
    proc = spawn(root, "serve", "--every", "1s")
    out: list[str] = []
    try:
        reader = threading.Thread(target=_lines, args=(proc.stdout, out), daemon=True)
        reader.start()
        assert wait_until(lambda: ready(out) or proc.poll() is not None, 60), "serve did not get going"
        assert proc.poll() is None, proc.stderr.read()
        os.killpg(proc.pid, signal.SIGTERM)
        proc.wait(timeout=120)
        reader.join(timeout=10)
        err = proc.stderr.read()
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    return proc.returncode, out, err


def test_serve_stops_cleanly_on_sigterm_between_windows_leaving_no_claims(tmp_path):
    module = f"slow_{uuid.uuid4().hex[:8]}"
    root = write_jobs(tmp_path / "ws", {"rides_hourly": _slow_job(module)}, files={f"{module}.py": SLOW_MODULE})
    for s in hours(T0, 6):
        land_hour(root, s)
    code, out, err = serve_until(root, lambda out: _done_count(root) >= 1)
    assert code == 0, err
    assert "stopping after the current window" in err
    assert out[-1].endswith("stopped") and "tick:" in out[0]
    done = _done_count(root)
    assert 1 <= done < 6  # it stopped between windows: not every window ran
    assert query(root, "SELECT COUNT(*) FROM weir_runs WHERE status != 'done'") == [(0,)]
    assert query(root, "SELECT COUNT(*) FROM weir_claims") == [(0,)]
    assert query(root, "SELECT COUNT(*) FROM weir_locks") == [(0,)]
    # the next tick takes the rest
    rest = cli_json(root, "tick", "--at", at_text(T0 + timedelta(hours=8)))
    assert rest["counts"] == {"done": 6 - done}


class FakeTime:
    """An injected clock, monotonic timer and sleep: sleeping advances both, instantly."""

    def __init__(self, start: datetime):
        self.now, self.mono, self.slept = start, 0.0, 0.0

    def clock(self) -> datetime:
        return self.now

    def monotonic(self) -> float:
        return self.mono

    def sleep(self, seconds: float) -> None:
        self.slept += seconds
        self.mono += seconds
        self.now += timedelta(seconds=seconds)


def test_serve_ticks_once_per_interval_by_the_injected_clock_without_waiting(tmp_path):
    from runner import api

    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T03:00")})
    for s in hours(T0, 3):
        land_hour(root, s)
    fake = FakeTime(T0 + HOUR + SETTLE)  # the first window is due, the others not yet
    ticks: list[tuple[datetime, dict[str, int]]] = []
    errors: list[tuple[str, datetime | None]] = []
    api.serve(root, interval=3600, should_stop=lambda: len(ticks) >= 3, workers=1,
              on_tick=lambda result, now: ticks.append((now, result.counts())),
              on_error=lambda message, at: errors.append((message, at)),
              clock=fake.clock, monotonic=fake.monotonic, sleep=fake.sleep)
    assert errors == []
    # one tick an hour apart by the injected clock; each runs the window that became due since the last
    assert [now for now, _ in ticks] == [T0 + HOUR + SETTLE + n * HOUR for n in range(3)]
    assert [counts for _, counts in ticks] == [{"done": 1}, {"done": 1}, {"done": 1}]
    assert fake.slept == 2 * 3600  # waited between ticks (in half-second steps), never after the last
    assert done_runs(root, "rides_hourly") == {wkey(s): 1 for s in hours(T0, 3)}


def test_serve_logs_a_failed_tick_and_goes_on_with_the_jobs_it_had_when_the_files_turn_invalid(tmp_path,
                                                                                                 monkeypatch):
    from runner import api
    from runner.engine import pulse

    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T03:00")})
    for s in hours(T0, 3):
        land_hour(root, s)
    fake = FakeTime(T0 + HOUR + SETTLE)
    ticks: list[dict[str, int]] = []
    errors: list[tuple[str, datetime | None]] = []
    real_tick, calls = pulse.tick, []

    def tick_failing_once(*args, **kwargs):
        calls.append(args[1])
        if len(calls) == 2:
            raise OSError("the disk went away")
        return real_tick(*args, **kwargs)

    def on_tick(result, now):
        ticks.append(result.counts())
        (root / "jobs" / "rides_hourly.yaml").write_text("window: [")  # broken from now on

    monkeypatch.setattr(pulse, "tick", tick_failing_once)
    api.serve(root, interval=3600, should_stop=lambda: len(ticks) >= 2, workers=1, on_tick=on_tick,
              on_error=lambda message, at: errors.append((message, at)),
              clock=fake.clock, monotonic=fake.monotonic, sleep=fake.sleep)
    assert calls == [T0 + HOUR + SETTLE + n * HOUR for n in range(3)]
    assert errors[0][0].startswith("job files invalid, keeping the previous ones: ") and errors[0][1] is None
    assert errors[1] == ("tick failed: the disk went away", T0 + 2 * HOUR + SETTLE)
    assert errors[2][0].startswith("job files invalid") and len(errors) == 3  # none after the last tick
    # the third tick ran the two windows due by then, with the jobs loaded before the file broke
    assert ticks == [{"done": 1}, {"done": 2}]


@pytest.mark.parametrize("every", ["0s", "soon"])
def test_serve_refuses_a_bad_interval(tmp_path, every):
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T01:00")})
    result = cli(root, "serve", "--every", every)
    assert result.exit_code == 2 and "--every" in result.stderr
    assert not ledger_file(root).exists()


# ---------------------------------------------------------------- the ledger's place


@pytest.mark.parametrize("given", ["--ledger", "WEIR_LEDGER"])
def test_a_relative_sqlite_ledger_path_is_relative_to_the_workspace_not_the_current_folder(
        tmp_path, monkeypatch, given):
    """House issue item 2 (one SQLite URL rule): `weir -C WS --ledger sqlite:///state/l2.sqlite` and
    WEIR_LEDGER put the ledger in WS/state/, as `database:` in job files is read; it used to land
    under the current folder."""
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T01:00")})
    land_hour(root, T0)
    elsewhere = tmp_path / "elsewhere"
    (elsewhere / "state").mkdir(parents=True)
    monkeypatch.chdir(elsewhere)
    url = "sqlite:///state/l2.sqlite"
    args = ("--ledger", url) if given == "--ledger" else ()
    if given == "WEIR_LEDGER":
        monkeypatch.setenv("WEIR_LEDGER", url)
    result = cli(root, *args, "tick", "--at", at_text(T0 + 2 * HOUR), "--json")
    assert result.exit_code == 0, result.stderr
    assert json.loads(result.stdout)["counts"] == {"done": 1}
    assert not (elsewhere / "state" / "l2.sqlite").exists()
    conn = sqlite3.connect(root / "state" / "l2.sqlite")  # the standard library's sqlite3
    try:
        assert conn.execute("SELECT COUNT(*) FROM weir_runs WHERE status = 'done'").fetchone() == (1,)
    finally:
        conn.close()
    assert not (root / "state" / "ledger.sqlite").exists()

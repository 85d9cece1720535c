"""Job files that attack the loader get located errors, quickly and in bounded memory (issue 9, item 8).

An alias bomb, nesting hundreds of levels deep, a lone surrogate, a file too
long, and the job files that broke weir in outside testing (tests/repro_jobs.py)
each give `FILE:LINE:COL: message` lines and exit 2, or check and plan cleanly.
The outside cases run in a child process capped at 1.5 GB of address space and
a generous time bound (a hang or a blow-up becomes a failure, not a stuck
suite), and the child's peak memory is read back from the kernel (wait4).
Line and column numbers were counted by hand from the YAML text of each case.
"""

from __future__ import annotations

import os
import re
import resource
import signal
import subprocess
import sys
import textwrap
import threading
import tracemalloc
from pathlib import Path

import pytest
import repro_jobs
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runner.errors import SpecProblems
from runner.model.loading import MAX_FILE_BYTES, load_job
from runner.model.yamlfile import MAX_ALIAS_VALUES, MAX_DEPTH, MAX_VALUES

LINE = re.compile(r"^(?P<file>\S+\.ya?ml):(?P<line>\d+):(?P<col>\d+): (?P<rest>.*)$")

VALID = """\
window: {every: 1h, start: 2026-01-01T00:00, end: 2026-01-02, timezone: UTC}
inputs:
  pay:
    files: landing/pay/{start:%Y-%m-%d}/{start:%H}.csv
    schema: {pay_id: str, merchant: str, amount: "decimal(10,2)"}
steps:
  - sql: SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant
output:
  path: state/out/{start:%Y-%m-%d}/{start:%H}.parquet
"""

BILLION_LAUGHS = "".join(  # the classic 10-level bomb: 10^9 strings once expanded
    f"l{i}: &l{i} [{', '.join([f'*l{i - 1}'] * 10) if i else ', '.join(['lol'] * 10)}]\n" for i in range(10)
) + "window: *l9\n"


def problem_of(tmp_path: Path, text: str) -> tuple[int, int, str]:
    """The single located problem of one job file, as (line, column, message)."""
    file = tmp_path / "jobs" / "pay_hourly.yaml"
    file.parent.mkdir(parents=True, exist_ok=True)
    file.write_text(text, encoding="utf-8")
    with pytest.raises(SpecProblems) as caught:
        load_job(file)
    (problem,) = caught.value.problems
    return problem.line, problem.column, problem.message


def test_a_billion_laughs_is_refused_at_the_alias_that_passes_the_budget(tmp_path):
    """Hardening item 8: the 353-byte alias bomb used 7.6 GB; now one located error, little memory."""
    tracemalloc.start()
    try:
        line, col, message = problem_of(tmp_path, BILLION_LAUGHS)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    # counted by hand: l1 copies 10 x 11 values, l2 10 x 111 (1,220 copied so far), and each *l2 in
    # l3 copies 1,111 more: the 8th (line 4, column 10 + 7 x 5) passes 10,000
    assert (line, col) == (4, 45)
    assert f"aliases copy more than {MAX_ALIAS_VALUES:,} values" in message
    assert peak < 64 * 2**20, peak


def test_an_alias_inside_the_value_it_names_is_refused(tmp_path):
    """Hardening item 8: `&a [*a]` is a structure without end; it was a RecursionError (exit 70)."""
    line, col, message = problem_of(tmp_path, VALID + "loop: &a [1, *a]\n")
    assert (line, col) == (10, 14)
    assert "an alias inside the value it names" in message


def test_anchors_and_merge_keys_within_the_budget_still_work(tmp_path):
    """Hardening item 8: aliases stay allowed, for sharing one schema between inputs.

    `<<:` merges were meant to work but never did: the core-schema resolvers
    left out the merge type, so `<<` was read as a plain key.
    """
    file = tmp_path / "jobs" / "pay_hourly.yaml"
    file.parent.mkdir(parents=True)
    file.write_text(textwrap.dedent("""\
        window: {every: 1h, start: 2026-01-01T00:00, timezone: UTC}
        inputs:
          pay:
            files: landing/pay/{start:%Y-%m-%d}/*.csv
            schema: &pay {pay_id: str, merchant: str}
          refunds:
            files: landing/refunds/{start:%Y-%m-%d}/*.csv
            schema: {<<: *pay, reason: str}
        steps: [{sql: SELECT merchant FROM pay UNION ALL SELECT merchant FROM refunds}]
        output: {path: "state/out/{start:%Y-%m-%dT%H}.parquet"}
    """))
    job = load_job(file)
    assert list(job.spec.inputs["refunds"].columns) == ["pay_id", "merchant", "reason"]


@pytest.mark.parametrize("style", ["flow", "block"])
def test_500_levels_of_nesting_give_a_located_error_not_a_recursion_error(tmp_path, style):
    """Hardening item 8: about 500 levels gave `internal error: RecursionError`."""
    if style == "flow":
        text = VALID + "extra: " + "[" * 500 + "]" * 500 + "\n"
        where = (10, 7 + MAX_DEPTH + 1)  # bracket k is at column 7 + k
    else:
        text = VALID + "".join(" " * (2 * i) + f"k{i}:\n" for i in range(500))
        where = (10 + MAX_DEPTH, 2 * MAX_DEPTH + 1)  # k32, level 33 counting the file's own mapping
    line, col, message = problem_of(tmp_path, text)
    assert (line, col) == where
    assert message == f"nested deeper than {MAX_DEPTH} levels, a limit of weir job files"


def test_a_lone_surrogate_escape_is_a_located_error_not_a_unicode_error(tmp_path):
    """Hardening item 8: `"\\uD800"` gave `internal error: UnicodeEncodeError`."""
    text = VALID.replace("SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant", '"\\uD800"')
    line, col, message = problem_of(tmp_path, text)
    assert (line, col) == (7, 10)
    assert "\\uD800 is half of a UTF-16 surrogate pair, not a character" in message


def test_a_job_file_longer_than_the_limit_is_refused_where_it_passes_it(tmp_path):
    """Hardening item 8: a job file's size is capped before it is parsed."""
    padding = "# " + "x" * 98 + "\n"  # 101 bytes a line
    text = VALID + padding * (MAX_FILE_BYTES // len(padding) + 1)
    line, col, message = problem_of(tmp_path, text)
    over = MAX_FILE_BYTES - len(VALID.encode())  # bytes of padding before the limit
    assert (line, col) == (10 + over // len(padding), over % len(padding) + 1)
    assert message.startswith(f"job file longer than {MAX_FILE_BYTES // 1024} KiB")


def test_more_values_than_the_limit_are_refused(tmp_path):
    """Hardening item 8: many keys are bounded by the number of values, not only the file size."""
    text = VALID + "many: [" + ",".join(["1"] * MAX_VALUES) + "]\n"
    line, col, message = problem_of(tmp_path, text)
    assert line == 10 and message.startswith(f"more than {MAX_VALUES:,} values")


@pytest.fixture
def registered(monkeypatch) -> list[int]:
    """How many frames each polars SQLContext made from now on was given."""
    import polars as pl

    sizes: list[int] = []
    real = pl.SQLContext.__init__

    def counting(self, frames=None, **kwargs):
        sizes.append(len(frames or {}))
        return real(self, frames=frames, **kwargs)

    monkeypatch.setattr(pl.SQLContext, "__init__", counting)
    return sizes


def test_resolving_many_steps_registers_each_table_once_per_step_not_every_earlier_step(tmp_path, registered):
    """Hardening item 8: 1,000 steps took 35 s to check; each step was given every earlier step's frame.

    Counted, not timed: the frames handed to polars' SQLContext over the whole check.
    """

    from runner.engine.loading import load_workspace

    steps = "".join(f"  - name: s{i}\n    sql: SELECT merchant, n FROM {'s' + str(i - 1) if i else 'pay'}\n"
                    for i in range(1000))
    (tmp_path / "jobs").mkdir()
    (tmp_path / "jobs" / "pay_hourly.yaml").write_text(
        VALID.replace("steps:\n  - sql: SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant\n",
                      "steps:\n  - name: first\n    sql: SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant\n"
                      + steps.replace("FROM pay", "FROM first")))
    ws = load_workspace(tmp_path)
    assert ws.output_schemas["pay_hourly"] is not None  # resolved through all 1,001 steps
    assert len(registered) == 1001 and max(registered) == 1


def test_running_many_steps_gives_each_step_only_the_tables_it_reads(tmp_path, registered):
    """Hardening item 8: the run built a SQLContext over every earlier step for each step (quadratic)."""

    from runner.core.windows import Cadence
    from runner.engine.steps import build
    from runner.model.spec import JobSpec

    spec = JobSpec.model_validate({
        "window": {"every": "1h", "start": "2026-01-01T00:00"},
        "steps": [{"name": "s0", "sql": "SELECT 1 AS n"}]
        + [{"name": f"s{i}", "sql": f"SELECT n + 1 AS n FROM s{i - 1}"} for i in range(1, 100)],
        "output": {"path": "state/out/{start:%Y%m%d%H}.parquet"},
    })
    window = Cadence.of(spec.window).first()
    result = build(spec, {}, window, tmp_path).collect()
    assert result["n"].to_list() == [100]
    assert sum(registered) == 99  # one table for each step that reads one


# ---------------------------------------------------------------- the outside testers' files


def _run_child(root: Path, *args: str) -> tuple[int, str, int]:
    """`python -m runner -C root ARGS` capped at 1.5 GB of address space: (exit code, output, peak RSS bytes)."""
    cap = 1536 * 2**20

    def limit() -> None:
        resource.setrlimit(resource.RLIMIT_AS, (cap, cap))

    out = root.parent / "child.out"
    with open(out, "wb") as sink:
        proc = subprocess.Popen([sys.executable, "-m", "runner", "-C", str(root), *args], preexec_fn=limit,
                                stdout=sink, stderr=subprocess.STDOUT, start_new_session=True)
    hang = threading.Timer(180, os.killpg, (proc.pid, signal.SIGKILL))  # a hang bound, not a speed check
    hang.start()
    try:
        _, status, usage = os.wait4(proc.pid, 0)  # the child's own peak memory, from the kernel
    finally:
        hang.cancel()
    proc.returncode = os.waitstatus_to_exitcode(status)
    return proc.returncode, out.read_text("utf-8", "replace"), usage.ru_maxrss * 1024  # Linux: KiB


PLANS_CLEANLY = {"many_steps"}


@pytest.mark.parametrize("name", sorted(repro_jobs.cases()))
def test_outside_job_files_give_located_errors_or_plan_cleanly_in_bounded_memory(tmp_path, name):
    """Hardening item 8: each of these made check or plan end in exit 70, hang or blow up memory."""
    text, originals = repro_jobs.cases()[name]
    root = tmp_path / "ws"
    (root / "jobs").mkdir(parents=True)
    (root / "jobs" / f"{originals[0]}.yaml").write_text(text, encoding="utf-8")
    code, out, peak = _run_child(root, "check", "--at", "2026-01-05T00:00Z")
    assert "Traceback" not in out and "internal error" not in out, out[-2000:]
    if name in PLANS_CLEANLY:
        assert code == 0, out[-2000:]
        code, out, peak2 = _run_child(root, "plan", "--at", "2026-01-05T00:00Z")
        assert code == 0 and "internal error" not in out, out[-2000:]
        peak = max(peak, peak2)
    else:
        assert code == 2, out[-2000:]
        lines = out.strip().splitlines()
        assert lines[-1].endswith("problem(s) found")
        assert lines[:-1] and all(LINE.match(line) for line in lines[:-1]), out[-2000:]
    assert peak < 600 * 2**20, f"peak RSS {peak / 2**20:.0f} MB"


# ---------------------------------------------------------------- fuzzing the loader


def _bomb(depth: int, width: int) -> str:
    return "".join(
        f"b{i}: &b{i} [{', '.join([f'*b{i - 1}'] * width) if i else ', '.join(['x'] * width)}]\n"
        for i in range(depth))


ATTACKS = st.one_of(
    st.builds(lambda d, w, key: VALID + _bomb(d, w) + (f"? *b{d - 1}\n: 1\n" if key else f"window: *b{d - 1}\n"),
              st.integers(2, 12), st.integers(2, 12), st.booleans()),
    st.builds(lambda n, flow: VALID + ("deep: " + "[" * n + "]" * n + "\n" if flow
                                      else "".join(" " * (2 * i) + f"d{i}:\n" for i in range(n))),
              st.integers(1, 2000), st.booleans()),
    st.builds(lambda cp, where: VALID.replace(*{
        "sql": ("SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant", f'"SELECT \\u{cp:04X}"'),
        "key": ("  pay:\n", f'  "p\\u{cp:04X}":\n'),
        "path": ("state/out/", f'"state/\\u{cp:04X}/'),
    }[where]), st.integers(0xD800, 0xDFFF), st.sampled_from(["sql", "key", "path"])),
    st.builds(lambda n: VALID + "".join(f"k{i}: {i}\n" for i in range(n)), st.integers(0, 20_000)),
    st.builds(lambda n, named: VALID.replace(
        "steps:\n  - sql: SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant\n",
        "steps:\n" + "".join((f"  - name: s{i}\n    sql: SELECT * FROM pay\n" if named
                              else "  - sql: SELECT * FROM pay\n") for i in range(n))),
              st.integers(1, 1500), st.booleans()),
)


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow,
                                 HealthCheck.data_too_large])
@given(text=ATTACKS)
def test_fuzzed_attacks_on_the_loader_give_located_problems_within_a_memory_budget(tmp_path, text):
    """Hardening item 8 (fuzzer): alias bombs, depth, surrogates, many keys, many steps.

    Never a traceback or an internal error; every problem located; loading
    stays within 128 MB of Python allocations (tracemalloc).
    """
    file = tmp_path / "jobs" / "pay_hourly.yaml"
    file.parent.mkdir(parents=True, exist_ok=True)
    file.write_text(text, encoding="utf-8")
    tracemalloc.start()
    try:
        try:
            load_job(file)
        except SpecProblems as exc:
            assert exc.problems
            assert all(p.line >= 1 and p.column >= 1 for p in exc.problems)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 128 * 2**20, peak

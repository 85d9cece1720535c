"""SQL steps read only their declared inputs; valid SQL is not refused (issue 9, items 9 and 10).

The guard parses each step with sqlglot and refuses table functions, file and
network functions and anything but one query, at `weir check` and again just
before a step runs. Its ground truth here is polars itself: the engine that
runs the steps is asked to run the same text over a real secret file, and
every query polars would read that file with must be refused (a parser
differential between sqlglot and polars would show up as a failure).
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import polars as pl
import pytest
from conftest_run import AT, cli
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runner.core.sqlcheck import SqlRefused, query_shape

SECRET_COLUMN = "secret_7f3a"  # a column name nothing else in the suite uses


@pytest.fixture(scope="module")
def secret(tmp_path_factory) -> Path:
    """A CSV file outside every workspace, standing for a file a job must not read."""
    path = tmp_path_factory.mktemp("outside") / "secret.csv"
    path.write_text(f"{SECRET_COLUMN}\n42\n")
    return path


def polars_reads(sql: str, path: Path) -> bool:
    """Whether polars, given `pay` and `t` as tables, would read `path` for this SQL."""
    frames = {"pay": pl.LazyFrame({"merchant": ["m"], "amount": [1.0]}), "t": pl.LazyFrame({"a": [1]})}
    try:
        lf = pl.SQLContext(frames=frames, eager=False).execute(sql)
        # a scan of the file in polars' plan (its text shows `Csv SCAN [path]`), not the path in a string
        return SECRET_COLUMN in lf.collect_schema().names() or f"SCAN [{path}]" in lf.explain(optimized=False)
    except Exception:  # noqa: BLE001 - polars refusing the text is what we want to know
        return False


def refused(sql: str) -> bool:
    try:
        query_shape(sql)
    except SqlRefused:
        return True
    return False


# ---------------------------------------------------------------- the reported escapes, through weir check

PAY = """\
window: {every: 1d, start: 2026-01-01, end: 2026-01-03, timezone: UTC}
inputs:
  pay: {files: "landing/pay/{start:%Y-%m-%d}.csv"}
steps:
  - sql: SQL
output: {path: "state/out/{start:%Y-%m-%d}.csv"}
"""


@pytest.mark.parametrize("sql", [
    "SELECT *, '--' AS x FROM read_csv('SECRET')",
    "SELECT * FROM \"read_csv\"('SECRET')",
    "SELECT '/*' AS a, * FROM read_csv('SECRET') WHERE '*/' = '*/'",
    "SELECT * FROM Read_Csv('SECRET')",
    "SELECT * FROM pay WHERE amount IN (SELECT secret_7f3a FROM read_csv('SECRET'))",
    "WITH s AS (SELECT * FROM read_csv('SECRET')) SELECT * FROM s",
    "SELECT amount FROM pay UNION ALL SELECT secret_7f3a FROM read_csv('SECRET')",
    "SELECT (SELECT MAX(secret_7f3a) FROM read_csv('SECRET')) AS s FROM pay",
])
def test_check_refuses_sql_that_reads_a_file_in_any_spelling(weir, make_workspace, secret, sql):
    """Hardening item 10: the first three passed check (comments were stripped before strings)."""
    text = sql.replace("SECRET", str(secret))
    assert polars_reads(text, secret)  # the escape is real: polars would read the file
    root = make_workspace({"pay_daily": PAY.replace("SQL", json.dumps(text))})
    result = weir(root, "check", "--at", "2026-01-05T00:00Z")
    assert result.exit_code == 2, result.output
    (line,) = result.output.strip().splitlines()[:-1]
    assert "jobs/pay_daily.yaml:5:10: steps.0.sql: SQL reads files itself with read_csv()" in line, line


@pytest.mark.parametrize(("sql", "words"), [
    ("ATTACH 'state/other.db'", "found ATTACH"),
    ("COPY pay TO 'state/copy.csv'", "found COPY"),
    ("INSTALL httpfs", "found INSTALL"),
    ("PRAGMA threads = 1", "found PRAGMA"),
    ("CREATE TABLE x AS SELECT * FROM pay", "found CREATE"),
    ("SELECT * INTO copied FROM pay", "found INTO"),
    ("SELECT 1 AS n; SELECT 2 AS n", "found 2 statements"),
    ("SELECT * FROM main.pay", "names a schema or catalog"),
    ("SELECT * FROM UNNEST([1, 2]) AS u(n)", "unnest(...) in FROM is a table function"),
    ("SELECT `read_csv`('x')", "cannot parse this SQL"),
])
def test_check_refuses_anything_but_one_plain_query(weir, make_workspace, sql, words):
    """Hardening item 10: no ATTACH, COPY, INSTALL, pragma, DDL, second statement or qualified name."""
    root = make_workspace({"pay_daily": PAY.replace("SQL", json.dumps(sql))})
    result = weir(root, "check", "--at", "2026-01-05T00:00Z")
    assert result.exit_code == 2, result.output
    assert words in result.output, result.output


def test_a_file_function_name_in_strings_and_comments_is_not_refused():
    """Hardening item 10: the guard reads tokens, so text that only looks like a call passes."""
    sql = "SELECT merchant, 'read_csv(''x'')' AS note /* read_csv('y') */ FROM pay -- read_csv('z')"
    assert query_shape(sql).tables == frozenset({"pay"})


# ---------------------------------------------------------------- and again just before a step runs


def test_a_step_changed_after_check_to_read_a_file_fails_its_window_and_writes_nothing(tmp_path, secret):
    """Hardening item 10: `weir run` checks the SQL again; `"read_csv"(...)` slipped past the old run-time regex."""
    root = tmp_path / "ws"
    (root / "jobs").mkdir(parents=True)
    (root / "landing" / "pay").mkdir(parents=True)
    (root / "landing" / "pay" / "2026-01-01.csv").write_text("merchant,amount\nm1,5\n")
    job = root / "jobs" / "pay_daily.yaml"
    job.write_text(PAY.replace("SQL", json.dumps("SELECT merchant FROM pay")))
    assert cli(root, "check", "--at", AT).exit_code == 0
    job.write_text(PAY.replace("SQL", json.dumps(f"SELECT * FROM \"read_csv\"('{secret}')")))
    result = cli(root, "run", "pay_daily", "--window", "2026-01-01")
    assert result.exit_code != 0
    assert "SQL reads files itself with read_csv()" in result.output + result.stderr
    out = root / "state" / "out" / "2026-01-01.csv"
    assert not out.exists() or SECRET_COLUMN not in out.read_text()


# ---------------------------------------------------------------- valid SQL is not refused (item 9)


@pytest.mark.parametrize("sql", [
    "SELECT p.merchant, SUM(p.amount) AS total FROM pay AS p GROUP BY p.merchant",
    "SELECT pay.merchant FROM pay",
    "SELECT p.merchant FROM pay p JOIN pay q ON p.merchant = q.merchant",
    "SELECT x.merchant FROM (SELECT merchant FROM pay) AS x",
])
def test_aliases_over_an_input_without_a_schema_pass_check(weir, make_workspace, sql):
    """Hardening item 9: `SELECT p.merchant FROM pay AS p` without a schema gave `no column named 'merchant'`."""
    root = make_workspace({"pay_daily": PAY.replace("SQL", json.dumps(sql))})
    result = weir(root, "check", "--at", "2026-01-05T00:00Z")
    assert result.exit_code == 0, result.output


def test_columns_of_an_input_with_a_schema_are_still_checked_through_aliases(weir, make_workspace):
    """Hardening item 9: with a declared schema a wrong column is still reported, alias or not."""
    text = PAY.replace('inputs:\n  pay: {files: "landing/pay/{start:%Y-%m-%d}.csv"}',
                       'inputs:\n  pay:\n    files: "landing/pay/{start:%Y-%m-%d}.csv"\n'
                       '    schema: {merchant: str, amount: float}')
    root = make_workspace({"pay_daily": text.replace("SQL", json.dumps("SELECT p.price FROM pay AS p"))})
    result = weir(root, "check", "--at", "2026-01-05T00:00Z")
    assert result.exit_code == 2 and "price" in result.output, result.output


def test_a_step_reading_a_table_of_unknown_columns_has_an_unknown_output_schema(tmp_path):
    """Hardening item 9: `SELECT *, 1 AS x` over an input without a schema is not `{x}` alone."""
    from runner.core.sqlcheck import resolve_job
    from runner.model.loading import load_job

    file = tmp_path / "pay_daily.yaml"
    file.write_text(PAY.replace("SQL", json.dumps("SELECT *, 1 AS x FROM pay")))
    assert resolve_job(load_job(file), {}).output is None
    file.write_text(PAY.replace("SQL", json.dumps("SELECT COUNT(*) AS n FROM pay")))
    assert list(resolve_job(load_job(file), {}).output) == ["n"]


# ---------------------------------------------------------------- fuzzing the guard

READERS = ["read_csv", "read_parquet", "read_json", "read_ipc", "read_ndjson", "scan_csv", "read_text"]


def _mixed_case(draw, name: str) -> str:
    return "".join(c.upper() if draw(st.booleans()) else c for c in name)


@st.composite
def file_reading_query(draw, path: str) -> str:
    """A query that reaches a file: every spelling of a reader, in every place a table can be."""
    name = _mixed_case(draw, draw(st.sampled_from(READERS)))
    quoted = draw(st.sampled_from(["plain", "double", "schema", "schema_quoted"]))
    name = {"plain": name, "double": f'"{name}"', "schema": f"main.{name}",
            "schema_quoted": f'"main"."{name}"'}[quoted]
    gap = draw(st.sampled_from(["", " ", "\n", " /* ( */ ", " -- x\n"]))
    call = f"{name}{gap}('{path}')"
    decoy = draw(st.sampled_from(["", "'--' AS d1, ", "'/*' AS d2, ", "'*/' AS d3, ", "'it''s' AS d4, ",
                                  "$$--$$ AS d5, ", '"""" AS d6, ']))
    tail = draw(st.sampled_from(["", " -- '", " /* ' */", " WHERE '*/' = '*/'"]))
    place = draw(st.sampled_from(["from", "join", "subquery", "cte", "union", "scalar", "in", "nested"]))
    return {
        "from": f"SELECT {decoy}* FROM {call}{tail}",
        "join": f"SELECT {decoy}p.merchant FROM pay AS p JOIN {call} AS s ON TRUE{tail}",
        "subquery": f"SELECT {decoy}* FROM (SELECT * FROM {call}) AS s{tail}",
        "cte": f"WITH s AS (SELECT * FROM {call}) SELECT {decoy}* FROM s{tail}",
        "union": f"SELECT {decoy}merchant FROM pay UNION ALL SELECT * FROM {call}{tail}",
        "scalar": f"SELECT {decoy}(SELECT COUNT(*) FROM {call}) AS n FROM pay{tail}",
        "in": f"SELECT {decoy}* FROM pay WHERE merchant IN (SELECT * FROM {call}){tail}",
        "nested": f"SELECT {decoy}* FROM (SELECT * FROM (WITH s AS (SELECT * FROM {call}) SELECT * FROM s) a) b{tail}",
    }[place]


FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@FUZZ
@given(data=st.data())
def test_generated_queries_that_reach_files_are_always_refused(secret, data):
    """Hardening item 10 (fuzzer): every spelling and place of a file reader is refused."""
    sql = data.draw(file_reading_query(str(secret)))
    assert refused(sql), sql


TRICKY = st.lists(st.sampled_from(list("'\"-*/\\\n\r$`#;(), ab") + ["--", "/*", "*/", "$$", "''", "READCALL"]),
                  max_size=6).map("".join)


@st.composite
def lexical_unit(draw, kinds: str) -> str:
    """A string, quoted name, comment or nothing, with awkward characters (maybe a whole call) inside."""
    inside = draw(TRICKY)
    return {"s": f"'{inside}'", "d": f"$${inside}$$", "i": f'"{inside}"', "b": f"/*{inside}*/",
            "l": f"--{inside}\n", "n": ""}[draw(st.sampled_from(kinds))]


@FUZZ
@given(value=lexical_unit("sdi"), before=lexical_unit("bln"), after=lexical_unit("bln"), plain=st.booleans())
def test_no_text_polars_would_read_a_file_with_gets_past_the_guard(secret, value, before, after, plain):
    """Hardening item 10 (differential fuzzer): sqlglot and polars must agree on comments and strings.

    Strings, quoted names and comments holding quotes, comment marks, line
    ends and sometimes a whole `read_csv` call, around or instead of a plain
    call: whenever polars would read the secret file, the guard refuses.
    """
    call = f"read_csv('{secret}')"
    sql = f"SELECT {value} AS c1, * FROM t {before}{', ' + call if plain else ''} {after}".replace("READCALL", call)
    if polars_reads(sql, secret):
        assert refused(sql), sql


@st.composite
def plain_query(draw) -> str:
    """A valid query over `pay(merchant, amount)` and `t(a)`: aliases, CTEs, subqueries, unions, quotes."""
    alias = draw(st.sampled_from(["p", "pay", "P", '"p"']))
    from_pay = "pay" if alias == "pay" else f"pay AS {alias}"
    col = draw(st.sampled_from(["merchant", "amount"]))
    select = draw(st.sampled_from([
        f"SELECT {alias}.{col} FROM {from_pay}",
        f"SELECT {col}, COUNT(*) AS n FROM pay GROUP BY {col}",
        f"SELECT {alias}.merchant, SUM({alias}.amount) AS total FROM {from_pay} GROUP BY {alias}.merchant",
        "SELECT merchant FROM pay WHERE amount > 0 AND merchant <> 'read_csv(x)'",
        "SELECT p.merchant, t.a FROM pay AS p JOIN t ON TRUE",
        "SELECT * FROM (SELECT merchant, amount FROM pay) AS s WHERE s.amount >= 1",
        "WITH s AS (SELECT merchant FROM pay) SELECT s.merchant FROM s",
        "SELECT merchant FROM pay UNION ALL SELECT merchant FROM pay",
        "SELECT merchant, amount, SUM(amount) OVER (PARTITION BY merchant) AS share FROM pay",
        "SELECT DISTINCT merchant FROM pay ORDER BY merchant LIMIT 5",
        "SELECT * EXCLUDE (amount) FROM pay",
        "SELECT amount::int AS whole FROM pay",
        "SELECT merchant FROM pay WHERE merchant IN (SELECT merchant FROM pay WHERE amount > 1)",
    ]))
    comment = draw(st.sampled_from(["", " -- read_csv('x')", " /* read_csv('y') */"]))
    return select + comment


@FUZZ
@given(sql=plain_query())
def test_plain_valid_queries_are_never_refused(sql):
    """Hardening items 9 and 10 (fuzzer): what polars runs over declared tables, the guard lets through."""
    frames = {"pay": pl.LazyFrame({"merchant": ["m"], "amount": [1.0]}), "t": pl.LazyFrame({"a": [1]})}
    pl.SQLContext(frames=frames, eager=False).execute(sql).collect()  # polars runs it: it is valid
    assert not refused(sql), sql
    assert query_shape(sql).tables <= {"pay", "t"}


def test_the_demo_jobs_sql_passes_the_guard():
    """Every SQL step of the example workspace is a plain query the guard lets through."""
    import yaml

    root = Path(__file__).resolve().parent.parent / "jobs"
    steps = [s["sql"] for f in sorted(root.glob("*.yaml"))
             for s in yaml.safe_load(f.read_text())["steps"] if "sql" in s]
    assert steps
    for sql in steps:
        assert not refused(textwrap.dedent(sql)), sql


def test_a_cte_named_like_the_input_it_reads_still_gets_that_input(tmp_path):
    """Hardening item 10 (the guard's table list): `WITH pay AS (SELECT * FROM pay ...)` reads the input pay.

    Steps are given only the tables they name; a CTE that shadows an input
    still names it, so the input is given too (the first cut left it out).
    """
    from runner.core.windows import Cadence
    from runner.engine.steps import build
    from runner.model.spec import JobSpec

    sql = "WITH pay AS (SELECT * FROM pay WHERE amount > 0) SELECT COUNT(*) AS n FROM pay"
    spec = JobSpec.model_validate({
        "window": {"every": "1h", "start": "2026-01-01T00:00"},
        "inputs": {"pay": {"files": "landing/{start:%Y%m%d%H}.csv", "schema": {"amount": "int"}}},
        "steps": [{"sql": sql}],
        "output": {"path": "state/out/{start:%Y%m%d%H}.parquet"},
    })
    pay = pl.LazyFrame({"amount": [5, -1, 7]})
    out = build(spec, {"pay": pay}, Cadence.of(spec.window).first(), tmp_path).collect()
    assert out["n"].to_list() == [2]  # counted by hand: 5 and 7


# ---------------------------------------------------------------- output check rules are expressions only


def test_a_rule_with_a_subquery_is_refused_at_check_where_it_is_written(weir, make_workspace):
    """Hardening item 10: polars' sql_expr opens a file named in a rule's subquery."""
    text = PAY.replace('output: {path: "state/out/{start:%Y-%m-%d}.csv"}',
                       'output:\n  path: "state/out/{start:%Y-%m-%d}.csv"\n  checks:\n'
                       "    - rule: n >= 0\n"
                       "    - rule: \"n IN (SELECT x FROM read_csv('/nonexistent/secret.csv'))\"")
    root = make_workspace({"pay_daily": text.replace("SQL", json.dumps("SELECT COUNT(*) AS n FROM pay"))})
    result = weir(root, "check", "--at", "2026-01-05T00:00Z")
    assert result.exit_code == 2, result.output
    (line,) = result.output.strip().splitlines()[:-1]
    assert "jobs/pay_daily.yaml:10:13: output.checks.1.rule: a rule is an expression" in line, line


def test_a_rule_changed_after_check_to_read_a_file_fails_the_window_without_opening_it(tmp_path):
    """Hardening item 10: at run time the rule is refused before polars looks for the file."""
    root = tmp_path / "ws"
    (root / "jobs").mkdir(parents=True)
    (root / "landing" / "pay").mkdir(parents=True)
    (root / "landing" / "pay" / "2026-01-01.csv").write_text("merchant,amount\nm1,5\n")
    job = root / "jobs" / "pay_daily.yaml"
    rule = "n IN (SELECT x FROM read_csv('/nonexistent/secret.csv'))"
    job.write_text(PAY.replace("SQL", json.dumps("SELECT COUNT(*) AS n FROM pay")).replace(
        'output: {path: "state/out/{start:%Y-%m-%d}.csv"}',
        f'output:\n  path: "state/out/{{start:%Y-%m-%d}}.csv"\n  checks: [{{rule: {json.dumps(rule)}}}]'))
    result = cli(root, "run", "pay_daily", "--window", "2026-01-01")
    text = result.output + result.stderr
    assert result.exit_code != 0
    assert "a rule is an expression over the output's columns" in text, text
    assert "No such file" not in text  # polars never went looking for it

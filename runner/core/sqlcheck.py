"""Static checks of SQL steps: what a query reads, undefined tables and columns.

Every SQL step is parsed with sqlglot, a real SQL parser, before anything
else looks at it (`query_shape`, also called just before a step runs: a job
file can change between `weir check` and a run). A step must be one query
that reads only named tables: its inputs, earlier named steps and `bounds`.
Table functions (`read_csv(...)` in any spelling), functions that reach files
or the network, schema-qualified names and statements other than a query
(ATTACH, COPY, INSTALL, PRAGMA, CREATE, SELECT ... INTO, ...) are refused, so
that everything a job reads is a declared, fingerprinted input. SQL the parser
cannot read is refused too: the guard fails closed.

Then each step is resolved with polars' lazy SQL against *empty* frames that
carry the declared input schemas, so nothing is read. Where a table the step
reads has no known schema (a file input without `schema:`, a python step),
its columns are unknown: column errors are not reported and the step's output
schema is unknown; unknown tables always are reported.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from functools import lru_cache
from typing import TYPE_CHECKING

from runner.model.coltypes import polars_dtype
from runner.model.spec import DatabaseInput, FileInput, Job, JobInput, SqlStep

if TYPE_CHECKING:
    import polars as pl
    from sqlglot import exp

SQL_DIALECT = "duckdb"
"""The sqlglot dialect the guard reads SQL in. polars parses SQL with sqlparser-rs's generic
dialect plus DuckDB-style extras (`SELECT * EXCLUDE/REPLACE/RENAME`, `::` casts, `$$` strings,
nested block comments, and the same `read_csv`/`read_parquet`/`read_json`/`read_ipc` table
functions); of sqlglot's dialects DuckDB is the closest."""

_COMMENT = re.compile(r"--[^\n]*|/\*.*?\*/", re.S)
_STRING = re.compile(r"'(?:[^']|'')*'")
# Functions that read or write files or reach the network, in polars, DuckDB and their kin; a
# pattern rather than a list, so that a reader polars adds later is refused too.
_IO_FUNCTION = re.compile(
    r"^(?:read|scan|sink|write|load|copy|glob|sniff|http|url|s3|gcs|azure|hf)(?:_|$)"
    r"|_(?:scan|metadata|schema|file|files|read|url)$"
    r"|^(?:parquet|csv|json|ndjson|ipc|arrow|delta|iceberg|avro|excel|sqlite|postgres|mysql)_",
    re.I,
)
_RELATION = re.compile(r"relation '([^']+)' was not found")



@dataclass
class StepFinding:
    step: int
    message: str
    path: tuple[str | int, ...] | None = None  # where in the job file; None: steps.STEP.sql


@dataclass
class Resolution:
    """The outcome of resolving one job's steps: output schema (None if unknown) and findings."""

    output: pl.Schema | None
    findings: list[StepFinding] = field(default_factory=list)


def strip_sql(sql: str) -> str:
    """SQL text without comments and string literals (for advisory pattern checks only)."""
    return _STRING.sub("''", _COMMENT.sub(" ", sql))


class SqlRefused(ValueError):
    """A SQL step that may not run: not one plain query over named tables (one line)."""


@dataclass(frozen=True)
class QueryShape:
    """What the guard learnt about a query that may run."""

    tables: frozenset[str]  # the tables it reads, lower case, CTE names left out
    star: bool  # it selects `*` or `t.*` somewhere (COUNT(*) does not count)
    mentions: frozenset[str] = frozenset()  # every table name it uses, CTE names too (a CTE may
    # shadow the input it reads: `WITH pay AS (SELECT * FROM pay WHERE ...)`)


def query_shape(sql: str) -> QueryShape:
    """Parse a SQL step and say what it reads; raise SqlRefused unless it is safe to run.

    Safe means: sqlglot parses it as exactly one query, it reads only plain
    table names, and it calls no table function and no function that reaches
    files or the network. polars looks table names up without regard to case,
    so the names come back in lower case. Cached: a step runs once per window.
    """
    return _query_shape(sql)


@lru_cache(maxsize=1024)
def _query_shape(sql: str) -> QueryShape:
    import sqlglot
    from sqlglot import exp

    try:
        statements = [s for s in sqlglot.parse(sql, read=SQL_DIALECT) if s is not None]
    except sqlglot.errors.ParseError as exc:
        raise SqlRefused(f"cannot parse this SQL to check what it reads: {_parse_message(exc)}") from None
    except sqlglot.errors.SqlglotError as exc:
        raise SqlRefused(f"cannot parse this SQL to check what it reads: {_first_line(exc)}") from None
    except RecursionError:
        raise SqlRefused("cannot parse this SQL to check what it reads: it is nested too deeply") from None
    if len(statements) != 1:
        raise SqlRefused(f"a SQL step is one query; found {len(statements)} statements")
    (root,) = statements
    if not isinstance(root, exp.Query):
        raise SqlRefused(f"a SQL step is one query (SELECT ...); found {_kind(root)}")
    statement_classes, reader_classes = _classes()
    ctes = {cte.alias_or_name.lower() for cte in root.find_all(exp.CTE)}
    tables: set[str] = set()
    mentions: set[str] = set()
    star = False
    for node in root.walk():
        if isinstance(node, statement_classes):
            raise SqlRefused(f"a SQL step is one query and changes nothing; found {_kind(node)}")
        if isinstance(node, exp.Table):
            if not isinstance(node.this, exp.Identifier):
                raise SqlRefused(_table_function(node.this, reader_classes))
            if node.args.get("db") is not None or node.args.get("catalog") is not None:
                raise SqlRefused(
                    f"table {node.sql(dialect=SQL_DIALECT)!r} names a schema or catalog; "
                    "a step reads its inputs, earlier named steps and bounds by their plain names")
            name = node.name.lower()
            mentions.add(name)
            if name not in ctes:
                tables.add(name)
        elif isinstance(node, exp.UDTF | exp.Unnest) and not isinstance(node, exp.Values):
            raise SqlRefused(_table_function(node, reader_classes))
        elif isinstance(node, exp.Func) and _reads_files(node, reader_classes):
            raise SqlRefused(_reads_files_message(node))
        elif isinstance(node, exp.Star) and not isinstance(node.parent, exp.Func):
            star = True
    return QueryShape(frozenset(tables), star, frozenset(mentions))


def check_rule(rule: str) -> None:
    """Raise SqlRefused unless an output check's `rule:` is a plain expression over the output's columns.

    polars evaluates a rule with `sql_expr`, which would open a file named in
    a subquery (`a IN (SELECT x FROM read_csv('...'))`) before failing.
    """
    _check_rule(rule)


@lru_cache(maxsize=256)
def _check_rule(rule: str) -> None:
    import sqlglot
    from sqlglot import exp

    try:
        tree = sqlglot.parse_one(rule, read=SQL_DIALECT)
    except (sqlglot.errors.SqlglotError, RecursionError) as exc:
        raise SqlRefused(f"cannot parse this rule to check what it reads: {_parse_message(exc)}") from None
    statement_classes, reader_classes = _classes()
    refused = (exp.Query, exp.Table, exp.UDTF, *statement_classes)
    for node in tree.walk():
        if isinstance(node, refused):
            raise SqlRefused("a rule is an expression over the output's columns; it reads no table "
                             "and runs no query")
        if isinstance(node, exp.Func) and _reads_files(node, reader_classes):
            raise SqlRefused(_reads_files_message(node))


@lru_cache(maxsize=1)
def _classes() -> tuple[tuple[type, ...], tuple[type, ...]]:
    """sqlglot's statement classes (anything but a query) and its file-reading function classes."""
    from sqlglot import exp

    statements = ("DDL", "DML", "Into", "Command", "Pragma", "Attach", "Detach", "Install", "Set", "Use",
                  "Describe", "Show", "Transaction", "Commit", "Rollback", "Export", "Summarize", "Copy")
    readers = ("ReadCSV", "ReadParquet")
    return (tuple(getattr(exp, n) for n in statements if hasattr(exp, n)),
            tuple(getattr(exp, n) for n in readers if hasattr(exp, n)))


def _function_name(node: exp.Func) -> str:
    from sqlglot import exp

    if isinstance(node, exp.Anonymous):
        return str(node.name)
    return node.sql_name()


def _reads_files(node: exp.Func, reader_classes: tuple[type, ...]) -> bool:
    return isinstance(node, reader_classes) or bool(_IO_FUNCTION.search(_function_name(node)))


def _reads_files_message(node: exp.Func) -> str:
    return (f"SQL reads files itself with {_function_name(node).lower()}(); declare the files under "
            "inputs: instead, so weir can fingerprint them and wait for them")


def _table_function(node: exp.Expr, reader_classes: tuple[type, ...]) -> str:
    from sqlglot import exp

    if isinstance(node, exp.Func) and _reads_files(node, reader_classes):
        return _reads_files_message(node)
    name = _function_name(node) if isinstance(node, exp.Func) else node.key
    return (f"{name.lower()}(...) in FROM is a table function; a step reads only its inputs, earlier "
            "named steps and bounds")


def _kind(node: exp.Expr) -> str:
    return node.key.upper()


def _parse_message(exc: BaseException) -> str:
    errors = getattr(exc, "errors", None) or []
    if errors:
        first = errors[0]
        return f"{first.get('description')} (line {first.get('line')}, column {first.get('col')})"
    return _first_line(exc)


def bounds_frame(start_us: int = 0, end_us: int = 0, empty: bool = False) -> pl.LazyFrame:
    """The one-row `bounds(window_start, window_end)` table (UTC)."""
    import polars as pl

    dtype = pl.Datetime("us", "UTC")
    if empty:
        return pl.LazyFrame(schema={"window_start": dtype, "window_end": dtype})
    return pl.LazyFrame(
        {"window_start": [start_us], "window_end": [end_us]},
        schema={"window_start": pl.Int64, "window_end": pl.Int64},
    ).with_columns(pl.col("window_start", "window_end").cast(dtype))


def declared_schema(columns: dict | None) -> pl.Schema | None:
    import polars as pl

    if not columns:
        return None
    return pl.Schema({name: polars_dtype(col.type) for name, col in columns.items()})


def resolve_job(job: Job, producer_schemas: dict[str, pl.Schema | None]) -> Resolution:
    """Resolve every step of `job` without data; `producer_schemas` maps job -> output schema.

    Each step gets only the tables it reads, each built once, so the work
    grows with the number of steps, not with its square.
    """
    import polars as pl

    known: dict[str, pl.Schema | None] = {}
    for name, source in job.spec.inputs.items():
        if isinstance(source, FileInput | DatabaseInput):
            known[name] = declared_schema(source.columns)
        elif isinstance(source, JobInput):
            known[name] = declared_schema(source.columns) or producer_schemas.get(source.job)
    by_lower = {n.lower(): n for n in known}
    empty: dict[str, pl.LazyFrame] = {"bounds": bounds_frame(empty=True)}
    result = Resolution(output=None)
    last: pl.Schema | None = None
    for index, step in enumerate(job.spec.steps):
        last = None
        if isinstance(step, SqlStep):
            last = _resolve_step(index, step.sql, known, by_lower, empty, result.findings)
        if step.name:
            known[step.name] = last
            by_lower[step.name.lower()] = step.name
    for index, check in enumerate(job.spec.output.checks):
        if check.rule is not None:
            try:
                check_rule(check.rule)
            except SqlRefused as exc:
                result.findings.append(StepFinding(index, str(exc), ("output", "checks", index, "rule")))
    if last is not None and job.spec.output.stamp:
        last = pl.Schema({
            **dict(last),
            "window_start": pl.Datetime("us", "UTC"),
            "window_end": pl.Datetime("us", "UTC"),
            "run_id": pl.Int64(),
            "code_version": pl.String(),
        })
    result.output = last
    return result


def _resolve_step(index: int, sql: str, known: dict[str, pl.Schema | None], by_lower: dict[str, str],
                  empty: dict[str, pl.LazyFrame], findings: list[StepFinding]) -> pl.Schema | None:
    """The output schema of one SQL step (None when unknown); its problems go to `findings`."""
    import polars as pl

    try:
        shape = query_shape(sql)
    except SqlRefused as exc:
        findings.append(StepFinding(index, str(exc)))
        return None
    missing = sorted(t for t in shape.tables if t not in by_lower and t != "bounds")
    for table in missing:
        findings.append(StepFinding(index, (
            f"table {table!r} is not defined; this step can read "
            f"{', '.join(sorted(known) + ['bounds'])} (declare it under inputs:)")))
    if missing:
        return None
    reads = {by_lower[t] for t in shape.mentions if t in by_lower}
    unknown = any(known[n] is None for n in reads)
    frames = {}
    for name in reads:
        if name not in empty:
            schema = known[name]
            empty[name] = pl.LazyFrame(schema=schema) if schema is not None else pl.LazyFrame()
        frames[name] = empty[name]
    if "bounds" in shape.mentions:
        frames["bounds"] = empty["bounds"]
    try:
        schema = pl.SQLContext(frames=frames, eager=False).execute(sql).collect_schema()
    except pl.exceptions.SQLSyntaxError as exc:
        findings.append(StepFinding(index, f"SQL syntax error: {_first_line(exc)}"))
        return None
    except (pl.exceptions.ColumnNotFoundError, pl.exceptions.SchemaFieldNotFoundError) as exc:
        if not unknown:
            findings.append(StepFinding(index, f"unknown column: {_first_line(exc)}"))
        return None
    except pl.exceptions.SQLInterfaceError as exc:
        # With a table of unknown columns, polars meets a column it cannot
        # find (`p.merchant`) as an interface error: not the step's fault.
        if not unknown:
            m = _RELATION.search(str(exc))
            findings.append(StepFinding(index, (
                f"table {m.group(1)!r} is not defined" if m else f"SQL error: {_first_line(exc)}")))
        return None
    except pl.exceptions.PolarsError as exc:
        if not unknown:
            findings.append(StepFinding(index, f"SQL does not resolve: {_first_line(exc)}"))
        return None
    if unknown and (shape.star or not schema):
        return None  # `*` over a table of unknown columns: the columns are unknown too
    return schema


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


# ---------------------------------------------------------------- groupings (for batch-size advice)

_CLAUSE = re.compile(r"\b(GROUP|PARTITION)\s+BY\b", re.I)


_END = re.compile(
    r"\b(HAVING|ORDER|LIMIT|OFFSET|FETCH|WINDOW|QUALIFY|UNION|INTERSECT|EXCEPT|ROWS|RANGE|GROUPS|SELECT|FROM|WHERE)\b",
    re.I)


_COLUMN = re.compile(r'^(?:("?)([A-Za-z_]\w*)\1\.)?("?)([A-Za-z_]\w*)\3$')


@dataclass(frozen=True)
class Grouping:
    """A bare column named in a GROUP BY or PARTITION BY list."""

    clause: str  # "groups" or "splits"
    table: str | None  # the qualifier, when written as table.column
    column: str


def groupings(sql: str) -> list[Grouping]:
    """The bare columns that `sql` groups or splits by (expressions and ordinals are skipped)."""
    text = strip_sql(sql)
    out: list[Grouping] = []
    for m in _CLAUSE.finditer(text):
        clause = "groups" if m.group(1).upper() == "GROUP" else "splits"
        for item in _items(text, m.end()):
            c = _COLUMN.match(item.strip())
            if c and c.group(4).upper() not in ("ALL", "ROLLUP", "CUBE"):
                out.append(Grouping(clause, c.group(2), c.group(4)))
    return out


def _items(text: str, start: int) -> list[str]:
    """The comma-separated list starting at `start`, up to the clause's end (depth-aware)."""
    items, depth, begin, i = [], 0, start, start
    while i < len(text):
        ch = text[i]
        if ch == "(":
            depth += 1
        elif ch == ")":
            if depth == 0:
                break
            depth -= 1
        elif ch == ";" and depth == 0:
            break
        elif ch == "," and depth == 0:
            items.append(text[begin:i])
            begin = i + 1
        elif (depth == 0 and ch.isalpha() and not (text[i - 1].isalnum() or text[i - 1] == "_")
              and _END.match(text, i)):
            break
        i += 1
    items.append(text[begin:i])
    return [s for s in items if s.strip()]


def aliases(sql: str, input_name: str) -> set[str]:
    """Names a SQL step gives an input (`FROM rides AS r`, `FROM rides r`)."""
    found = re.findall(rf"\b{re.escape(input_name)}\s+(?:AS\s+)?([A-Za-z_]\w*)", strip_sql(sql), re.I)
    return {a for a in found if not _END.fullmatch(a) and a.upper() not in ("ON", "JOIN", "USING", "INNER",
                                                                              "LEFT", "RIGHT", "FULL", "CROSS")}

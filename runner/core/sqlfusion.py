"""Window-separable SQL: one query for many windows, each output row keeping its window (pure).

A SQL step is *window-separable* when every output row depends only on rows
of one window. Then many windows can be computed by one query over all
their rows, if each windowed table carries a window key column
(`WINDOW_KEY`, the window's index) and the query is rewritten to carry the
key through: into every grouping, window partition, join condition,
DISTINCT and ORDER BY, and out as a column of the result. Splitting that
result by the key gives each window's rows as if it had run alone.

`fuse(sql, windowed)` decides from the parsed SQL alone (sqlglot) and
accepts only shapes that are separable by construction:

- SELECT over a windowed table first in FROM, with WHERE, GROUP BY, HAVING,
  DISTINCT (ON), window functions, QUALIFY, ORDER BY without LIMIT;
- INNER, LEFT, SEMI and ANTI joins and comma joins to windowed tables (the
  key is added to the join condition) or to tables that are the same for
  every window (lookups: not listed in `windowed`);
- subqueries in FROM, CTEs and UNION [ALL] whose branches are themselves
  separable; `bounds` is a windowed table like any other (one row per
  window, carrying the key) when the caller lists it.

Anything else is refused with a one-line reason: LIMIT/OFFSET (they take rows
across windows), a subquery in an expression that reads a windowed table, a
query or UNION branch that reads no windowed table, RIGHT/FULL joins,
`SELECT *` over a join, ROLLUP/CUBE/GROUPING SETS, INTERSECT/EXCEPT, a column
already named like the key. A query with aggregates and no GROUP BY (one
row per window, even an empty one) is accepted and flagged: a window
without rows gives no row in the fused result, so the caller must run
empty windows alone (`Fusion.empty_window_row`).

Not wired in yet (issue 12 builds the pass that uses it).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import sqlglot
from sqlglot import exp

DIALECT = "duckdb"  # as runner.core.sqlcheck.SQL_DIALECT (not imported: this module stays pure and light)
WINDOW_KEY = "__weir_window"


@dataclass(frozen=True)
class Fusion:
    """The verdict on one SQL step: the rewritten query, or why windows cannot share one."""

    sql: str | None
    reason: str | None = None
    empty_window_row: bool = False  # an empty window still gives a row alone (a global aggregate)

    @property
    def separable(self) -> bool:
        return self.sql is not None


class _NotSeparable(Exception):
    """Why a query cannot carry the window key (one line)."""


def fuse(sql: str, windowed: Iterable[str], key: str = WINDOW_KEY) -> Fusion:
    """Rewrite `sql` so that its result carries `key`, or say why it cannot be.

    `windowed` names the tables whose rows each belong to one window and
    carry the `key` column (inputs with a time column, earlier fused steps,
    `bounds`); every other table is taken to be the same for every window.
    """
    try:
        tree = sqlglot.parse_one(sql, read=DIALECT)
    except (sqlglot.errors.SqlglotError, RecursionError) as exc:
        return Fusion(None, f"the SQL cannot be parsed: {str(exc).splitlines()[0] if str(exc) else exc}")
    try:
        empty_row = _Rewriter(key).query(tree, {name.lower() for name in windowed})
    except _NotSeparable as exc:
        return Fusion(None, str(exc))
    return Fusion(tree.sql(dialect=DIALECT), None, empty_row)


class _Rewriter:
    def __init__(self, key: str) -> None:
        self.key = key

    def column(self, table: str) -> exp.Column:
        return exp.column(self.key, table=table, quoted=True)

    # ------------------------------------------------------------ queries

    def query(self, node: exp.Expr, windowed: set[str]) -> bool:
        """Rewrite a query in place; True when it gives a row for an empty window."""
        windowed = set(windowed)
        empty_row = False
        with_ = node.args.get("with_")
        if with_ is not None:
            for cte in with_.expressions:
                if _reads(cte.this, windowed):
                    empty_row |= self.query(cte.this, windowed)
                    windowed.add(cte.alias_or_name.lower())
        if isinstance(node, exp.Subquery):
            return self.query(node.this, windowed) or empty_row
        if isinstance(node, exp.Union):
            if node.args.get("limit") or node.args.get("offset"):
                raise _NotSeparable("LIMIT or OFFSET takes rows across windows")
            for branch in (node.this, node.expression):
                if not _reads(branch, windowed):
                    raise _NotSeparable("a UNION branch reads no windowed table")
                if isinstance(branch, exp.Select) and _stars(branch):
                    # UNION pairs columns by position; where a star puts the key is the table's business
                    raise _NotSeparable("SELECT * in a UNION branch: list the columns")
                empty_row |= self.query(branch, windowed)
            self.order(node)
            return empty_row
        if isinstance(node, exp.SetOperation):
            raise _NotSeparable(f"{node.key.upper()} is not supported across windows")
        if isinstance(node, exp.Select):
            return self.select(node, windowed) or empty_row
        raise _NotSeparable(f"{node.key.upper()} is not a query weir can split by window")

    def select(self, sel: exp.Select, windowed: set[str]) -> bool:
        if sel.args.get("limit") or sel.args.get("offset"):
            raise _NotSeparable("LIMIT or OFFSET takes rows across windows")
        from_ = sel.args.get("from_")
        if from_ is None:
            raise _NotSeparable("a SELECT without FROM reads no windowed table")
        empty_row = False
        base, base_windowed, inner_empty = self.source(from_.this, windowed)
        empty_row |= inner_empty
        joins = sel.args.get("joins") or []
        if not base_windowed:
            raise _NotSeparable("the first table in FROM is not windowed; put a windowed table first")
        sources = [base]
        for join in joins:
            alias, is_windowed, inner_empty = self.source(join.this, windowed)
            empty_row |= inner_empty
            sources.append(alias)
            self.join(sel, join, base, alias, is_windowed)
        self.expressions_read_no_window(sel, windowed)
        self.projection(sel, base, single=not joins)
        group = sel.args.get("group")
        if group is not None:
            if any(group.args.get(k) for k in ("rollup", "cube", "grouping_sets")) or any(
                    isinstance(e, exp.Rollup | exp.Cube | exp.GroupingSets) for e in group.expressions):
                raise _NotSeparable("ROLLUP, CUBE and GROUPING SETS aggregate across the window key")
            if group.args.get("all"):
                raise _NotSeparable("GROUP BY ALL is not supported across windows")
            group.append("expressions", self.column(base))
        elif _aggregates(sel):
            sel.set("group", exp.Group(expressions=[self.column(base)]))
            empty_row = True
        distinct = sel.args.get("distinct")
        if distinct is not None and distinct.args.get("on") is not None:
            on = distinct.args["on"]
            items = on.expressions if isinstance(on, exp.Tuple) else [on]
            distinct.set("on", exp.Tuple(expressions=[self.column(base), *items]))
        for window in _own(sel, exp.Window):
            window.set("partition_by", [self.column(base), *(window.args.get("partition_by") or [])])
        self.order(sel)
        return empty_row

    # ------------------------------------------------------------ parts

    def source(self, node: exp.Expr, windowed: set[str]) -> tuple[str, bool, bool]:
        """(name the query uses for it, whether it is windowed, whether it gives empty-window rows)."""
        if isinstance(node, exp.Table):
            if not isinstance(node.this, exp.Identifier):
                raise _NotSeparable("a table function in FROM")
            return node.alias_or_name, node.name.lower() in windowed, False
        if isinstance(node, exp.Subquery):
            if not node.alias:
                raise _NotSeparable("a subquery in FROM needs an alias")
            if not _reads(node.this, windowed):
                return node.alias, False, False
            return node.alias, True, self.query(node.this, windowed)
        raise _NotSeparable(f"{node.key.upper()} in FROM is not supported across windows")

    def join(self, sel: exp.Select, join: exp.Join, base: str, alias: str, is_windowed: bool) -> None:
        side = (join.side or "").upper()
        kind = (join.kind or "").upper()
        if side in ("RIGHT", "FULL"):
            raise _NotSeparable(f"a {side} JOIN keeps rows that belong to no window")
        if not is_windowed:
            return  # a lookup: the same rows for every window
        same = exp.EQ(this=self.column(base), expression=self.column(alias))
        if join.args.get("using"):
            join.set("using", [*join.args["using"], exp.to_identifier(self.key, quoted=True)])
        elif join.args.get("on") is not None:
            join.set("on", exp.and_(join.args["on"], same))
        elif kind in ("", "CROSS", "INNER") and side == "":
            sel.where(same, copy=False)
        else:
            raise _NotSeparable(f"a {side or kind} JOIN without ON cannot be split by window")

    def expressions_read_no_window(self, sel: exp.Select, windowed: set[str]) -> None:
        for sub in _own(sel, exp.Query):
            if _reads(sub, windowed):
                raise _NotSeparable("a subquery in an expression reads a windowed table across windows")

    def projection(self, sel: exp.Select, base: str, single: bool) -> None:
        names = {e.alias_or_name.lower() for e in sel.expressions}
        if self.key.lower() in names:
            raise _NotSeparable(f"a column is already named {self.key}")
        stars = _stars(sel)
        if stars and not single:
            raise _NotSeparable("SELECT * over a join: list the columns")
        if stars:
            star = stars[0]
            excluded = star.args.get("except") or (star.this.args.get("except") if isinstance(star, exp.Column)
                                                   else None)
            if excluded and any(e.name.lower() == self.key.lower() for e in excluded):
                raise _NotSeparable(f"SELECT * EXCLUDE drops {self.key}")
            return  # the star carries the key column already
        sel.select(exp.alias_(self.column(base), self.key, quoted=True), copy=False)

    def order(self, node: exp.Expr) -> None:
        """ORDER BY sorts by the key first, so that each window's rows come together (ready to slice)."""
        order = node.args.get("order")
        if order is not None:
            order.set("expressions", [exp.Ordered(this=exp.column(self.key, quoted=True)), *order.expressions])


def _own(sel: exp.Select, kind: type) -> list[exp.Expr]:
    """Nodes of `kind` in `sel`'s own clauses, not inside its FROM/JOIN sources or nested queries."""
    found = []
    for arg, value in sel.args.items():
        if arg in ("from_", "joins", "with_"):
            continue
        for child in value if isinstance(value, list) else [value]:
            if not isinstance(child, exp.Expr):
                continue
            stack = [child]
            while stack:
                node = stack.pop()
                if isinstance(node, kind):
                    found.append(node)
                if isinstance(node, exp.Query) and node is not child:
                    continue
                if isinstance(node, exp.Query) and kind is not exp.Query:
                    continue
                stack.extend(node.iter_expressions())
    return found


def _stars(sel: exp.Select) -> list[exp.Expr]:
    """`*` and `t.*` items of a projection."""
    return [e for e in sel.expressions
            if isinstance(e, exp.Star) or (isinstance(e, exp.Column) and isinstance(e.this, exp.Star))]


def _aggregates(sel: exp.Select) -> bool:
    """Whether the projection or HAVING aggregates (outside window functions)."""
    for projection in [*sel.expressions, sel.args.get("having")]:
        if projection is None:
            continue
        for agg in projection.find_all(exp.AggFunc):
            if not agg.find_ancestor(exp.Window) and agg.find_ancestor(exp.Select) is sel:
                return True
    return False


def _reads(node: exp.Expr, windowed: set[str]) -> bool:
    """Whether a query reads a windowed table anywhere (CTE names it defines included)."""
    names = set(windowed)
    for cte in node.find_all(exp.CTE):
        if _reads(cte.this, names):
            names.add(cte.alias_or_name.lower())
    return any(t.name.lower() in names for t in node.find_all(exp.Table))

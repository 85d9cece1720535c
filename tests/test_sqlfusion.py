"""One query for many windows gives each window what running it alone gives (issue 12, item 1).

Engine: polars' SQL (the engine weir runs steps with). For random payments
spread over a few hourly windows, each accepted query shape is run two ways:
each window alone over its own rows, and once, rewritten by
`runner.core.sqlfusion.fuse`, over all rows with the window key as every windowed
table's last column, then split by that key. The rows of each window must be
the same (compared as sorted rows: without ORDER BY a SQL result has no
order). Shapes that are not separable must be refused with a reason.
"""

from __future__ import annotations

import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runner.core.sqlfusion import WINDOW_KEY, fuse

WINDOWS = 4
MERCHANTS = ["m1", "m2", "m3"]

ACCEPTED = [
    "SELECT merchant, COUNT(*) AS n, SUM(amount) AS total FROM pay GROUP BY merchant",
    "SELECT * FROM pay WHERE amount > 20",
    "SELECT id, amount * 2 AS double FROM pay",
    "SELECT COUNT(*) AS n, SUM(amount) AS total FROM pay",
    "SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant HAVING COUNT(*) > 1",
    "SELECT DISTINCT merchant FROM pay",
    "SELECT DISTINCT merchant FROM pay ORDER BY merchant",
    "SELECT id, merchant, SUM(amount) OVER (PARTITION BY merchant) AS merchant_total FROM pay",
    "SELECT id, RANK() OVER (ORDER BY amount, id) AS place FROM pay",
    "SELECT p.id, r.amount AS refunded FROM pay AS p JOIN refunds AS r ON p.id = r.id",
    "SELECT p.id, r.amount AS refunded FROM pay AS p LEFT JOIN refunds AS r ON p.id = r.id",
    "SELECT p.id, r.id AS same_merchant FROM pay AS p JOIN refunds AS r ON p.merchant = r.merchant",
    "SELECT p.id, r.id AS same_merchant FROM pay AS p LEFT JOIN refunds AS r ON p.merchant = r.merchant",
    "SELECT DISTINCT ON (merchant) merchant, amount FROM pay ORDER BY merchant, amount DESC",
    "SELECT p.id, m.region FROM pay AS p JOIN merchants AS m ON p.merchant = m.merchant",
    "SELECT p.id, m.region FROM pay AS p LEFT JOIN merchants AS m ON p.merchant = m.merchant",
    "SELECT merchant FROM pay UNION ALL SELECT merchant FROM refunds",
    "SELECT merchant, n FROM (SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant) AS s WHERE n > 1",
    "WITH big AS (SELECT * FROM pay WHERE amount > 10) SELECT merchant, COUNT(*) AS n FROM big GROUP BY merchant",
    "WITH per AS (SELECT merchant, SUM(amount) AS total FROM pay GROUP BY merchant) "
    "SELECT merchant, total, RANK() OVER (ORDER BY total DESC, merchant) AS place FROM per",
    "SELECT id FROM pay WHERE merchant IN (SELECT merchant FROM merchants WHERE region = 'north')",
    "SELECT p.id, b.window_start FROM pay AS p, bounds AS b WHERE p.amount > 5",
    "SELECT merchant, COUNT(*) AS n FROM pay, bounds WHERE pay.at >= bounds.window_start GROUP BY merchant",
]

REFUSED = [
    ("SELECT id FROM pay ORDER BY amount LIMIT 3", "LIMIT"),
    ("SELECT id FROM pay WHERE amount > (SELECT AVG(amount) FROM pay)", "subquery in an expression"),
    ("SELECT * FROM merchants", "first table in FROM is not windowed"),
    ("SELECT m.region, p.id FROM merchants AS m JOIN pay AS p ON p.merchant = m.merchant", "not windowed"),
    ("SELECT p.id FROM pay AS p RIGHT JOIN refunds AS r ON p.id = r.id", "RIGHT JOIN"),
    ("SELECT p.id FROM pay AS p FULL JOIN refunds AS r ON p.id = r.id", "FULL JOIN"),
    ("SELECT * FROM pay JOIN refunds USING (id)", "SELECT * over a join"),
    ("SELECT * FROM pay UNION ALL SELECT * FROM refunds", "SELECT * in a UNION branch"),
    ("SELECT merchant FROM pay UNION ALL SELECT merchant FROM merchants", "UNION branch reads no windowed"),
    ("SELECT merchant FROM pay INTERSECT SELECT merchant FROM refunds", "INTERSECT"),
    ("SELECT merchant, SUM(amount) AS s FROM pay GROUP BY ROLLUP (merchant)", "ROLLUP"),
    ("SELECT id, 1 AS __weir_window FROM pay", "already named"),
    ("SELECT (SELECT window_start FROM bounds) AS s, id FROM pay", "subquery in an expression"),
    ("SELECT id FROM pay LIMIT", "cannot be parsed"),
]


@st.composite
def payments(draw) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Payments and refunds with their window index (0 .. WINDOWS - 1); some windows may be empty."""
    n = draw(st.integers(0, 30))
    windows = draw(st.lists(st.integers(0, WINDOWS - 1), min_size=n, max_size=n))
    pay = pl.DataFrame({
        "id": list(range(n)),
        "merchant": draw(st.lists(st.sampled_from(MERCHANTS), min_size=n, max_size=n)),
        "amount": draw(st.lists(st.integers(1, 40), min_size=n, max_size=n)),
        "at": [w * 3_600_000_000 + 60_000_000 * i for i, w in enumerate(windows)],
        WINDOW_KEY: windows,
    }, schema={"id": pl.Int64, "merchant": pl.String, "amount": pl.Int64, "at": pl.Int64, WINDOW_KEY: pl.Int64})
    refunded = draw(st.lists(st.sampled_from(range(n)) if n else st.nothing(), max_size=n, unique=True))
    refunds = pay.filter(pl.col("id").is_in(refunded)).select(
        "id", "merchant", (pl.col("amount") // 2).alias("amount"), WINDOW_KEY)
    return pay, refunds


MERCHANT_REGIONS = pl.DataFrame({"merchant": MERCHANTS, "region": ["north", "south", "north"]})
BOUNDS = pl.DataFrame({"window_start": [w * 3_600_000_000 for w in range(WINDOWS)],
                       "window_end": [(w + 1) * 3_600_000_000 for w in range(WINDOWS)],
                       WINDOW_KEY: list(range(WINDOWS))})


def rows(frame: pl.DataFrame) -> list[tuple]:
    return sorted(frame.rows(), key=repr)


def alone(sql: str, pay: pl.DataFrame, refunds: pl.DataFrame, window: int) -> pl.DataFrame:
    """The query over one window's rows only, as weir runs a window today."""
    def own(frame: pl.DataFrame) -> pl.LazyFrame:
        return frame.filter(pl.col(WINDOW_KEY) == window).drop(WINDOW_KEY).lazy()

    frames = {"pay": own(pay), "refunds": own(refunds), "bounds": own(BOUNDS),
              "merchants": MERCHANT_REGIONS.lazy()}
    return pl.SQLContext(frames=frames, eager=False).execute(sql).collect()


def together(sql: str, pay: pl.DataFrame, refunds: pl.DataFrame) -> pl.DataFrame:
    """The rewritten query over every window's rows at once (the key is each windowed table's last column)."""
    frames = {"pay": pay.lazy(), "refunds": refunds.lazy(), "bounds": BOUNDS.lazy(),
              "merchants": MERCHANT_REGIONS.lazy()}
    return pl.SQLContext(frames=frames, eager=False).execute(sql).collect()


@pytest.mark.parametrize("sql", ACCEPTED)
@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=payments())
def test_a_fused_query_gives_each_window_what_running_it_alone_gives(sql, data):
    """Issue 12 item 1: the rewrite carries the window key through every accepted shape."""
    pay, refunds = data
    fusion = fuse(sql, {"pay", "refunds", "bounds"})
    assert fusion.separable, fusion.reason
    result = together(fusion.sql, pay, refunds)
    for window in range(WINDOWS):
        expected = alone(sql, pay, refunds, window)
        got = result.filter(pl.col(WINDOW_KEY) == window).drop(WINDOW_KEY).select(expected.columns)
        if fusion.empty_window_row and got.height == 0:
            assert expected.height == 1  # a global aggregate over no rows: the caller runs it alone
            continue
        if " ORDER BY " in sql:  # the order within the window is kept, too
            assert got.rows() == expected.rows(), (fusion.sql, window)
        assert rows(got) == rows(expected), (fusion.sql, window)
    if " ORDER BY " in sql:  # and each window's rows come together, ready to be sliced off
        assert result[WINDOW_KEY].is_sorted()


def test_only_global_aggregates_are_flagged_as_giving_a_row_for_an_empty_window():
    """Issue 12 item 1: without GROUP BY an aggregate gives one row even for an empty window."""
    flagged = {sql for sql in ACCEPTED if fuse(sql, {"pay", "refunds", "bounds"}).empty_window_row}
    assert flagged == {"SELECT COUNT(*) AS n, SUM(amount) AS total FROM pay"}


@pytest.mark.parametrize(("sql", "words"), REFUSED)
def test_shapes_that_are_not_separable_are_refused_with_a_reason(sql, words):
    """Issue 12 item 1: each of these would mix windows (or cannot be told), so windows run alone."""
    fusion = fuse(sql, {"pay", "refunds", "bounds"})
    assert not fusion.separable and fusion.sql is None
    assert words in fusion.reason


def test_the_module_imports_nothing_of_weir_and_no_effects():
    """sqlfusion is part of the functional core: sqlglot and the standard library only."""
    import ast
    from pathlib import Path

    import runner.core.sqlfusion as module

    tree = ast.parse(Path(module.__file__).read_text())
    imported = {a.name.split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    imported |= {n.module.split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.module}
    assert imported <= {"__future__", "collections", "dataclasses", "sqlglot"}, imported

"""The job files that broke weir in outside testing (hardening issue 9, item 8), rebuilt.

Outside testing left 37 job files (13 distinct) that made `weir check` or a
command after it end in exit 70, run out of time or memory, or pass check and
then misbehave. The four small ones are kept verbatim in tests/data/; the
large ones are rebuilt here byte for byte from their shape (each generator's
output had the same MD5 as the original file when it was written, noted
beside it), so the suite carries the cases without 700 KB of brackets.
"""

from __future__ import annotations

from pathlib import Path

DATA = Path(__file__).resolve().parent / "data"

DAILY_FROM_JOB = """\
window: {every: 1d, start: 2026-01-01, end: 2026-01-02, timezone: UTC}
inputs:
  hourly: {job: pay_hourly}
steps:
  - sql: SELECT merchant, SUM(n) AS n, SUM(total) AS total FROM hourly GROUP BY merchant
output:
  database: sqlite:///state/wh.sqlite
  table: daily
  checks:
    - key: [merchant]
"""

HOURLY_FROM_FILES = """\
window: {every: 1h, start: 2026-01-01T00:00, end: 2026-01-02, timezone: UTC}
inputs:
  pay:
    files: landing/pay/{start:%Y-%m-%d}/{start:%H}.csv
    time_column: at
    schema:
      pay_id: {type: str, nullable: false}
      at: datetime(UTC)
      merchant: str
      amount: {type: "decimal(10,2)", min: 0}
steps:
  - sql: SELECT merchant, COUNT(*) AS n, SUM(amount) AS total FROM pay GROUP BY merchant
output:
  path: state/out/hourly/{start:%Y-%m-%d}/{start:%H}.parquet
  checks:
    - key: [merchant]
"""

BALANCE_WITH_LAG = """\
window: {every: 1d, start: 2026-01-01, end: 2026-01-02, timezone: UTC}
inputs:
  hourly: {job: pay_hourly}
  before: {job: balance, lag: 1, schema: {merchant: str, n: int, total: "decimal(38,2)"}}
steps:
  - sql: |
      SELECT merchant, SUM(n) AS n, SUM(total) AS total FROM (
        SELECT merchant, n, total FROM before
        UNION ALL
        SELECT merchant, n, total FROM hourly) AS u
      GROUP BY merchant
output:
  path: state/out/balance/{start:%Y-%m-%d}.csv
"""

PAYMENTS_TO_TABLE = """\
window: {every: 1h, start: 2026-01-01T00:00, end: 2026-01-02, timezone: UTC}
inputs:
  pay:
    files: landing/pay/{start:%Y-%m-%d}/{start:%H}.csv
    schema:
      pay_id: str
      at: datetime(UTC)
      merchant: str
      amount: "decimal(10,2)"
steps:
  - sql: SELECT pay_id, merchant, amount FROM pay
output:
  database: sqlite:///state/wh.sqlite
  table: payments
"""

SORTED_TAIL = """\
    schema:
      amount: decimal(10,2)
      at: datetime(UTC)
      merchant: str
      pay_id: str
output:
  database: sqlite:///state/wh.sqlite
  table: payments
steps:
- sql: SELECT pay_id, merchant, amount FROM pay
window:
  end: 2026-01-02
  every: 1h
  start: 2026-01-01T00:00
  timezone: UTC
"""


def _deep_window(base: str, levels: int) -> str:
    """A valid job, then `window:` given again as `levels` nested flow lists."""
    return base + "\nwindow: " + "[" * levels + "]" * levels + "\n"


def _many_keys() -> str:
    """A valid job and then top-level keys k0, k1, ... cut off at 200,000 bytes."""
    text = HOURLY_FROM_FILES + "\n" + "".join(f"k{i}: {i}\n" for i in range(20_000))
    return text[:200_000]


def _many_steps() -> str:
    """3,000 named SQL steps, each `SELECT * FROM pay`, keys in sorted order."""
    head = (
        "inputs:\n  pay:\n    files: landing/pay/{start:%Y-%m-%d}/{start:%H}.csv\n"
        "    schema:\n      amount:\n        min: 0\n        type: decimal(10,2)\n"
        "      at: datetime(UTC)\n      merchant: str\n      pay_id:\n        nullable: false\n"
        "        type: str\n    time_column: at\n"
        "output:\n  checks:\n  - key:\n    - merchant\n"
        "  path: state/out/hourly/{start:%Y-%m-%d}/{start:%H}.parquet\nsteps:\n"
    )
    steps = "".join(f"- name: s{i}\n  sql: SELECT * FROM pay\n" for i in range(3000))
    return head + steps + SORTED_TAIL[SORTED_TAIL.index("window:"):]


def _deep_block() -> str:
    """Block mappings k0: k1: k2: ... each indented two more, cut off at 200,000 bytes."""
    return "".join(" " * (2 * i) + f"k{i}:\n" for i in range(1000))[:200_000]


def _long_file_name() -> str:
    """A file input whose path is one name of 100,000 characters."""
    return "inputs:\n  pay:\n    files: " + "x" * 100_000 + "\n" + SORTED_TAIL


def cases() -> dict[str, tuple[str, list[str]]]:
    """name -> (job file text, the outside testers' file names with that content)."""
    return {
        "laughs": ((DATA / "repro_laughs.yaml").read_text(),  # md5 ff5147b79f5ee54c32947d90c45238b7
                   ["case1_0", "case2_0", "case2_250", "case3_0", "case4_0"]),
        "laughs_in_key": ((DATA / "repro_laughs_in_key.yaml").read_text(),  # 1761251f569b726e3ca2ffcfad00bcc7
                          ["case2_25", "case2_275", "case3_25", "case4_25"]),
        "surrogate": ((DATA / "repro_surrogate.yaml").read_text(),  # d90d3bcfc62484f991041fa4ae4b2a8b
                      ["case2_142"]),
        "outside_file": ((DATA / "repro_etc_passwd.yaml").read_text(),  # 57635a132b9733542603a4512026910f
                         ["case3_21"]),
        "deep_daily": (_deep_window(DAILY_FROM_JOB, 5000),  # af4582de668694121578866804dd10bc
                       ["case3_13", "case4_120", "case4_193", "case4_91"]),
        "deep_hourly": (_deep_window(HOURLY_FROM_FILES, 5000),  # bad0ae167e3a986f0b43234fb6dc0a40
                        ["case3_2", "case3_6", "case4_11", "case4_114", "case4_24"]),
        "deep_balance": (_deep_window(BALANCE_WITH_LAG, 5000),  # 9dae421b3f021dc0ebc28c13b0778956
                         ["case4_149", "case4_29", "case4_30", "case4_48", "case4_97"]),
        "deep_payments": (_deep_window(PAYMENTS_TO_TABLE, 5000),  # f16a55599764f8ef1bbf6550fd6948d7
                          ["case4_185", "case4_35", "case4_64"]),
        "deep_flow": ("window: " + "[" * 20000 + "]" * 20000 + "\n",  # c37f7de2297c08e264125e03a9ee90c0
                      ["case2_300", "case2_50", "case4_50"]),
        "deep_block": (_deep_block(), ["case4_75"]),  # 353583d1b4886802c653b19488b925a8
        "many_keys": (_many_keys(), ["case2_175", "case2_425", "case4_175"]),  # b078d54ca8df17a983bfee3e4c719e3f
        "many_steps": (_many_steps(), ["case2_225", "case2_475"]),  # 5f9baaa38031f96302fcec724f4305ce
        "long_file_name": (_long_file_name(), ["case2_236"]),  # b75e758bc726ff5a59a4b2906e2f0206
    }

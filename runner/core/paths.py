"""Path templates: `{start:%Y-%m-%d}` and `{end:...}` rendered for a window; the places weir keeps.

Templates are formatted with Python's `str.format`, `start` and `end` being
the window's bounds as aware datetimes in the job's timezone. Pure functions:
whether a path stays inside the workspace once symbolic links are followed is
asked of the disk by `runner.io.files.escapes`.
"""

from __future__ import annotations

import os
import re
import string
from datetime import timedelta
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from pathlib import Path

    import polars as pl

    from runner.core.windows import Window, WindowSpan

# What weir itself keeps in a workspace (relative paths): no output may be written there.
LEDGER = "state/ledger.sqlite"  # the default ledger
LOGS = "state/logs"  # failed windows' logs
TICK_GATE = "state/tick-gate.json"  # the idle tick's gate
REPORT = "state/report.html"  # weir report's default page
INPUT_CHECKS = "state/input-checks.sqlite"  # large CSV inputs found well-formed, by identity
OWNED = {
    LEDGER: "the ledger", f"{LEDGER}-wal": "the ledger's write-ahead log", f"{LEDGER}-shm": "the ledger's shared memory",
    f"{LEDGER}-journal": "the ledger's journal", TICK_GATE: "the idle tick's gate", REPORT: "the report",
    INPUT_CHECKS: "the record of checked input files", f"{INPUT_CHECKS}-wal": "that record's write-ahead log",
    f"{INPUT_CHECKS}-shm": "that record's shared memory", f"{INPUT_CHECKS}-journal": "that record's journal",
    "state/README.md": "the state folder's README", "state/.gitignore": "the state folder's .gitignore",
}
PLACEHOLDER = re.compile(r"\{[^{}]*\}")  # one {start:...} or {end:...} field of a path template

OWNED_FOLDERS = {LOGS: "the logs", "jobs": "the job files"}

_STEP_CODES = [  # finest strftime code in a template -> the step that changes it
    (re.compile(r"%[SsfT]"), timedelta(seconds=1)),
    (re.compile(r"%[MRc]"), timedelta(minutes=1)),
    (re.compile(r"%[HIpkl]"), timedelta(hours=1)),
    (re.compile(r"%[dejaAuwxDF]"), timedelta(days=1)),
    (re.compile(r"%[UWVG]"), timedelta(days=7)),
    (re.compile(r"%[mbBh]"), timedelta(days=28)),
]


def render(template: str, window: Window) -> str:
    """The template for one window, with its bounds in the job's local time."""
    return template.format(start=window.local_start, end=window.local_end)


_SAFE_CODES = re.compile(r"^(?:[^%]|%[YmdHMSjyz%])*$")
# C99/POSIX strftime shorthands, spelled out with safe codes (the standard defines them so)
_SHORTHANDS = {"%F": "%Y-%m-%d", "%T": "%H:%M:%S", "%R": "%H:%M", "%D": "%m/%d/%y"}
_CODE = re.compile(r"%.")  # one strftime code, `%%` included (read left to right)


def render_many(template: str, starts_us: Any, ends_us: Any, tz: str, once: bool = False) -> Any | None:
    """Renderings of a template for many windows at once (a polars Series), or None.

    None when the vectorized form might differ from `render` (strftime codes
    outside a small safe set) or, unless `once` (an output: one file per
    window), when one window may need several renderings (`expand`: a
    `{start}`-only template whose finest code steps faster than the windows are long).
    """
    import polars as pl

    parsed = [(literal, f, _CODE.sub(lambda m: _SHORTHANDS.get(m[0], m[0]), spec) if spec else spec, c)
              for literal, f, spec, c in string.Formatter().parse(template)]
    fields = [(f, spec or "") for _, f, spec, _ in parsed if f is not None]
    if any(f.split(".")[0] not in ("start", "end") or not _SAFE_CODES.match(spec) or not spec
           for f, spec in fields):
        return None
    if not once and not uses_end(template):
        step = _finest_step(template)
        longest = int((ends_us - starts_us).max() or 0) if len(starts_us) else 0
        if step is not None and longest > step.total_seconds() * 1_000_000:
            return None
    local = {
        "start": pl.from_epoch(starts_us, time_unit="us").dt.replace_time_zone("UTC").dt.convert_time_zone(tz),
        "end": pl.from_epoch(ends_us, time_unit="us").dt.replace_time_zone("UTC").dt.convert_time_zone(tz),
    }
    frame = pl.DataFrame(local)
    if not fields:  # a fixed path (a lookup file): the same text for every window
        return pl.Series("pattern", [render_fixed(template)] * frame.height, dtype=pl.String)
    parts = []
    for literal, f, spec, _ in parsed:
        if literal:
            parts.append(pl.lit(literal.replace("{{", "{").replace("}}", "}")))
        if f is not None:
            assert spec, "a placeholder without a format is refused when the job file is read"
            parts.append(pl.col(f).dt.strftime(spec))
    return frame.select(pl.concat_str(parts).alias("pattern")).to_series()


def render_fixed(template: str) -> str:
    """A template without placeholders as the path it names (`{{` and `}}` unescaped)."""
    return template.format()


def uses_end(template: str) -> bool:
    return any(f and f.split(".")[0] == "end" for _, f, _, _ in string.Formatter().parse(template))


def expand(template: str, window: Window, limit: int = 10_000) -> list[str]:
    """Every distinct rendering of a `{start:...}`-only template over the window.

    A daily job reading hourly folders (`{start:%Y-%m-%d/%H}`) gets all of the
    day's hours: the template is rendered at each step of its finest time
    code between the window's start and end. Templates using `{end}` render once.
    """
    first = render(template, window)
    if uses_end(template) or "{" not in template:
        return [first]
    step = _finest_step(template)
    if step is None or window.length <= step:
        return [first]
    out = [first]
    seen = {first}
    t = window.start + step
    # Steps are in absolute time; calendar codes are probed a little more often
    # than they change so that no day or month is skipped across DST changes.
    probe = step if step < timedelta(days=1) else timedelta(hours=1)
    t = window.start + probe
    while t < window.end and len(out) < limit:
        local = t.astimezone(window.tz)
        text = template.format(start=local, end=window.local_end)
        if text not in seen:
            seen.add(text)
            out.append(text)
        t += probe
    return out


def _finest_step(template: str) -> timedelta | None:
    specs = " ".join(spec or "" for _, f, spec, _ in string.Formatter().parse(template) if f)
    for pattern, step in _STEP_CODES:
        if pattern.search(specs):
            return step
    if re.search(r"%[yYCg]", specs):
        return timedelta(days=365)
    return None


def output_paths(template: str, span: WindowSpan, most: int = 20_000) -> tuple[WindowSpan, pl.Series]:
    """The normalized relative path each window of `span` writes (one rendering per window).

    Vectorized where `render_many` can be; otherwise rendered one by one for
    the latest `most` windows only, which the returned span then holds.
    """
    import polars as pl

    from runner.core.windows import WindowSpan

    rendered = render_many(template, span.starts_us, span.ends_us, span.tz.key, once=True)
    if rendered is None:
        if len(span) > most:
            span = WindowSpan(span.starts_us.tail(most), span.ends_us.tail(most), span.tz)
        rendered = pl.Series("path", [render(template, w) for w in span], dtype=pl.String)
    return span, (normalize_many(rendered) if _may_need_normalizing(template) else rendered.alias("path"))


_FIELD_MARKS = re.compile(r"\{(?:start|end)[^:{}]*:?|\}")
_UNNORMAL = re.compile(r"//|(?:^|/)\.\.?(?:/|$)|/$")


def _may_need_normalizing(template: str) -> bool:
    """Whether a rendering could hold `//`, a `.` or `..` part, or a trailing slash: strftime codes
    render none of them, so only the template's own text can."""
    return bool(_UNNORMAL.search(_FIELD_MARKS.sub("", template)))


def normalize_many(paths: pl.Series) -> pl.Series:
    """`os.path.normpath` of many relative POSIX paths: vectorized for the usual cases (repeated
    slashes, `.` parts), one by one for the rare path with a `..` part or a trailing slash."""
    import polars as pl

    cleaned = paths.str.replace_all(r"/+", "/").str.replace_all(r"(^|/)(?:\./)+", "${1}")
    unusual = cleaned.str.contains(r"(?:^|/)\.\.(?:/|$)|/\.?$|^\.$")
    if unusual.any():
        cleaned = pl.select(pl.when(pl.lit(unusual))
                            .then(cleaned.map_elements(os.path.normpath, return_dtype=pl.String))
                            .otherwise(pl.lit(cleaned))).to_series()
    return cleaned.alias("path")


def owner_of(relative: str) -> str | None:
    """What weir keeps at a normalized relative path (see OWNED, OWNED_FOLDERS), or None."""
    if relative in OWNED:
        return OWNED[relative]
    for folder, what in OWNED_FOLDERS.items():
        if relative == folder or relative.startswith(folder + "/"):
            return what
    return None


def database_url(root: str | Path, url: str) -> str:
    """`url` with a relative SQLite database path made relative to the workspace `root`, not the
    current folder (SQLAlchemy's URL parser reads it; other URLs come back as they were)."""
    import sqlalchemy as sa

    try:
        parsed = sa.engine.make_url(url)
    except sa.exc.ArgumentError:
        return url
    db = parsed.database
    if parsed.get_backend_name() != "sqlite" or not db or db == ":memory:":
        return url
    scheme = "file:" if db.startswith("file:") else ""
    path = db[len(scheme):]
    if os.path.isabs(path) or path.startswith(":memory:") or "mode=memory" in str(parsed.query):
        return url
    return parsed.set(database=scheme + os.path.join(str(root), path)).render_as_string(hide_password=False)


def database_file(root: str | Path, url: str) -> str | None:
    """The normalized absolute path of a SQLite database file named by `url`, or None (not SQLite,
    in memory, or unparsable)."""
    import sqlalchemy as sa

    try:
        parsed = sa.engine.make_url(database_url(root, url))
    except sa.exc.ArgumentError:
        return None
    db = parsed.database
    if parsed.get_backend_name() != "sqlite" or not db or db == ":memory:" or "mode=memory" in str(parsed.query):
        return None
    return os.path.normpath(db.removeprefix("file:").split("?", 1)[0])

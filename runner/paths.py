"""Path templates: `{start:%Y-%m-%d}` and `{end:...}` rendered for a window.

Templates are formatted with Python's `str.format`, `start` and `end` being
the window's bounds as aware datetimes in the job's timezone. Pure functions.
"""

from __future__ import annotations

import os
import re
import string
from datetime import timedelta
from itertools import islice
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from runner.windows import Window, WindowSpan

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


def render_many(template: str, starts_us: Any, ends_us: Any, tz: str) -> Any | None:
    """Renderings of a template for many windows at once (a polars Series), or None.

    None when the vectorized form might differ from `render` (strftime codes
    outside a small safe set) or when one window may need several renderings
    (`expand`: a `{start}`-only template whose finest code steps faster than
    the windows are long).
    """
    import polars as pl

    parsed = list(string.Formatter().parse(template))
    fields = [(f, spec or "") for _, f, spec, _ in parsed if f is not None]
    if any(f.split(".")[0] not in ("start", "end") or not _SAFE_CODES.match(spec) or not spec
           for f, spec in fields):
        return None
    if not uses_end(template):
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


def escapes(root: str | os.PathLike[str], relative: str) -> bool:
    """True when `relative`, resolved under `root` (symbolic links followed), would land outside it.

    Resolved afresh on every call (nothing remembered): a folder may be swapped
    for a link between two writes. Writers check again at open time
    (`sinks.open_folder`).
    """
    if os.path.isabs(relative):
        return True
    base = os.path.realpath(root)
    folder, name = os.path.split(os.path.normpath(os.path.join(base, relative)))
    target = os.path.join(os.path.realpath(folder), name)
    if os.path.islink(target):
        target = os.path.realpath(target)
    return os.path.commonpath([base, target]) != base


def first_collision(template: str, span: WindowSpan, limit: int = 20_000) -> tuple[Window, Window, str] | None:
    """Two windows of `span` (the first `limit`) that render to the same path, if any."""
    seen: dict[str, Window] = {}
    for w in islice(span, limit):
        path = render(template, w)
        if path in seen:
            return seen[path], w, path
        seen[path] = w
    return None

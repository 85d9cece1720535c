"""Path templates as job files write them: which placeholders they may use, and what a file name says.

A template may only use `{start:FORMAT}` and `{end:FORMAT}` with a strftime
format, and every path it renders must be one Linux can open (NAME_MAX,
PATH_MAX). Rendering for a window is `runner.core.paths`.
"""

from __future__ import annotations

from datetime import datetime

_TEMPLATE_FIELDS = {"start", "end"}


NAME_MAX = 255
"""Longest file or folder name in bytes (POSIX NAME_MAX on Linux and common file systems)."""


PATH_MAX = 4096
"""Longest path in bytes that Linux opens (PATH_MAX)."""


SAMPLE_TIME = datetime(2026, 12, 31, 23, 59, 59)  # a sample instant: two-digit fields at their widest


def check_template(template: str) -> None:
    """Raise ValueError unless `template` only uses {start:...} and {end:...} and can name a file."""
    import string

    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise ValueError(f"bad path template {short(template)!r}: {exc}") from None
    for _, field_name, spec, conversion in parsed:
        if field_name is None:
            continue
        if field_name not in _TEMPLATE_FIELDS:
            raise ValueError(
                f"unknown placeholder {{{short(field_name)}}} in {short(template)!r}: "
                "use {start:%Y-%m-%d} or {end:...}"
            )
        if conversion or (spec and "%" not in spec):
            raise ValueError(f"placeholder {{{field_name}:{short(spec or '')}}} needs a strftime format "
                             "like %Y-%m-%d")
    sample = template.format(start=SAMPLE_TIME, end=SAMPLE_TIME)
    for name in sample.split("/"):
        if len(name.encode("utf-8", "surrogatepass")) > NAME_MAX:
            raise ValueError(f"a file or folder name of {len(name.encode('utf-8', 'surrogatepass')):,} bytes "
                             f"({short(name)!r}) cannot exist: names are at most {NAME_MAX} bytes")
    if len(sample.encode("utf-8", "surrogatepass")) > PATH_MAX:
        raise ValueError(f"a path of {len(sample.encode('utf-8', 'surrogatepass')):,} bytes cannot be opened: "
                         f"paths are at most {PATH_MAX} bytes")


FORMAT_SUFFIXES = ((".parquet", "parquet"), (".pq", "parquet"), (".ndjson", "ndjson"), (".jsonl", "ndjson"),
                   (".json", "ndjson"), (".csv", "csv"), (".csv.gz", "csv"))


def format_from_name(path: str) -> str | None:
    """The input format a file name implies (csv, parquet, ndjson), or None."""
    lower = path.lower()
    for suffix, fmt in FORMAT_SUFFIXES:
        if lower.endswith(suffix):
            return fmt
    return None


def short(text: str, limit: int = 60) -> str:
    return text if len(text) <= limit else f"{text[:limit]}..."

"""The job graph: which job reads which, its order and reach, and which windows a window reads.

Pure functions over loaded jobs. Edges run producer -> consumer and come from
`inputs: {name: {job: PRODUCER}}`. A job reading its own earlier windows
(`lag:` or `lookback:` on itself) is a carry-forward, not a cycle.
"""

from __future__ import annotations

import heapq
from collections.abc import Mapping
from datetime import datetime
from typing import TYPE_CHECKING

from runner.core.windows import Cadence
from runner.model.spec import Job, JobInput

if TYPE_CHECKING:

    from runner.core.windows import Window, WindowSpan

Links = dict[str, set[str]]  # job -> the other jobs it reads (its direct producers)


def links(jobs: Mapping[str, Job]) -> Links:
    """Each job's direct producers among `jobs` (a job's reads of itself are no link).

    The runtime path uses these plain maps; the networkx graph is built only
    for `weir check` and drawings, so that commands which run windows do not
    pay for importing networkx.
    """
    out: Links = {name: set() for name in jobs}
    for name, job in jobs.items():
        for source in job.spec.inputs.values():
            if isinstance(source, JobInput) and source.job in jobs and source.job != name:
                out[name].add(source.job)
    return out


def order_links(producers: Links) -> list[str]:
    """Dependency order, ties broken by name (the same order as `order` on the graph).

    Raises ValueError on a cycle.
    """
    waiting = {n: len(p) for n, p in producers.items()}
    consumers: dict[str, list[str]] = {n: [] for n in producers}
    for n, ps in producers.items():
        for p in ps:
            consumers[p].append(n)
    ready = [n for n, k in waiting.items() if k == 0]
    heapq.heapify(ready)
    out = []
    while ready:
        n = heapq.heappop(ready)
        out.append(n)
        for c in consumers[n]:
            waiting[c] -= 1
            if waiting[c] == 0:
                heapq.heappush(ready, c)
    if len(out) != len(producers):
        raise ValueError("the job graph has a cycle")
    return out


def reach(producers: Links, names: list[str], forward: bool) -> set[str]:
    """`names` and every job they feed (forward) or that feeds them (backward), transitively."""
    nxt: dict[str, set[str]] = {n: set() for n in producers}
    if forward:
        for n, ps in producers.items():
            for p in ps:
                nxt[p].add(n)
    else:
        nxt = {n: set(ps) for n, ps in producers.items()}
    seen = set(names)
    todo = list(names)
    while todo:
        for m in nxt.get(todo.pop(), ()):
            if m not in seen:
                seen.add(m)
                todo.append(m)
    return seen


# ---------------------------------------------------------------- outputs


def output_span(cad: Cadence, hi: datetime) -> WindowSpan:
    """The windows of `cad` starting before `hi`: the latest MOST_WINDOWS of them (MOST_CRON_WINDOWS
    for cron cadences, whose fires are found one by one)."""
    first = cad.first()
    if cad.end is not None:
        hi = min(hi, cad.end)
    if first is None or hi <= cad.start:
        return cad.span(cad.start, cad.start)
    most = MOST_CRON_WINDOWS if cad.kind == "cron" else MOST_WINDOWS
    try:
        lo = max(cad.start, hi - first.length * most)
    except OverflowError:  # long windows: fewer than `most` of them since year 1
        lo = cad.start
    span = cad.span(lo, hi)
    if len(span) > most:
        from runner.core.windows import WindowSpan

        span = WindowSpan(span.starts_us.tail(most), span.ends_us.tail(most), span.tz)
    return span


def upstream_windows(consumer: Cadence, window: Window, producer: Cadence, source: JobInput,
                     same_job: bool) -> list[Window]:
    """The producer windows a consumer window reads through one job input.

    Plain: every producer window overlapping the consumer window. `lag: N`:
    those overlapping the consumer's N-th earlier window (none before the
    first). `lookback: D`: those overlapping `[start - D, end)`; on the job
    itself only windows strictly before this one.
    """
    if source.lag is not None:
        earlier = consumer.shift(window, source.lag)
        if earlier is None:
            return []
        lo, hi = earlier.start, earlier.end
    elif source.lookback is not None:
        lo, hi = window.start - source.lookback, window.end
        if same_job:
            hi = window.start
    else:
        lo, hi = window.start, window.end
    if hi <= lo:
        return []
    if lo < producer.start:
        lo = producer.start
    return list(producer.overlapping(lo, hi)) if hi > lo else []


MOST_WINDOWS = 50_000  # windows compared per job (the latest ones); fewer for cron cadences,


MOST_CRON_WINDOWS = 1_000  # whose fires are found one by one

"""The page: assets/page.html with its parts filled in from the collected data.

The template, the style sheet and the script are package files
(`runner/report/assets/`), read with importlib.resources; parts of the
template are marked `<!--weir:NAME-->` and replaced here by HTML made from
`ReportData`. Every text from a job file, an error or a path is escaped.
"""

from __future__ import annotations

from datetime import UTC, timedelta
from functools import cache
from importlib import resources
from typing import Any

from runner.model.timeutil import format_instant, from_us, to_us
from runner.report.data import (
    GLYPH,
    MEANING,
    ORDER,
    STATE_CODE,
    STRIP_BUCKETS,
    JobView,
    Problem,
    ReportData,
    words,
)
from runner.report.encoding import json_for_script
from runner.report.svg import (
    arcs,
    esc,
    fmt_rows,
    fmt_seconds,
    pattern_defs,
    reach_bar,
    swatch,
    ticks,
    timeline,
)

OPEN_HISTORIES = 4  # job histories shown unfolded: the first jobs with windows not done


@cache
def asset(name: str) -> str:
    """The text of a file in runner/report/assets/."""
    return resources.files("runner.report").joinpath("assets", name).read_text(encoding="utf-8")


def _n(value: int) -> str:
    return f"{value:,}"


def _plural(n: int, word: str) -> str:
    return f"{_n(n)} {word}{'' if n == 1 else 's'}"


def _local(us: int | None, view: JobView) -> str:
    from zoneinfo import ZoneInfo

    return "" if us is None else format_instant(from_us(us), ZoneInfo(view.tz))


def _state_words(v: JobView) -> str:
    """Each state the job's windows are in, worst first, as glyph, number and word."""
    if v.unplanned:
        return f'<span class="st s-failed">{GLYPH["failed"]} could not be planned</span>'
    bad = [s for s in ORDER[:-1] if v.counts.get(s)]
    parts = [f'<span class="st s-{s}">{GLYPH[s]} {_n(v.counts[s])} {s}</span>' for s in bad]
    if not bad:
        parts.append(f'<span class="st s-done">{GLYPH["done"]} all {_n(v.total)} done</span>' if v.total else
                     '<span class="st muted">nothing due yet</span>')
    if v.overdue:
        parts.insert(0, f'<span class="st s-overdue">{GLYPH["overdue"]} {_n(v.overdue)} overdue</span>')
    if v.late:
        parts.append(f'<span class="st mark">{GLYPH["late"]} {_n(v.late)} late input</span>')
    if v.dropped_rows:
        parts.append(f'<span class="st mark">{GLYPH["dropped"]} {_plural(v.dropped_rows, "row")} dropped '
                     f'in {_plural(v.dropped_windows, "window")}</span>')
    return " ".join(parts)


def _attention(v: JobView) -> bool:
    return bool(v.unplanned or v.overdue or any(v.counts.get(s) for s in ORDER[:-1]))


def _overview(data: ReportData) -> str:
    at_us = to_us(data.at)
    rows = []
    for v in data.jobs:
        if v.unplanned:
            reach = f'<span class="muted">{esc(v.unplanned)}</span>'
            behind = deadline = broken = ""
        else:
            if v.watermark_us is None:
                reach = ('<span class="st s-none">nothing complete yet</span>' if v.total else
                         '<span class="muted">no window due yet</span>')
            else:
                before = ("its last window" if v.ended and v.after == 0 else
                          f"{esc(words(timedelta(microseconds=at_us - v.watermark_us)))} before the clock")
                reach = (f'<span class="wm" data-watermark="{esc(_local(v.watermark_us, v))}">'
                         f'{esc(_local(v.watermark_us, v))}</span><div class="sub">{before}</div>')
            if not v.total:
                behind = '<span class="muted">–</span>'
            elif v.after == 0:
                behind = ("complete to its end" if v.ended else "up to date")
            else:
                gap = timedelta(microseconds=(v.last_end_us or 0) - (v.watermark_us or v.first_start_us or 0))
                behind = f'<b>{esc(words(gap))}</b><div class="sub">{_plural(v.after, "window")} after it</div>'
            if v.deadline is None:
                deadline = '<span class="muted">no deadline set</span>'
            elif v.overdue:
                deadline = (f'<span class="st s-overdue">{GLYPH["overdue"]} {_n(v.overdue)} overdue</span>'
                            f'<div class="sub">the oldest by {esc(words(timedelta(microseconds=v.overdue_by_us)))}'
                            '</div>')
            else:
                deadline = f'on time<div class="sub">done within {esc(words(v.deadline))} of each window</div>'
            if v.behind:
                broken = " ".join(f'<span class="st s-{s}">{GLYPH[s]} {_n(n)} {s}</span>'
                                  for s, n in sorted(v.behind.items(), key=lambda i: ORDER.index(i[0])))
            else:
                broken = '<span class="ok">nothing</span>' if v.watermark_us is not None else ""
        flag = ' class="attn"' if _attention(v) else ""
        rows.append(
            f'<tr{flag} data-job="{esc(v.name)}"><th scope="row"><a href="#job-{v.index}">{esc(v.name)}</a>'
            f'<div class="sub">{esc(v.cadence)}</div></th><td class="states">{_state_words(v)}</td>'
            f'<td>{reach}</td><td>{behind}</td><td>{deadline}</td><td class="broken">{broken}</td>'
            f'<td class="barcell">{reach_bar(v, data.axis, at_us) if not v.unplanned else ""}</td></tr>')
    marks = ticks(data.axis, data.zone, 100.0, room=420)  # percent of the bar column, about 420 px at 1400
    labels = "".join(f'<span class="al" style="left:{x:.3f}%">{esc(t)}</span>' for x, t in marks)
    return (
        '<table class="overview"><thead><tr><th>job</th><th>windows due, by state</th>'
        '<th>complete through<div class="sub">the watermark</div></th><th>behind</th><th>deadline</th>'
        '<th>not done behind<div class="sub">the watermark</div></th><th class="barcell">'
        'windows along time</th></tr></thead>'
        f'<tbody>{"".join(rows)}</tbody><tfoot><tr><td colspan="6"></td><td class="barcell">'
        f'<div class="axis-labels">{labels}</div></td></tr></tfoot></table>')


def _legend() -> str:
    items = [f'<li>{swatch(s)}<b>{GLYPH[s]} {s}</b> <span>{esc(MEANING[s])}</span></li>' for s in ORDER]
    items += [
        f'<li><svg class="swatch" width="26" height="14" aria-hidden="true"><path class="m-late" d="M13 1v12"/></svg>'
        f'<b>{GLYPH["late"]} late</b> <span>{esc(MEANING["late"])} (a tick above the bar)</span></li>',
        f'<li><svg class="swatch" width="26" height="14" aria-hidden="true"><path class="m-overdue" d="M13 1v12"/>'
        f'</svg><b>{GLYPH["overdue"]} overdue</b> <span>{esc(MEANING["overdue"])} (a tick below the bar)</span></li>',
        '<li><svg class="swatch" width="26" height="14" aria-hidden="true"><path class="watermark" d="M13 0v14"/>'
        '</svg><b>watermark</b> <span>every window before it holds an output</span></li>',
        '<li><svg class="swatch" width="26" height="14" aria-hidden="true"><path class="now" d="M13 0v14"/></svg>'
        "<b>clock</b> <span>the time this page is for</span></li>",
    ]
    return f'<ul class="legend" aria-label="what the glyphs and patterns mean">{"".join(items)}</ul>'


def _command(line: str) -> str:
    """A command to paste: it may wrap between its words, never inside one (a window id has hyphens)."""
    import shlex

    words_ = " ".join(f"<span>{esc(shlex.quote(w))}</span>" for w in shlex.split(line))
    return f'<code class="command">{words_}</code>'


def _problem(p: Problem, v: JobView, at_us: int) -> str:
    since = timedelta(microseconds=max(at_us - p.first_end_us, 0))
    span = p.first if p.count == 1 else f"{p.first} .. {p.last_end}"
    spans = ""
    if p.ranges > 1:
        shown = ", ".join(f"{a} .. {b} ({_n(n)})" for a, b, n in p.spans)
        more = f", and {_plural(p.ranges - len(p.spans), 'more range')}" if p.ranges > len(p.spans) else ""
        spans = f'<div class="sub">in {_n(p.ranges)} ranges: {esc(shown)}{esc(more)}</div>'
    overdue = (f' <span class="st s-overdue">{GLYPH["overdue"]} {_n(p.overdue)} overdue</span>' if p.overdue else "")
    example = f'<div class="why">{esc(p.example)}</div>' if p.example and p.state in ("failed", "waiting") else ""
    cmd = (f'<div class="cmd"><span class="lbl">run</span>{_command(p.command)}</div>' if p.command else "")
    note = f'<div class="pnote">{esc(p.note)}</div>' if p.note else ""
    explain = (f'<div class="cmd"><span class="lbl">see why</span>{_command(p.explain)}</div>' if p.explain else "")
    return (f'<li class="problem p-{p.state}" data-job="{esc(p.job)}" data-state="{p.state}" '
            f'data-kind="{esc(p.kind)}" data-count="{p.count}" data-first="{esc(p.first)}" '
            f'data-last-end="{esc(p.last_end)}" data-ranges="{p.ranges}">'
            f'<div class="ph">{swatch(p.state)}<span class="glyph">{GLYPH[p.state]}</span> <b>{p.state}</b> '
            f'<a href="#job-{v.index}">{esc(p.job)}</a>: <span class="kind">{esc(p.kind)}</span>{overdue}</div>'
            f'<div class="pw"><b>{_plural(p.count, "window")}</b>, <code>{esc(span)}</code> · since the first '
            f'ended {esc(words(since))} ago</div>{spans}{example}{cmd}{note}{explain}</li>')


def _problems(data: ReportData) -> str:
    at_us = to_us(data.at)
    found = [(p, v) for v in data.jobs for p in v.problems]
    # the most urgent first; within a state, the causes before the problems that follow from them
    found.sort(key=lambda pv: (not pv[0].overdue, ORDER.index(pv[0].state), pv[0].command is None,
                               pv[0].first_end_us))
    unplanned = [v for v in data.jobs if v.unplanned]
    out = []
    if unplanned:
        items = "".join(f'<li class="problem p-failed" data-job="{esc(v.name)}" data-state="unplanned">'
                        f'<div class="ph"><span class="glyph">{GLYPH["failed"]}</span> <b>not planned</b> '
                        f'{esc(v.name)}</div><div class="why">{esc(v.unplanned)}</div>'
                        '<div class="cmd"><span class="lbl">see why</span><code class="command">weir plan</code>'
                        '</div></li>' for v in unplanned)
        out.append(f'<ol class="problems">{items}</ol>')
    if not found:
        if not unplanned:
            out.append(f'<p class="ok">{GLYPH["done"]} Nothing is wrong: every due window is done.</p>')
        return "".join(out)
    by_name = {v.name: v for v in data.jobs}
    out.append('<p class="note">One entry per job and kind of problem, the most urgent first; each names the '
               'windows, since when, and the command to paste. <code>weir backfill</code> skips windows in its '
               'range that are already current.</p>')
    out.append(f'<ol class="problems">{"".join(_problem(p, by_name[p.job], at_us) for p, _ in found)}</ol>')
    return "".join(out)


def _stats(v: JobView) -> str:
    s, r = v.chart.get("seconds", {}), v.chart.get("rows", {})
    parts = []
    if s.get("n"):
        parts.append(f'duration of the last runs: median {esc(fmt_seconds(s["median"]))}, 90% under '
                     f'{esc(fmt_seconds(s["p90"]))}, longest {esc(fmt_seconds(s["max"]))} '
                     f'(<code>{esc(s["max_window"])}</code>)')
    if r.get("n"):
        parts.append(f'rows written: median {esc(fmt_rows(r["median"]))}, most {esc(fmt_rows(r["max"]))}')
    if v.last_success:
        parts.append(f"newest success finished {esc(v.last_success[:16].replace('T', ' '))} UTC")
    if v.dropped_rows:
        parts.append(f'{GLYPH["dropped"]} {_plural(v.dropped_rows, "row")} outside their window dropped, '
                     f'in {_plural(v.dropped_windows, "window")}')
    return "<br>".join(parts) or '<span class="muted">no finished runs yet</span>'


def _history(data: ReportData) -> str:
    at_us = to_us(data.at)
    out = []
    unfolded = 0
    for v in data.jobs:
        opened = _attention(v) and not v.unplanned and unfolded < OPEN_HISTORIES
        unfolded += opened
        desc = f'<p class="desc">{esc(v.description)}</p>' if v.description else ""
        deadline = f" · deadline {esc(words(v.deadline))} after each window" if v.deadline else ""
        unlisted = (f'<p class="muted">The {_n(v.unlisted)} oldest windows are drawn but their runs are not '
                    'listed here (weir history lists them).</p>' if v.unlisted else "")
        body = ("" if v.unplanned else
                f'{timeline(v, data.axis, data.zone, at_us)}<p class="stats">{_stats(v)}</p>{unlisted}'
                f'<div class="wlist" id="wl-{v.index}"><p class="muted">Click the drawing to list the windows '
                'around that time with their last runs.</p></div>')
        out.append(f'<details class="job" id="job-{v.index}" data-job="{esc(v.name)}"{" open" if opened else ""}>'
                   f'<summary><b>{esc(v.name)}</b> {_state_words(v)}</summary>{desc}'
                   f'<p class="meta">{esc(v.cadence)} · output <code>{esc(v.output)}</code>{deadline}</p>'
                   f'{body}</details>')
    return "".join(out)


def _graph(data: ReportData) -> str:
    if not data.jobs:
        return '<p class="muted">No jobs.</p>'
    svg, _ = arcs(data.jobs)
    rows = []
    for i, v in enumerate(data.jobs):
        worst = next((s for s in ORDER if v.counts.get(s)), "done")
        state = f'<span class="glyph" title="{esc(worst)}">{GLYPH[worst]}</span>'
        reads = [f"{esc(p)} <span class=\"muted\">as {esc(n)}</span>" for n, p, how in v.reads if p != v.name]
        own = [f"↻ its own earlier windows ({esc(how)})" for _, p, how in v.reads if p == v.name]
        parts = []
        if reads or own:
            parts.append("reads " + ", ".join(reads + own))
        if v.readers:
            parts.append("read by " + ", ".join(esc(r) for r in v.readers))
        rows.append(f'<li data-row="{i}" style="height:26px">{state} <a href="#job-{v.index}">{esc(v.name)}</a> '
                    f'<span class="rel">{" · ".join(parts) or "reads no other job"}</span></li>')
    return f'<div class="deps">{svg}<ol class="deprows">{"".join(rows)}</ol></div>'


def _verdict(data: ReportData) -> str:
    jobs = data.jobs
    if not jobs:
        return "This workspace has no jobs."
    needing = [v for v in jobs if _attention(v)]
    if not needing:
        return (f'<span class="st s-done">{GLYPH["done"]}</span> All {_plural(len(jobs), "job")} are complete: '
                f'every one of their {_n(sum(v.total for v in jobs))} due windows is done.')
    named = ", ".join(f'<a href="#job-{v.index}">{esc(v.name)}</a>' for v in needing[:6])
    more = f" and {_n(len(needing) - 6)} more" if len(needing) > 6 else ""
    ok = len(jobs) - len(needing)
    return (f'<span class="st s-failed">{GLYPH["overdue"] if any(v.overdue for v in jobs) else "!"}</span> '
            f'{_n(ok)} of {_plural(len(jobs), "job")} complete; {_n(len(needing))} need attention: {named}{more}.')


def render(data: ReportData) -> str:
    """The page, one self-contained HTML file."""
    at_utc = data.at.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")
    nxt = (f"the plan next changes at {esc(format_instant(data.next_change, data.zone))} "
           f"(in {esc(words(data.next_change - data.at))})" if data.next_change is not None else
           "no job has windows left to come due")
    when = (f"as of <b>{esc(format_instant(data.at, data.zone))}</b> ({esc(at_utc)}) · {nxt} · the input files of "
            "every due window were looked at for this page")
    a0, a1 = data.axis
    payload: dict[str, Any] = {
        "at": int(data.at.timestamp()), "a0": a0 // 1_000_000, "a1": a1 // 1_000_000, "buckets": STRIP_BUCKETS,
        "codes": {c: s for s, c in STATE_CODE.items()}, "glyph": GLYPH, "strings": data.strings,
        "jobs": [{"name": v.name, "tz": v.tz, "w": v.windows} for v in data.jobs],
    }
    reach_note = (f"{esc(data.zone_note)}. The watermark is how far a job's windows reach without a gap: every "
                  "window before it holds an output. Each bar runs along one shared time axis, from the first "
                  "due window to the clock; ticks mark late input above and overdue windows below.")
    history_note = ("Each job along the same time axis: its windows, then how long each window's last run took "
                    "and how many rows it wrote, on log scales (the band holds the middle 80% of the runs, the "
                    "line is the median, the short strokes the highest), so one slow first run does not flatten "
                    "the rest.")
    parts = {
        "title": esc(f"weir: {data.title} at {at_utc}"), "css": asset("report.css"), "js": asset("report.js"),
        "patterns": pattern_defs(), "workspace": esc(data.title), "when": when, "verdict": _verdict(data),
        "reach-note": reach_note, "overview": _overview(data), "legend": _legend(), "problems": _problems(data),
        "history-note": history_note, "history": _history(data), "graph": _graph(data),
        "data": json_for_script(payload),
    }
    page = asset("page.html")
    for key, value in parts.items():
        marker = f"<!--weir:{key}-->"
        if marker not in page:
            raise KeyError(f"page.html has no {marker}")
        page = page.replace(marker, value, 1)
    return page

"""Screenshots of the morning page for docs/report.md, made from the demo workspace.

Run by hand (not collected by pytest):

    python tests/bench/shoot_report.py [--out docs/images] [--keep DIR]

It copies the repository's jobs/ into a temporary workspace, runs `weir demo`
there, then makes a morning worth looking at, as an operator might meet it:

1. the README's one-line change (rides_daily rounds its revenue), so
   rides_daily is stale by code and the jobs reading it stale pending it;
2. a dock-change file of 30 March cut off mid-line after it was processed,
   then `weir backfill dock_fleet`: that window fails on the broken file.

Then `weir report`, and headless Chromium (the suite's DevTools client) at
1400 px wide takes the first screen, the problems, one job's history and the
dependency drawing, as PNG files in --out.
"""

from __future__ import annotations

import argparse
import base64
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent.parent
sys.path.insert(0, str(HERE.parent))  # the tests folder: the DevTools client

WIDTH = 1400


def weir(ws: Path, *args: str, ok: tuple[int, ...] = (0,)) -> str:
    done = subprocess.run([sys.executable, "-m", "runner", *args], cwd=ws, capture_output=True, text=True,
                          timeout=600)
    if done.returncode not in ok:
        raise SystemExit(f"weir {' '.join(args)} exited {done.returncode}:\n{done.stdout}\n{done.stderr}")
    return done.stdout


def arrange(ws: Path) -> None:
    shutil.copytree(REPO / "jobs", ws / "jobs")
    weir(ws, "demo")
    daily = ws / "jobs" / "rides_daily.yaml"
    text = daily.read_text()
    if "SUM(revenue) AS revenue" not in text:
        raise SystemExit("jobs/rides_daily.yaml no longer has the line the README changes")
    daily.write_text(text.replace("SUM(revenue) AS revenue", "ROUND(SUM(revenue), 0) AS revenue", 1))
    docks = ws / "state" / "landing" / "docks" / "2026-03-30.ndjson"
    docks.write_text(docks.read_text() + '{"dock": "D-017", "change": \n')
    weir(ws, "backfill", "dock_fleet", "--from", "2026-03-30", "--to", "2026-03-31", ok=(0, 1))


def shoot(page: Path, out: Path) -> list[Path]:
    from helpers_browser import Browser, clipped_labels

    shots = []
    with tempfile.TemporaryDirectory() as profile:
        b = Browser(Path(profile) / "profile", width=WIDTH, height=900)
        try:
            b.open(page)
            errors = b.errors()
            if errors:
                raise SystemExit(f"the page logged errors: {errors}")
            cut = clipped_labels(b)
            if cut:
                raise SystemExit(f"the page cuts labels: {cut}")
            b.open(page)  # as it first opens (the check unfolded every job)

            def clip(selector: str, name: str, pad: int = 8) -> None:
                box = b.evaluate(f"(function(){{var e=document.querySelector({selector!r});"
                                 "e.scrollIntoView(); var r=e.getBoundingClientRect();"
                                 "return [r.left+window.scrollX, r.top+window.scrollY, r.width, r.height];})()")
                _, y, _, h = box
                # the page's whole width: capturing beyond the viewport drops the scroll bar and widens the
                # layout a little after the box was measured
                shot = b.call("Page.captureScreenshot", format="png", captureBeyondViewport=True,
                              clip={"x": 0, "y": max(y - pad, 0), "width": WIDTH, "height": h + 2 * pad, "scale": 1})
                path = out / name
                path.write_bytes(base64.b64decode(shot["data"]))
                shots.append(path)

            b.evaluate("window.scrollTo(0, 0)")
            first = b.call("Page.captureScreenshot", format="png")
            (out / "report-first-screen.png").write_bytes(base64.b64decode(first["data"]))
            shots.append(out / "report-first-screen.png")
            clip("#problems", "report-problems.png")
            b.evaluate("weirReport.listAt('dock_fleet', '2026-03-30T12:00+01:00')")
            clip('details[data-job="dock_fleet"]', "report-history.png")
            clip("#depends", "report-depends.png")
        finally:
            b.close()
    return shots


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=REPO / "docs" / "images")
    ap.add_argument("--keep", type=Path, help="make the workspace here (an empty or new folder) and keep it")
    args = ap.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    tmp = None
    if args.keep is None:
        tmp = tempfile.TemporaryDirectory(prefix="weir-shots-")
        ws = Path(tmp.name) / "bike-share"
    else:
        ws = args.keep
    ws.mkdir(parents=True, exist_ok=True)
    try:
        arrange(ws)
        print(weir(ws, "report").strip())
        for path in shoot(ws / "state" / "report.html", args.out):
            print(f"wrote {path}")
    finally:
        if tmp is not None:
            tmp.cleanup()


if __name__ == "__main__":
    main()

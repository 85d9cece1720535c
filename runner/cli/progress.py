"""Progress while windows run: a bar on a terminal, one line per window otherwise."""

from __future__ import annotations

from typing import Any

import click

from runner.cli.render import outcome_line
from runner.core.states import Status


class Progress:
    """A rich progress bar on a terminal; one plain line per window otherwise."""

    def __init__(self, tty: bool, quiet: bool = False):
        self.tty, self.quiet = tty, quiet
        self.counts = {Status.DONE: 0, Status.FAILED: 0, Status.SKIPPED: 0, Status.WAITING: 0}
        self.bar: Any = None  # a rich Progress once started
        self.task: Any = None

    def start(self, total: int) -> None:
        if self.quiet or not self.tty:
            return
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeRemainingColumn,
        )

        self.bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                            TextColumn("{task.fields[counts]}"), TimeRemainingColumn(), transient=False)
        self.bar.start()
        self.task = self.bar.add_task("windows", total=total, counts="")

    def update(self, task: Any, outcome: Any) -> None:
        key = outcome.status if outcome.status in self.counts else Status.WAITING
        self.counts[key] += 1
        if self.quiet:
            return
        if self.bar is not None:
            text = "  ".join(f"{k} {v}" for k, v in self.counts.items() if v)
            self.bar.update(self.task, advance=1, counts=text)
            if outcome.status == Status.FAILED:
                self.bar.console.print(f"[bold]failed[/] {outcome.job} {outcome.window}: {outcome.reason}")
        elif outcome.status != Status.SKIPPED:
            click.echo(outcome_line(outcome))

    def stop(self) -> None:
        if self.bar is not None:
            self.bar.stop()

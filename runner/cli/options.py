"""What every command shares: the workspace and ledger options, the clock (`--at`), and stopping on signals."""

from __future__ import annotations

import contextlib
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import click


class Context:
    """Options shared by every command."""

    def __init__(self, root: Path, ledger: str | None):
        self.root = root
        self.ledger = ledger


def clock(at: str | None) -> datetime:
    from runner.errors import UsageError
    from runner.model.timeutil import BadValue, parse_instant

    if at is None:
        return datetime.now(UTC)
    try:
        return parse_instant(at, UTC)
    except BadValue as exc:
        raise UsageError(f"--at: {exc} (without an offset it is read as UTC)") from None


@contextlib.contextmanager
def stoppable():
    """Let SIGTERM stop a running command the way Ctrl-C does: workers stopped, runs recorded
    abandoned, claims and the tick lock released, one line, exit status 128 + the signal."""
    import signal

    from runner.errors import Interrupted

    def stop(signum: int, _frame: Any) -> None:
        raise Interrupted(signum)

    try:
        previous = signal.signal(signal.SIGTERM, stop)
    except ValueError:  # not the main thread: leave signals alone
        yield
        return
    try:
        yield
    except KeyboardInterrupt:
        raise Interrupted(signal.SIGINT) from None
    finally:
        signal.signal(signal.SIGTERM, previous)


at_option = click.option(
    "--at", metavar="TIME",
    help="Pretend the clock says TIME (ISO 8601; no offset means UTC). Default: now.",
)


json_option = click.option("--json", "as_json", is_flag=True, help="Print JSON for scripts.")


workers_option = click.option("--workers", type=click.IntRange(min=1), metavar="N",
                              help="Windows run in parallel (processes). Default: the number of CPU cores.")

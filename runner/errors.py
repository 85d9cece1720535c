"""Error types shared by the whole package.

Every problem a user can cause is a `WeirError`; the CLI turns it into one
line and an exit status, never a traceback. `Problem` is one located finding
(file, line, column, key path, message), used where all problems of a run are
collected and reported together.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, order=True)
class Problem:
    """One finding in a job file, rendered as `FILE:LINE:COL: key.path: message`."""

    file: str
    line: int
    column: int
    path: str
    message: str
    severity: str = "error"

    def render(self) -> str:
        where = f"{self.file}:{self.line}:{self.column}"
        prefix = f"{where}: {self.path}: " if self.path else f"{where}: "
        tag = "warning: " if self.severity == "warning" else ""
        return f"{prefix}{tag}{self.message}"


class WeirError(Exception):
    """A problem caused by input (files, arguments, state); shown as one line."""

    exit_code = 2


class SpecProblems(WeirError):
    """One or more job files are invalid; carries every problem found."""

    def __init__(self, problems: list[Problem]):
        self.problems = sorted(problems)
        super().__init__("\n".join(p.render() for p in self.problems))


class UsageError(WeirError):
    """A bad command-line argument (unknown job, bad timestamp, ...)."""


class LedgerError(WeirError):
    """The ledger cannot be used (newer schema, locked, corrupt)."""


class Interrupted(BaseException):
    """A signal (SIGINT from Ctrl-C, SIGTERM) stopped a running command; the CLI exits with 128 + it."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum

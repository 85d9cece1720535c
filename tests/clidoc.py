"""Writes docs/cli.md from the click commands, so the CLI reference matches `--help`.

Run `python tests/clidoc.py` after changing a command; tests/test_docs.py
fails while the file is out of date.
"""

from __future__ import annotations

import sys
from pathlib import Path

import click

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from runner.cli import cli  # noqa: E402

HEADER = """# Command reference

Generated from the commands' own help (`weir COMMAND --help` prints the same);
do not edit by hand: run `python tests/clidoc.py`.

Every command takes the global options before its name, e.g.
`weir -C /srv/rollups plan`. Times given without an offset are read in the
job's timezone (`--from`, `--to`, `--window`) or as UTC (`--at`).
Exit status: 0 success, 1 a window failed (or, for `verify`, a problem was
found), 2 bad input (job files, arguments, ledger), 70 an internal error.
"""


def _help(command: click.Command, name: str) -> str:
    # subcommands render under the group's context, as they do for `weir NAME --help`
    # (it carries the group's settings, e.g. the -h short form of --help)
    parent = cli.make_context("weir", [], resilient_parsing=True, terminal_width=100, max_content_width=100)
    if command is cli:
        return cli.get_help(parent)
    ctx = click.Context(command, info_name=name.split()[-1], parent=parent, terminal_width=100,
                        max_content_width=100)
    return command.get_help(ctx)


def render() -> str:
    parts = [HEADER, "## weir\n", "```text", _help(cli, "weir"), "```\n"]
    assert isinstance(cli, click.Group)
    for name in sorted(cli.commands):
        command = cli.commands[name]
        parts += [f"## weir {name}\n", "```text", _help(command, f"weir {name}"), "```\n"]
    return "\n".join(parts)


if __name__ == "__main__":
    (ROOT / "docs" / "cli.md").write_text(render())
    print("wrote docs/cli.md")

"""Help text reaches the reader as written: rich markup must not eat bracketed words such as
the `[bench]` of an install command (typer renders help through rich)."""

from __future__ import annotations

import re
from typing import Any

import typer.main
from typer.testing import CliRunner

from vault.cli.app import app

BRACKETED = re.compile(r"\w\\*\[[\w,-]+\]")


def _commands(group: Any, path: tuple[str, ...] = ()) -> list[tuple[str, ...]]:
    found = []
    for name, command in group.commands.items():  # typer's own (vendored) click groups
        found.append((*path, name))
        if hasattr(command, "commands"):
            found.extend(_commands(command, (*path, name)))
    return found


def _help(path: tuple[str, ...]) -> str:
    command: Any = typer.main.get_command(app)
    for name in path:
        command = command.commands[name]
    return command.help or ""


def test_bracketed_words_survive_rendering() -> None:
    runner = CliRunner()
    checked = 0
    for path in _commands(typer.main.get_command(app)):
        wanted = [m.replace("\\", "") for m in BRACKETED.findall(_help(path))]
        if not wanted:
            continue
        shown = runner.invoke(app, [*path, "--help"], env={"COLUMNS": "200"}).output
        for text in wanted:
            assert text in shown, (path, text)
        checked += 1
    assert checked >= 1  # the bench command's install hint at least

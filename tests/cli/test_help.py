"""Help screens a newcomer can rely on: every option explained, flags shown as flags."""

from __future__ import annotations

import pytest
import typer

from sweepctl.cli import app
from tests.campaign.helpers import cli


def _commands(group, prefix: tuple[str, ...] = ()):
    # duck-typed: typer may bring its own copy of click
    for name, cmd in group.commands.items():
        path = (*prefix, name)
        if hasattr(cmd, "commands"):
            yield from _commands(cmd, path)
        else:
            yield path, cmd


COMMANDS = list(_commands(typer.main.get_command(app)))


def test_the_commands_are_found():
    names = {" ".join(p) for p, _ in COMMANDS}
    assert {"run", "plan", "fit", "report", "new", "cluster script"} <= names


@pytest.mark.parametrize("path,cmd", COMMANDS, ids=[" ".join(p) for p, _ in COMMANDS])
def test_every_option_has_help(path, cmd):
    missing = [
        p.opts[0]
        for p in cmd.params
        if p.param_type_name == "option" and not (p.help or "").strip()
    ]
    assert not missing, f"sweepctl {' '.join(path)}: no help text for {missing}"
    assert (cmd.help or "").strip(), f"sweepctl {' '.join(path)} has no description"


@pytest.mark.parametrize("path", [p for p, _ in COMMANDS], ids=[" ".join(p) for p, _ in COMMANDS])
def test_flags_render_as_flags(path):
    proc = cli(*path, "--help", env={"COLUMNS": "160"})
    assert proc.returncode == 0, proc.stderr
    assert "<bool>" not in proc.stdout, proc.stdout


def test_shell_completion_can_be_installed():
    proc = cli("--help", env={"COLUMNS": "160"})
    assert "--install-completion" in proc.stdout

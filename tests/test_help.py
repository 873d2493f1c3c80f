"""Help screens at 80 columns: every option name printed whole, flags shown as flags (no value
type), each command's caution kept in its help."""

from __future__ import annotations

import re

import pytest
from typer.testing import CliRunner

from adfit.cli import app

def _group():
    import typer.main
    return typer.main.get_command(app)


#: every command of the app (a new command is covered without editing this file)
COMMANDS = sorted(_group().commands)


def click_command(name):
    return _group().commands[name]


def test_every_known_command_is_covered():
    assert {"fit", "em", "score", "gaps", "impute", "query", "show", "report", "demo", "sensitivity"} <= set(COMMANDS)


def test_top_level_help_at_80_columns():
    r = CliRunner().invoke(app, ["--help"], env={"COLUMNS": "80", "TERM": "dumb"})
    assert r.exit_code == 0, r.output
    assert max(len(x) for x in r.output.splitlines()) <= 80
    for name in COMMANDS:
        assert re.search(rf"\b{name}\b", r.output), name


@pytest.mark.parametrize("name", COMMANDS)
def test_help_at_80_columns_shows_every_option_whole(name):
    r = CliRunner().invoke(app, [name, "--help"], env={"COLUMNS": "80", "TERM": "dumb"})
    assert r.exit_code == 0, r.output
    lines = r.output.splitlines()
    assert max(len(x) for x in lines) <= 80
    for param in click_command(name).params:
        for opt in list(param.opts) + list(param.secondary_opts):
            if opt.startswith("--"):
                # whole, not cut with an ellipsis
                assert re.search(re.escape(opt) + r"(?![\w-])", r.output), (name, opt)
    assert not re.search(r"--[\w-]*…", r.output), name   # an option name cut short
    # flags are shown as flags: no value column for an on/off option
    for line in lines:
        if "<bool>" in line:
            assert "--help" in line, (name, line)   # click's own help option only
    assert "Caution" in r.output or "caution" in r.output.lower(), name


def test_on_off_options_are_flag_pairs():
    # --em-check true is not how a flag is given: the help shows --em-check / --no-em-check
    r = CliRunner().invoke(app, ["fit", "--help"], env={"COLUMNS": "80", "TERM": "dumb"})
    assert "--em-check" in r.output and "--no-em-check" in r.output
    params = {p.name: p for p in click_command("fit").params}
    assert params["em_check"].is_flag and params["em_check"].secondary_opts == ["--no-em-check"]

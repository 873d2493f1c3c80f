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


def test_usage_errors_from_the_console_entry_point_are_one_line_and_exit_1(tmp_path):
    # The project's rule (DEVELOPERS.md): every bad input is one line on stderr and exit code 1,
    # the click layer's usage errors included (unknown option, missing argument, bad value).
    import subprocess
    import sys

    cases = [(["report", "fit.json", "--params", "x.json", "--out", "r.html"], "No such option: --params", "adfit report --help"),
             (["fit", "net.toml"], "Missing argument 'data'", "adfit fit --help"),
             (["frobnicate"], "No such command 'frobnicate'", "adfit --help")]
    (tmp_path / "net.toml").write_text('[nodes.a]\nstates = ["x", "y"]\n')
    for argv, words, where in cases:
        r = subprocess.run([sys.executable, "-m", "adfit", *argv], capture_output=True, text=True, cwd=tmp_path)
        lines = r.stderr.strip().splitlines()
        assert r.returncode == 1 and len(lines) == 1 and words in lines[0] and where in lines[0], (argv, r.stderr)
        assert lines[0].startswith("adfit: error: ") and "Usage:" not in r.stdout + r.stderr

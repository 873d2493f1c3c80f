"""Progress display of ``adfit fit`` (stderr): one line per start, named by the start's own index
out of the number of starts, and one line per later phase (error bars, EM check, complete-case
fit, cross-validation). Off a terminal (here: click's CliRunner) the lines are plain text.

These check counting and wording, not mathematics: the number of starts is what ``--restarts``
asked for, and ``fit()`` calls ``progress(start, ...)`` with ``start`` in ``range(restarts)``.
"""

from __future__ import annotations

import json
import re

import pytest
from typer.testing import CliRunner

from adfit import demo
from adfit.cli import app


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    d = tmp_path_factory.mktemp("progress")
    (d / "net.toml").write_text('[nodes.x]\nstates = ["no", "yes"]\n[nodes.y]\nstates = ["lo", "hi"]\nparents = ["x"]\n')
    rows = ["x,y"] + ["no,lo"] * 7 + ["no,hi"] * 3 + ["yes,hi"] * 6 + [",hi"] * 4 + [",lo"] * 3 + ["yes,lo"] * 2
    (d / "d.csv").write_text("\n".join(rows) + "\n")
    return d


def _start_lines(stderr: str) -> list[tuple[int, int]]:
    return [(int(a), int(b)) for a, b in re.findall(r"^fit: start (\d+) of (\d+)", stderr, flags=re.M)]


@pytest.mark.parametrize("restarts", [1, 3])
def test_progress_counts_the_starts(tiny, restarts):
    out = tiny / f"fit{restarts}.json"
    r = CliRunner().invoke(app, ["fit", str(tiny / "net.toml"), str(tiny / "d.csv"), "--out", str(out),
                                 "--restarts", str(restarts), "--em-check", "--compare-complete-case",
                                 "--folds", "2"])
    assert r.exit_code == 0, r.output
    # one line per start, in order, each "of" the number of starts asked for
    assert _start_lines(r.stderr) == [(k, restarts) for k in range(1, restarts + 1)], r.stderr
    doc = json.loads(out.read_text())
    assert len(doc["restarts"]["starts"]) == restarts
    # each line ends with the iterations that start ran (from the result file)
    for k, row in enumerate(doc["restarts"]["starts"]):
        line = next(ln for ln in r.stderr.splitlines() if ln.startswith(f"fit: start {k + 1} of {restarts},"))
        assert line.endswith(f", {row['iterations']} iteration{'' if row['iterations'] == 1 else 's'}"), line
    # the later phases, in the order they run
    phases = [ln.split(" (")[0] for ln in r.stderr.splitlines() if not ln.startswith(("fit: ", "adfit: warning"))]
    assert phases == ["error bars", "EM check", "complete-case fit", "cross-validation"], r.stderr


def test_quiet_prints_no_progress(tiny):
    r = CliRunner().invoke(app, ["fit", str(tiny / "net.toml"), str(tiny / "d.csv"), "--out", str(tiny / "q.json"),
                                 "--restarts", "2", "-q", "--em-check"])
    assert r.exit_code == 0, r.output
    assert "start" not in r.stderr and "EM check" not in r.stderr


def test_fit_progress_names_each_start_by_its_own_index():
    # starts run side by side report in any order and from several threads; the lines are named
    # by the start's index and written in the order of the starts
    lines: list[str] = []
    rep = demo.LineReporter(lines.append)
    cb, close = demo.fit_progress(rep, "fit", 3)
    for start, it in ((2, 1), (0, 1), (1, 1), (2, 2), (0, 2), (2, 3)):
        cb(start, it, -10.0 - it, 1.0)
    close()
    assert [ln.split(",")[0] for ln in lines] == ["fit: start 1 of 3", "fit: start 2 of 3", "fit: start 3 of 3"]
    assert lines[2].endswith("3 iterations") and lines[1].endswith("1 iteration")
    # a total not known in advance, or an index beyond it: never "start 3 of 2"
    lines.clear()
    cb, close = demo.fit_progress(rep, "fit", 2)
    cb(2, 1, -1.0, 1.0)
    close()
    cb, close = demo.fit_progress(rep, "fit", None)
    cb(0, 1, -1.0, 1.0)
    close()
    assert [ln.split(",")[0] for ln in lines] == ["fit: start 3", "fit: start 1"]
    # a silenced reporter (a command that failed) writes nothing
    lines.clear()
    rep.silent = True
    cb, close = demo.fit_progress(rep, "fit", 1)
    cb(0, 1, -1.0, 1.0)
    close()
    with rep.stage("error bars"):
        pass
    assert lines == []

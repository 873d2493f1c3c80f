"""Atomic output: nothing half-written, ordinary permissions."""

import os
import stat

import pytest

from adfit.io import atomic_write


def test_atomic_write_leaves_old_file_on_error_and_uses_the_umask(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_write(target) as fh:
            fh.write("half")
            raise RuntimeError("boom")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]  # no temporary left behind
    with atomic_write(target) as fh:
        fh.write("new")
    assert target.read_text() == "new"
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~umask


# ============================================================================ no input is overwritten
# Issue 17 found that `--out` could name an input and replace it (exit 0). Every command that
# writes checks its outputs first (adfit.io.check_output_paths); these run the real commands.
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

from typer.testing import CliRunner

from adfit.cli import app
from adfit.errors import OutputError
from adfit.io import check_output_paths, remove_stale_temps, temp_name

NET = ('[nodes.wear]\nstates = ["light", "heavy"]\n'
       '[nodes.failure]\nstates = ["no", "yes"]\nparents = ["wear"]\n')
RECORDS = "wear,failure\nlight,no\nheavy,yes\n,no\nlight,\nheavy,no\nlight,no\n"
PRIOR = '[nodes.failure]\npseudo_counts = [[1, 1], [1, 1]]\n'


def cli(args):
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Network, records, prior and a result file made by `adfit em` on them (the control run)."""
    d = tmp_path_factory.mktemp("io")
    (d / "n.toml").write_text(NET)
    (d / "d.csv").write_text(RECORDS)
    (d / "p.toml").write_text(PRIOR)
    r = cli(["em", d / "n.toml", d / "d.csv", "--out", d / "r.json"])
    assert r.exit_code == 0, r.output
    return d


def snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and not p.is_symlink()}


def assert_refused(folder: Path, args, *words):
    before = snapshot(folder)
    r = cli(args)
    assert r.exit_code == 1, r.output
    assert r.output.count("\n") == 1 and r.output.startswith("adfit: error: "), r.output
    assert "Traceback" not in r.output
    assert r.exception is None or isinstance(r.exception, SystemExit), r.exception
    for w in words:
        assert w in r.output, r.output
    assert snapshot(folder) == before  # inputs byte for byte, and nothing new written
    assert not [p for p in folder.rglob("*") if ".adfit-" in p.name]  # no temporary file left
    return r.output


def test_every_writing_command_refuses_to_overwrite_an_input(inputs):
    d = inputs
    n, data, res, pri = d / "n.toml", d / "d.csv", d / "r.json", d / "p.toml"
    fit = ["fit", n, data, "-q"]
    assert_refused(d, fit + ["--out", data], "--out", "is the data file itself", "the records")
    assert_refused(d, fit + ["--out", n], "is the network file itself")
    assert_refused(d, fit + ["--prior", pri, "--out", pri], "is the prior file itself")
    assert_refused(d, ["em", n, data, "--out", data], "is the data file itself")
    assert_refused(d, ["em", n, data, "--init", res, "--out", res], "is the init file itself")
    imp = ["impute", n, data, "--params", res]
    assert_refused(d, imp + ["--out", res], "is the params file itself")
    assert_refused(d, imp + ["--out", n], "is the network file itself")
    assert_refused(d, imp + ["--out", data], "data file itself")  # the message test_impute.py checks
    assert_refused(d, ["report", res, "--out", res], "is the result file itself")
    assert_refused(d, ["report", res, "--data", data, "--out", data], "is the data file itself")
    assert_refused(d, ["show", res, "--out", res], "is the result file itself")
    # the same file under another spelling or another name (hard link: same device and inode)
    assert_refused(d, fit + ["--out", d / "." / ".." / d.name / "d.csv"], "is the data file itself")
    link = d / "hard.csv"
    os.link(data, link)
    try:
        assert_refused(d, ["em", n, link, "--out", data], "is the data file itself")
    finally:
        link.unlink()
    # control: the same commands with a fresh output file work (so the refusals are not blanket ones)
    r = cli(imp + ["--out", d / "ok.csv"])
    assert r.exit_code == 0 and (d / "ok.csv").exists(), r.output
    (d / "ok.csv").unlink()


def test_outputs_inside_a_data_folder_or_matching_a_data_glob_are_refused(inputs, tmp_path):
    n, res = inputs / "n.toml", inputs / "r.json"
    (tmp_path / "parts").mkdir()
    (tmp_path / "parts" / "a.csv").write_text(RECORDS)
    assert_refused(tmp_path, ["impute", n, tmp_path / "parts", "--params", res, "--out", tmp_path / "parts" / "b.csv"],
                   "inside the data folder")
    assert_refused(tmp_path, ["impute", n, str(tmp_path / "parts" / "*.csv"), "--params", res,
                              "--out", tmp_path / "parts" / "new.csv"], "matches the data pattern")
    assert_refused(tmp_path, ["fit", n, tmp_path / "parts", "--out", tmp_path / "parts" / "fit.json"],
                   "inside the data folder")


def test_folders_links_devices_and_unwritable_places_are_refused_before_any_work(inputs, tmp_path):
    n, data, res = inputs / "n.toml", inputs / "d.csv", inputs / "r.json"
    work = tmp_path
    (work / "other.json").write_text("keep")
    # a folder (`--out .`), for each command that writes a file
    for args in (["fit", n, data], ["em", n, data], ["impute", n, data, "--params", res], ["report", res],
                 ["show", res]):
        assert_refused(work, args + ["--out", work], "is a folder")
    # a symbolic link: refused, and neither the link nor its target is touched
    (work / "link.json").symlink_to(work / "other.json")
    assert_refused(work, ["em", n, data, "--out", work / "link.json"], "symbolic link")
    assert (work / "link.json").is_symlink() and (work / "other.json").read_text() == "keep"
    # a dangling link too
    (work / "dangling.json").symlink_to(work / "nowhere.json")
    assert_refused(work, ["show", res, "--out", work / "dangling.json"], "symbolic link")
    assert not (work / "nowhere.json").exists()
    # a device node and a pipe: never replaced by a regular file
    assert_refused(work, ["em", n, data, "--out", "/dev/null"], "not a regular file")
    assert Path("/dev/null").is_char_device()
    os.mkfifo(work / "pipe")
    assert_refused(work, ["report", res, "--out", work / "pipe"], "not a regular file")
    # a folder that does not exist
    assert_refused(work, ["fit", n, data, "--out", work / "no" / "fit.json"], "does not exist")
    # demo: --out must be a folder, its files must not be links
    (work / "afile").write_text("x")
    assert_refused(work, ["demo", "-q", "--out", work / "afile"], "not a folder")
    (work / "demo").mkdir()
    (work / "demo" / "fit.json").symlink_to(work / "other.json")
    assert_refused(work, ["demo", "-q", "--out", work / "demo"], "symbolic link")


def _uncreatable_folder(tmp_path: Path) -> Path | None:
    """A folder in which this process cannot create a file: a read-only folder for an ordinary user;
    for root (who writes anyway, os.access says yes) a folder of a read-only or virtual file system
    (/sys, /proc), tried by creating a file in it here, outside adfit."""
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    for folder in (ro, Path("/sys"), Path("/proc")):
        probe = folder / f".adfit-test-probe-{os.getpid()}"
        try:
            fd = os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        except OSError:
            return folder
        os.close(fd)
        os.unlink(probe)
    return None


def test_a_folder_where_no_file_can_be_created_is_refused_before_the_work(inputs, tmp_path):
    n, data = inputs / "n.toml", inputs / "d.csv"
    # a path whose folder is a regular file: refused for everyone, root included
    assert_refused(inputs, ["em", n, data, "--out", data / "r.json"], "d.csv is a file, not a folder")
    assert_refused(inputs, ["impute", n, data, "--params", inputs / "r.json", "--out", inputs / "r.json" / "i.csv"],
                   "is a file, not a folder")
    folder = _uncreatable_folder(tmp_path)
    try:
        if folder is None:
            pytest.skip("every folder tried accepts new files")
        assert_refused(tmp_path, ["em", n, data, "--out", folder / "r.json"], str(folder))
        if folder.parent == tmp_path:  # the read-only folder of an ordinary user
            assert_refused(tmp_path, ["demo", "-q", "--out", folder / "sub"], "not writable")
    finally:
        (tmp_path / "ro").chmod(0o755)


def test_a_write_that_runs_out_of_room_is_one_line_and_leaves_nothing(inputs, tmp_path):
    # RLIMIT_FSIZE (POSIX setrlimit) caps the size of any file the process writes, root's too: a
    # write past it fails with EFBIG, as one past a full disk fails with ENOSPC (Python ignores
    # SIGXFSZ, so the write returns the error). The result JSON of the tiny fit is > 2 000 bytes.
    import adfit

    out = tmp_path / "r.json"
    out.write_text("old")
    env = {**os.environ, "PYTHONPATH": str(Path(adfit.__file__).parents[1]), "ADFIT_COMPILE_CACHE": "0"}
    cap = 2000
    script = ("import resource, sys; resource.setrlimit(resource.RLIMIT_FSIZE, (%d, %d)); "
              "from adfit.cli import main; sys.argv = ['adfit'] + sys.argv[1:]; main()") % (cap, cap)
    proc = subprocess.run([sys.executable, "-c", script, "em", str(inputs / "n.toml"), str(inputs / "d.csv"),
                           "--out", str(out)], capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 1, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"adfit: error: {out}: could not be written (File too large)"), proc.stderr
    assert out.read_text() == "old" and sorted(p.name for p in tmp_path.iterdir()) == ["r.json"]
    # the control: without the cap the same command writes the file, larger than the cap
    r = cli(["em", inputs / "n.toml", inputs / "d.csv", "--out", out])
    assert r.exit_code == 0 and out.stat().st_size > cap, r.output


def test_check_output_paths_from_python_names_the_keyword(tmp_path):
    f = tmp_path / "d.csv"
    f.write_text("x\n")
    with pytest.raises(OutputError, match=r"^out='.*d.csv' is the data file itself"):
        check_output_paths({"out": f}, {"data file": f})
    with pytest.raises(OutputError, match="name the same file"):
        check_output_paths({"out": tmp_path / "a", "report": tmp_path / "a"}, {})
    check_output_paths({"out": tmp_path / "new.csv", "other": None}, {"data file": f, "prior file": None})


# ============================================================================ temporary files
def test_temporary_file_is_named_after_the_target_and_the_process(tmp_path):
    target = tmp_path / "out.txt"
    with atomic_write(target) as fh:
        fh.write("x")
        assert [p.name for p in tmp_path.iterdir()] == [f".out.txt.adfit-{os.getpid()}.tmp"]
        assert temp_name(target).exists()
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]


def test_stale_temporary_files_of_dead_processes_are_removed_by_the_next_write(tmp_path):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # its id names no running process now
    target = tmp_path / "fit.json"
    stale = temp_name(target, dead.pid)
    stale.write_text("half")
    mine = temp_name(target)  # this process is alive: its file is not stale
    other = temp_name(tmp_path / "other.json", dead.pid)  # another target's: not touched
    mine.write_text("busy")
    other.write_text("half")
    assert remove_stale_temps(target) == [stale]
    assert mine.exists() and other.exists()
    mine.unlink()
    stale.write_text("half")
    with atomic_write(target) as fh:
        fh.write("{}")
    assert not stale.exists() and other.exists() and target.read_text() == "{}"


@pytest.mark.parametrize("sig, rc", [(signal.SIGTERM, 143), (signal.SIGINT, None)])
def test_a_terminated_write_removes_its_temporary_file(tmp_path, sig, rc):
    target = tmp_path / "out.csv"
    target.write_text("old")
    script = textwrap.dedent(f"""
        import signal, sys, time
        # a shell's background job starts with SIGINT ignored, and Python then leaves it ignored;
        # a user's Ctrl-C raises KeyboardInterrupt, so install that handler whatever the launcher
        signal.signal(signal.SIGINT, signal.default_int_handler)
        from adfit.cli import exit_on_sigterm
        from adfit.io import atomic_write
        exit_on_sigterm()
        with atomic_write({str(target)!r}) as fh:
            fh.write("half")
            fh.flush()
            print("ready", flush=True)
            time.sleep(60)
        """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "ready"
    assert temp_name(target, proc.pid).exists()
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    if rc is not None:
        assert proc.returncode == rc, err
    else:
        assert proc.returncode != 0 and "KeyboardInterrupt" in err
    assert [p.name for p in tmp_path.iterdir()] == ["out.csv"] and target.read_text() == "old"


# ============================================================================ spreadsheet formulas
def test_impute_defuses_formula_cells_by_default_and_writes_raw_on_request(tmp_path):
    # OWASP, "CSV Injection": cells starting with =, +, -, @ (and tab, carriage return) are run as
    # formulas by spreadsheets; the usual defence is a leading apostrophe. Plain numbers stay.
    import pandas as pd

    (tmp_path / "n.toml").write_text('[nodes.wear]\nstates = ["=low", "@high"]\n'
                                     '[nodes.failure]\nstates = ["no", "yes"]\nparents = ["wear"]\n')
    (tmp_path / "d.csv").write_text('wear,failure,@note\n=low,no,"=HYPERLINK(""x"")"\n@high,yes,-1.5\n,no,+cmd\n'
                                    '=low,,plain\n@high,no,-\n')
    r = cli(["em", tmp_path / "n.toml", tmp_path / "d.csv", "--ignore-columns", "@note", "--out", tmp_path / "r.json"])
    assert r.exit_code == 0, r.output
    base = ["impute", tmp_path / "n.toml", tmp_path / "d.csv", "--params", tmp_path / "r.json",
            "--ignore-columns", "@note", "--draws", "1"]
    r = cli(base + ["--out", tmp_path / "safe.csv"])
    assert r.exit_code == 0, r.output
    safe = pd.read_csv(tmp_path / "safe.csv", dtype=str, keep_default_na=False)
    assert list(safe["'@note"]) == ["'=HYPERLINK(\"x\")", "-1.5", "'+cmd", "plain", "'-"]
    assert list(safe["wear"]) == ["'=low", "'@high", "", "'=low", "'@high"]
    assert set(safe["wear__mode"]) <= {"'=low", "'@high"} and set(safe["wear__draw1"]) <= {"'=low", "'@high"}
    assert "wear__p_=low" in safe.columns  # (a name that does not start like a formula stays)
    assert all(float(v) < 0 for v in safe["row__log_p_observed"])  # negative numbers are not touched
    r = cli(base + ["--raw-cells", "--out", tmp_path / "raw.csv"])
    assert r.exit_code == 0, r.output
    raw = pd.read_csv(tmp_path / "raw.csv", dtype=str, keep_default_na=False)
    assert list(raw["@note"]) == ['=HYPERLINK("x")', "-1.5", "+cmd", "plain", "-"]
    assert list(raw["wear"]) == ["=low", "@high", "", "=low", "@high"] 
    assert (raw["row__log_p_observed"] == safe["row__log_p_observed"]).all()

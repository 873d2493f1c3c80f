"""Output files: checked before any work, written atomically, never over an input.

:func:`check_output_paths` is the one check every command that writes runs first: an output
must not be an input (same path or same file by device and inode), must not lie inside a data
folder or match a data glob that is read, must not be a folder, link, device or pipe, and its
folder must exist and be writable.

:func:`atomic_write` writes to ``.NAME.adfit-PID.tmp`` beside the target and renames it over
the target on success; the temporary file is removed on every error and on SIGINT / SIGTERM (the
console script turns SIGTERM into ``SystemExit(143)``). A temporary file left by a process that
was killed outright (SIGKILL) carries that process's id: the next write of the same target
removes it once that process is gone.
"""

from __future__ import annotations

import errno
import fnmatch
import json
import os
import re
import stat
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator, Mapping, Sequence, Union

from .errors import OutputError, option

PathLike = Union[str, Path]

# what an output would destroy, by the label of the input it names
_WHAT = {
    "data file": "the records",
    "network file": "the network",
    "prior file": "the prior",
    "params file": "the fitted CPTs",
    "result file": "the fitted CPTs",
    "init file": "the starting CPTs",
}


def _glob_like(p: str) -> bool:
    return any(ch in p for ch in "*?[")


def _inside(child: Path, folder: Path) -> bool:
    try:
        child.relative_to(folder)
        return True
    except ValueError:
        return False


def _same_file(a: Path, b: Path) -> bool:
    if a.resolve() == b.resolve():
        return True
    try:
        return os.path.samefile(a, b)  # hard links, bind mounts: same device and inode
    except OSError:
        return False


def _input_files(value: PathLike | Sequence[PathLike]) -> list[Path]:
    if isinstance(value, (list, tuple)):
        return [Path(v) for v in value]
    return [Path(value)]


def check_output_paths(outputs: Mapping[str, PathLike | None],
                       inputs: Mapping[str, PathLike | Sequence[PathLike] | None]) -> None:
    """Refuse, before any work, an output that cannot be written safely.

    Args:
        outputs: keyword of the option (``"out"``) → the path it names (``None``: not written).
            Messages spell the option as the caller does (``--out`` from the CLI).
        inputs: label (``"data file"``, ``"network file"``, ``"params file"``...) → the path read
            (a file, a data folder, a glob pattern or a list of files; ``None``: not given).

    Raises:
        OutputError: one line naming the option, the path, the problem and what to do.
    """
    seen: dict[Path, str] = {}
    for key, out in outputs.items():
        if out is None:
            continue
        p = Path(out)
        name = option(key, str(p))
        # 1. what is there now
        if p.is_symlink():
            raise OutputError(f"{name} is a symbolic link; adfit does not write through links (the link would be "
                              f"replaced by a regular file): give the real file's path or another name")
        if p.exists():
            mode = p.stat().st_mode
            if stat.S_ISDIR(mode):
                raise OutputError(f"{name} is a folder; give the name of a file to write (in that folder or elsewhere)")
            if not stat.S_ISREG(mode):
                raise OutputError(f"{name} exists and is not a regular file (a device, pipe or socket); "
                                  f"write to a regular file")
        # 2. never an input
        for label, value in inputs.items():
            if value is None:
                continue
            what = _WHAT.get(label, "it")
            for f in _input_files(value):
                if f.is_dir():
                    if _inside(p.resolve(), f.resolve()):
                        raise OutputError(f"{name} is inside the {label.replace(' file', '')} folder {f}, whose files "
                                          f"are read; write it outside that folder")
                elif not f.exists() and _glob_like(str(f)):
                    if fnmatch.fnmatch(str(p), str(f)) or fnmatch.fnmatch(str(p.resolve()), str(f)) or any(
                            _same_file(p, Path(g)) for g in _glob(str(f))):
                        raise OutputError(f"{name} matches the {label.replace(' file', '')} pattern {f}, whose files "
                                          f"are read; choose a name outside the pattern")
                elif p.resolve() == f.resolve() or (p.exists() and f.exists() and _same_file(p, f)):
                    raise OutputError(f"{name} is the {label} itself and would overwrite {what}; "
                                      f"choose another file name")
        # 3. two outputs on one file
        r = p.resolve()
        if r in seen:
            raise OutputError(f"{name} and {option(seen[r], str(p))} name the same file; give each its own name")
        seen[r] = key
        # 4. the folder it goes into: there, a folder, and a file can be created in it now
        parent = p.parent if str(p.parent) else Path(".")
        if not parent.is_dir():
            if parent.exists() or parent.is_symlink():
                raise OutputError(f"{name}: {parent} is a file, not a folder; give a path inside a folder")
            raise OutputError(f"{name}: the output folder {parent} does not exist; create it first")
        if not os.access(parent, os.W_OK | os.X_OK):
            raise OutputError(f"{name}: the output folder {parent} is not writable; choose another folder")
        probe_folder(name, p)


def probe_folder(name: str, path: PathLike) -> None:
    """Create and remove the temporary file of ``path`` now, so that a folder where no file can be
    created is refused before the work. ``os.access`` alone says yes to root in a read-only folder,
    and nothing on a read-only file system or a full quota; this asks the file system itself."""
    p = Path(path)
    tmp = temp_name(p)
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0), 0o600)
    except FileExistsError:  # this process is writing it already (or another write is under way)
        return
    except OSError as e:
        raise OutputError(f"{name}: cannot create a file in the output folder {p.parent if str(p.parent) else '.'} "
                          f"({e.strerror or e}); choose another folder") from None
    os.close(fd)
    try:
        os.unlink(tmp)
    except OSError:
        pass


def check_output_folder(key: str, folder: PathLike, names: Sequence[str]) -> None:
    """For an output folder (created if needed) whose files ``names`` are replaced: refuse a folder
    that is a file, link or device, a missing or read-only parent, and files that are links or not
    regular files."""
    d = Path(folder)
    name = option(key, str(d))
    if d.exists() or d.is_symlink():
        if not d.is_dir():
            raise OutputError(f"{name} exists and is not a folder; give a folder for the files to write")
        if not os.access(d, os.W_OK | os.X_OK):
            raise OutputError(f"{name}: the folder is not writable; choose another folder")
        for n in names:
            check_output_paths({key: d / n}, {})
        return
    parent = d.parent if str(d.parent) else Path(".")
    while not parent.exists() and parent != parent.parent:  # the folder and its parents are created
        parent = parent.parent
    if not parent.is_dir():
        raise OutputError(f"{name}: {parent} is not a folder; give a folder path for the files to write")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{name}: cannot create the folder, {parent} is not writable; choose another folder")


def _glob(pattern: str) -> list[str]:
    import glob

    return glob.glob(pattern, recursive=True)


# ------------------------------------------------------------------ nesting of parsed documents
MAX_DEPTH = 32  # an adfit network, prior or result file is at most about 8 levels deep


def too_deep(doc: Any, limit: int = MAX_DEPTH) -> str | None:
    """The path of the first value nested more than ``limit`` levels deep in ``doc`` (None: within).

    Iterative, so that a deep document cannot exhaust the interpreter's stack.
    """
    stack: list[tuple[Any, str, int]] = [(doc, "", 0)]
    while stack:
        obj, path, depth = stack.pop()
        if isinstance(obj, Mapping):
            items = [(f"{path}.{k}" if path else str(k), v) for k, v in obj.items()]
        elif isinstance(obj, (list, tuple)):
            items = [(f"{path}[{i}]", v) for i, v in enumerate(obj)]
        else:
            continue
        if depth >= limit:
            return path or "(top)"
        stack.extend((v, pth, depth + 1) for pth, v in items)
    return None


def depth_message(source: Any, where: str | None, kind: str) -> str:
    """One line for a document nested too deeply (``where`` None: the parser itself gave up)."""
    at = f" (at {where})" if where else ""
    return (f"{source}: nested more than {MAX_DEPTH} levels deep{at}; a {kind} file is only a few levels deep: "
            f"check the brackets and table headers")


# ------------------------------------------------------------------ atomic writes
_TMP = re.compile(r"\.(?P<name>.+)\.adfit-(?P<pid>\d+)(?:-\d+)?\.tmp")  # matched whole (fullmatch)


def temp_name(path: PathLike, pid: int | None = None) -> Path:
    """``.NAME.adfit-PID.tmp`` beside ``path``: the temporary file of an atomic write."""
    p = Path(path)
    return p.parent / f".{p.name}.adfit-{os.getpid() if pid is None else pid}.tmp"


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process
        return True
    except OSError:
        return False
    return True


def remove_stale_temps(path: PathLike) -> list[Path]:
    """Remove temporary files of ``path`` left by processes that no longer run; those removed."""
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    removed = []
    try:
        entries = list(os.scandir(parent))
    except OSError:
        return removed
    for e in entries:
        m = _TMP.fullmatch(e.name)
        if m is None or m.group("name") != p.name or _alive(int(m.group("pid"))):
            continue
        try:
            if e.is_file(follow_symlinks=False):
                os.unlink(e.path)
                removed.append(Path(e.path))
        except OSError:
            pass
    return removed


# a write that fails for want of room or permission: one line, not a traceback
_NO_ROOM = {
    errno.ENOSPC: "the disk is full; free some space or write elsewhere",
    errno.EDQUOT: "the disk quota is used up; free some space or write elsewhere",
    errno.EFBIG: "the file is larger than this system or process allows; write elsewhere",
    errno.EROFS: "the file system is read-only; write elsewhere",
    errno.EIO: "the device reported an input/output error; write elsewhere",
}


@contextmanager
def atomic_write(path: PathLike, mode: str = "w", encoding: str | None = "utf-8") -> Iterator[Any]:
    """Open a temporary file next to ``path``; on success rename it to ``path``.

    On any exception (KeyboardInterrupt and SystemExit included) the temporary file is removed
    and ``path`` is left as it was. A link, folder, device or pipe at ``path`` is refused
    (:class:`OutputError`), never replaced.
    """
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise OutputError(f"{p}: output folder {parent} does not exist; create it first")
    if p.is_symlink():
        raise OutputError(f"{p}: is a symbolic link; adfit does not write through links: give the real file's path")
    if p.exists() and not p.is_file():
        raise OutputError(f"{p}: exists and is not a regular file (a folder, device or pipe); write to a regular file")
    remove_stale_temps(p)
    tmp = temp_name(p)
    n = 0
    fd = -1
    try:
        while True:
            try:  # O_EXCL: never reuse or follow an existing name; the umask sets the permissions
                fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0), 0o666)
                break
            except FileExistsError:
                n += 1
                tmp = parent / f".{p.name}.adfit-{os.getpid()}-{n}.tmp"
    except PermissionError:
        raise OutputError(f"{p}: the output folder {parent} is not writable; choose another folder") from None
    try:
        with os.fdopen(fd, mode, encoding=encoding if "b" not in mode else None) as fh:
            fd = -1
            yield fh
        os.replace(tmp, p)
    except BaseException as e:
        if fd >= 0:
            os.close(fd)
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        if isinstance(e, OSError) and e.errno in _NO_ROOM:
            raise OutputError(f"{p}: could not be written ({e.strerror or e}): {_NO_ROOM[e.errno]}; nothing was "
                              f"written there") from None
        raise


def write_json(path: PathLike, obj: Any) -> None:
    """Write ``obj`` as indented JSON, atomically."""
    with atomic_write(path) as fh:
        json.dump(obj, fh, indent=2, allow_nan=True)
        fh.write("\n")

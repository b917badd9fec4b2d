"""Atomic output: write to a temporary name beside the target, then rename over it.

A reader (or a resumed sweep) never sees a half-written file: it sees the old file or the new
one.  Errors (disk full, permission) surface as :class:`OutputError` with the path, and the
temporary file is removed.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Callable, Iterator


class OutputError(Exception):
    """Writing an output failed; the message names the path."""


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _publish_mode(path: Path, folder: bool) -> None:
    """Temporary files and folders are private (0600/0700); the result gets the usual mode."""
    os.chmod(path, (0o777 if folder else 0o666) & ~_umask())


def check_output(target: str | Path, *, folder: bool, replaces: bool = False) -> None:
    """Fail early (before any work) if ``target`` cannot be written: raises OutputError.

    ``replaces`` says the folder will be replaced as a whole (a run folder, renamed into
    place): it must then not be the current folder or one holding it, and an existing one must
    be writable through and through so that the old one can be removed.  Symbolic links are
    refused: the rename would replace the link, not what it points to.  Costs a few stat calls
    (a walk of an existing folder that is replaced).
    """
    target = Path(target)
    if str(target) in ("", ".", "..") or target.name in ("", ".", ".."):
        if replaces:
            raise OutputError(f"{target}: name a folder of its own (the current folder or its "
                              "parent cannot be replaced)")
    full = Path(os.path.abspath(target))
    if os.path.islink(target):
        raise OutputError(f"{target}: is a symbolic link; give the path it points to "
                          f"({os.path.realpath(target)})")
    if replaces:
        here = Path(os.path.abspath(os.getcwd()))
        if full == here or full in here.parents:
            raise OutputError(f"{target}: is the current folder or holds it; name another folder")
    if target.exists():
        if folder and not target.is_dir():
            raise OutputError(f"{target}: exists and is not a folder")
        if not folder and target.is_dir():
            raise OutputError(f"{target}: is a folder, a file is expected")
        if folder:
            inner = [target] + ([p for p in target.rglob("*") if p.is_dir() and not p.is_symlink()]
                                if replaces else [])
            for d in inner:
                if not os.access(d, os.W_OK | os.X_OK):
                    raise OutputError(f"{target}: cannot write in {d} (permission denied)")
    parent = full.parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        raise OutputError(f"{target}: cannot create it, {parent} is not a folder")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{target}: cannot write in {parent} (permission denied)")


@contextmanager
def atomic_path(target: str | Path, suffix: str = "") -> Iterator[Path]:
    """Yield a temporary path in the target's folder; on success rename it onto the target."""
    target = Path(target)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp" + suffix,
                                   dir=target.parent)
        os.close(fd)
    except OSError as exc:
        raise OutputError(f"{target}: cannot write ({exc.strerror or exc})") from None
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        _publish_mode(tmp_path, folder=False)
        os.replace(tmp_path, target)
    except OSError as exc:
        tmp_path.unlink(missing_ok=True)
        raise OutputError(f"{target}: cannot write ({exc.strerror or exc})") from None
    except BaseException:
        tmp_path.unlink(missing_ok=True)
        raise


def write_text(target: str | Path, text: str) -> None:
    with atomic_path(target) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_bytes(target: str | Path, data: bytes) -> None:
    with atomic_path(target) as tmp:
        tmp.write_bytes(data)


@contextmanager
def atomic_dir(target: str | Path, may_replace: Callable[[Path], str | None] | None = None
               ) -> Iterator[Path]:
    """Build a folder under a temporary name and rename it into place when complete.

    If the target exists it is replaced only once the new folder is complete; ``may_replace``
    (when given) is asked first and returns why an existing target must not be replaced, or
    None (checked at the rename, so a folder that changed during the work is still kept).
    """
    target = Path(target)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent))
    except OSError as exc:
        raise OutputError(f"{target}: cannot create ({exc.strerror or exc})") from None
    try:
        yield tmp
        _publish_mode(tmp, folder=True)
        for inner in tmp.rglob("*"):
            _publish_mode(inner, folder=inner.is_dir())
        if target.exists():
            problem = may_replace(target) if may_replace is not None else None
            if problem:
                raise OutputError(f"{target}: {problem}")
            old = target.with_name(f".{target.name}.old-{os.getpid()}")
            os.replace(target, old)
            os.replace(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, target)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise OutputError(f"{target}: cannot write ({exc.strerror or exc})") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise

"""Atomic output: write to a temporary file beside the target, then rename over it.

A reader never sees a half-written file, and an existing file is replaced only once the new
one is complete; on any failure the temporary file is removed and the old file is untouched.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

from tallfit.errors import OutputError


def check_writable(path: str | os.PathLike, overwrite: bool = True) -> Path:
    """Fail early, before any work, if `path` cannot be written."""
    target = Path(path)
    parent = target.parent if str(target.parent) else Path(".")
    if target.is_dir():
        raise OutputError(f"output {str(target)!r} is a directory; give a file name")
    if not parent.is_dir():
        raise OutputError(f"output directory {str(parent)!r} does not exist; create it first")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"output directory {str(parent)!r} is not writable; choose another --out")
    if target.exists() and not overwrite:
        raise OutputError(f"output {str(target)!r} exists; remove it or allow overwriting")
    return target


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, overwrite: bool = True) -> Iterator[Path]:
    """Yield a temporary path in the target's directory; on success rename it to `path`."""
    target = check_writable(path, overwrite)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        os.chmod(tmp_path, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual permissions
        os.replace(tmp_path, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
        raise


def write_text_atomic(path: str | os.PathLike, text: str, overwrite: bool = True) -> None:
    with atomic_path(path, overwrite) as tmp:
        tmp.write_text(text, encoding="utf-8")

"""Safe output: write to a temporary name beside the target and rename into place.

A report that fails half-way never replaces an earlier good one, and a reader never sees a
half-written file. A symbolic link is followed (the link stays, its file is replaced), and a
target that is not a regular file (``/dev/stdout``, a pipe) is written straight through, since
renaming over it would replace the device or pipe itself.
"""

from __future__ import annotations

import contextlib
import os
import stat
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO

from buswitness.errors import OutputError


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "w", encoding: str | None = "utf-8",
                 permissions: int = 0o644) -> Iterator[IO]:
    """Open a temporary file next to ``path``; on success rename it over ``path``, on failure delete it."""
    shown = Path(path)
    if _is_stream(shown):
        yield from _write_through(shown, mode, encoding)
        return
    target = Path(os.path.realpath(shown))
    binary = "b" in mode
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    except OSError as exc:
        raise OutputError(f"{shown}: cannot write here ({exc.strerror})") from None
    ok = False
    try:
        with os.fdopen(fd, mode, encoding=None if binary else encoding) as f:
            yield f
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, permissions)
        os.replace(tmp, target)
        ok = True
    except OSError as exc:
        raise OutputError(f"{shown}: cannot write ({exc.strerror}); any earlier file there is unchanged") from None
    finally:
        if not ok:
            with contextlib.suppress(OSError):
                os.unlink(tmp)


def _is_stream(target: Path) -> bool:
    """True for an existing target that is neither a regular file nor a directory (a device, a pipe)."""
    try:
        st = target.stat()
    except OSError:
        return False
    return not (stat.S_ISREG(st.st_mode) or stat.S_ISDIR(st.st_mode))


def _write_through(target: Path, mode: str, encoding: str | None) -> Iterator[IO]:
    try:
        with open(target, mode, encoding=None if "b" in mode else encoding) as f:
            yield f
    except OSError as exc:
        raise OutputError(f"{target}: cannot write ({exc.strerror})") from None

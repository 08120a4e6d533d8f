"""Safe output: write to a temporary name beside the target and rename into place.

A report that fails half-way never replaces an earlier good one, and a reader never sees a
half-written file.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import IO, Iterator

from buswitness.errors import OutputError


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "w", encoding: str | None = "utf-8",
                 permissions: int = 0o644) -> Iterator[IO]:
    """Open a temporary file next to ``path``; on success rename it over ``path``, on failure delete it."""
    target = Path(path)
    binary = "b" in mode
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    except OSError as exc:
        raise OutputError(f"{target}: cannot write here ({exc.strerror})") from None
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
        raise OutputError(f"{target}: cannot write ({exc.strerror}); any earlier file there is unchanged") from None
    finally:
        if not ok:
            with contextlib.suppress(OSError):
                os.unlink(tmp)

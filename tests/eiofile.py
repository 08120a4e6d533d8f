"""A file that fails like a dying USB stick: reads return the real bytes up to an offset, then EIO.

``install(path, fail_at)`` makes every ``open`` of ``path`` for reading (``builtins.open`` and
``io.open``, which ``pathlib`` uses) return such a file; other files open as usual. Tests use it
in-process; the CLI probe runs it in a subprocess before calling the command line's ``main``::

    python -c "import eiofile; eiofile.install('x.bwcap', 0); from buswitness.cli.main import main; ..."
"""

from __future__ import annotations

import builtins
import errno
import io
import os

_real_open = io.open


class FailingRaw(io.RawIOBase):
    """The bytes of ``data`` up to ``fail_at``; any read reaching past it raises EIO."""

    def __init__(self, data: bytes, fail_at: int) -> None:
        self.data, self.fail_at, self.pos = data, fail_at, 0

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def readinto(self, b) -> int:
        if self.pos >= len(self.data):
            return 0
        if self.pos >= self.fail_at:
            raise OSError(errno.EIO, os.strerror(errno.EIO))
        n = min(len(b), self.fail_at - self.pos, len(self.data) - self.pos)
        b[:n] = self.data[self.pos:self.pos + n]
        self.pos += n
        return n

    def seek(self, offset: int, whence: int = 0) -> int:
        base = {0: 0, 1: self.pos, 2: len(self.data)}[whence]
        self.pos = max(0, base + offset)
        return self.pos

    def tell(self) -> int:
        return self.pos


def failing_open(path, fail_at: int, mode: str = "r", encoding=None, errors=None, newline=None):
    with _real_open(path, "rb") as f:
        data = f.read()
    buffered = io.BufferedReader(FailingRaw(data, fail_at), buffer_size=4096)
    if "b" in mode:
        return buffered
    return io.TextIOWrapper(buffered, encoding=encoding or "utf-8", errors=errors, newline=newline)


def install(path, fail_at: int) -> None:
    """From now on, reading ``path`` fails with EIO at byte ``fail_at``."""
    target = os.path.realpath(path)

    def patched(file, mode="r", *args, **kwargs):
        if isinstance(file, (str, bytes, os.PathLike)) and "r" in mode and "+" not in mode \
                and os.path.realpath(file) == target:
            return failing_open(file, fail_at, mode, kwargs.get("encoding"), kwargs.get("errors"),
                                kwargs.get("newline"))
        return _real_open(file, mode, *args, **kwargs)

    # a callable object, not a function: Python 3.10's pathlib keeps ``io.open`` as a class attribute
    # when imported after this, and a plain function there would be bound as a method
    hook = _Hook(patched)
    builtins.open = hook
    io.open = hook


class _Hook:
    def __init__(self, fn) -> None:
        self.fn = fn

    def __call__(self, *args, **kwargs):
        return self.fn(*args, **kwargs)


def uninstall() -> None:
    """Back to the real ``open``."""
    builtins.open = _real_open
    io.open = _real_open

"""Safe output: write to a temporary name beside the target and rename into place.

A report that fails half-way never replaces an earlier good one, and a reader never sees a
half-written file. A symbolic link is followed (the link stays, its file is replaced), and a
target that is not a regular file (``/dev/stdout``, a pipe) is written straight through, since
renaming over it would replace the device or pipe itself.
"""

from __future__ import annotations

import contextlib
import errno
import os
import stat
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path
from typing import IO

from buswitness.errors import InputFileError, OutputError


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
        remove_stale_parts(target)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.{os.getpid()}-", suffix=".part", dir=target.parent)
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


#: How long a write to a named pipe waits for a reader to open the other end.
READER_WAIT_S = 2.0
#: A temporary file untouched this long, whose writer is gone, is left over from a killed run.
STALE_PART_S = 600.0


def _writer_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True  # exists, owned by someone else
    return True


def remove_stale_parts(target: Path, now: float | None = None) -> list[Path]:
    """Delete the hidden ``.NAME.PID-xxxx.part`` files of ``target`` that a killed run left behind.

    Only this target's own temporary files (by name), only those not modified for ``STALE_PART_S``
    and whose writing process (the PID in the name; none in older names) no longer runs, so a run
    writing the same file at the same moment keeps its file. Returns what was removed.
    """
    import re

    pattern = re.compile(rf"^\.{re.escape(target.name)}\.(?:(\d+)-)?[^/]*\.part$")
    now = time.time() if now is None else now
    removed: list[Path] = []
    try:
        entries = list(os.scandir(target.parent))
    except OSError:
        return removed
    for entry in entries:
        m = pattern.match(entry.name)
        if not m:
            continue
        try:
            st = entry.stat(follow_symlinks=False)
        except OSError:
            continue
        if not stat.S_ISREG(st.st_mode) or now - st.st_mtime < STALE_PART_S:
            continue
        if m.group(1) and (int(m.group(1)) == os.getpid() or _writer_alive(int(m.group(1)))):
            continue
        with contextlib.suppress(OSError):
            os.unlink(entry.path)
            removed.append(Path(entry.path))
    return removed


def _is_stream(target: Path) -> bool:
    """True for an existing target that is neither a regular file nor a directory (a device, a pipe)."""
    try:
        st = target.stat()
    except OSError:
        return False
    return not (stat.S_ISREG(st.st_mode) or stat.S_ISDIR(st.st_mode))


def _write_through(target: Path, mode: str, encoding: str | None) -> Iterator[IO]:
    # Non-blocking open: a FIFO that nobody reads fails (ENXIO) instead of waiting forever; a reader
    # that is just starting (``cat pipe &``) gets READER_WAIT_S to open its end.
    deadline = time.monotonic() + READER_WAIT_S
    while True:
        try:
            fd = os.open(target, os.O_WRONLY | (os.O_APPEND if "a" in mode else 0) | getattr(os, "O_NONBLOCK", 0))
            break
        except OSError as exc:
            if exc.errno == errno.ENXIO and time.monotonic() < deadline:
                time.sleep(0.05)
                continue
            reason = "nobody is reading this pipe" if exc.errno == errno.ENXIO else exc.strerror
            raise OutputError(f"{target}: cannot write ({reason})") from None
    try:
        os.set_blocking(fd, True)
        with os.fdopen(fd, mode, encoding=None if "b" in mode else encoding) as f:
            yield f
    except OSError as exc:
        raise OutputError(f"{target}: cannot write ({exc.strerror})") from None


#: Text inputs read whole (station map, scenario file): far above any real one, far below memory trouble.
MAX_TEXT_INPUT_BYTES = 4 << 20
#: Outputs that are not regular files but are always safe to write to: the terminal's streams and the sink.
STREAM_OUTPUTS = ("/dev/stdout", "/dev/stderr", "/dev/null")
_STREAM_PREFIXES = ("/dev/fd/", "/proc/self/fd/")


def is_stream_output(path: str | os.PathLike) -> bool:
    """True for the names of the terminal's streams, ``/dev/null`` and open descriptors (``/dev/fd/N``)."""
    text = str(path)
    return text in STREAM_OUTPUTS or text.startswith(_STREAM_PREFIXES)


def kind_of(mode: int) -> str:
    """What a file of this ``st_mode`` is, in words ('' for a regular file)."""
    if stat.S_ISREG(mode):
        return ""
    if stat.S_ISDIR(mode):
        return "a directory"
    if stat.S_ISFIFO(mode):
        return "a named pipe (FIFO)"
    if stat.S_ISCHR(mode):
        return "a character device"
    if stat.S_ISBLK(mode):
        return "a block device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


def check_input_file(path: str | os.PathLike, what: str = "input file", max_bytes: int | None = None) -> int:
    """Refuse at once an input that is not a regular file (a pipe would hang, a device never ends).

    Returns the file's size; ``max_bytes`` bounds inputs that are read whole. Only ``stat`` is used,
    which never blocks, so a FIFO with no writer is refused rather than waited on.
    """
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise InputFileError(path, "no such file") from None
    except OSError as exc:
        raise InputFileError(path, f"cannot be opened ({exc.strerror})") from None
    kind = kind_of(st.st_mode)
    if kind:
        raise InputFileError(path, f"is {kind}, not a regular file", f"give the path of a {what}")
    if max_bytes is not None and st.st_size > max_bytes:
        raise InputFileError(path, f"is {st.st_size} bytes; a {what} is read whole and may be at most "
                                   f"{max_bytes} bytes", "is it the right file?")
    return st.st_size


def read_text_input(path: str | os.PathLike, what: str, max_bytes: int = MAX_TEXT_INPUT_BYTES) -> str:
    """The whole text of a small input file, after :func:`check_input_file`; never more than ``max_bytes``."""
    check_input_file(path, what, max_bytes)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
        with os.fdopen(fd, "rb") as f:
            if not stat.S_ISREG(os.fstat(f.fileno()).st_mode):  # swapped after the check
                raise InputFileError(path, "is not a regular file", f"give the path of a {what}")
            raw = f.read(max_bytes + 1)
    except OSError as exc:
        raise InputFileError(path, f"the {what} cannot be read ({exc.strerror})") from None
    if len(raw) > max_bytes:
        raise InputFileError(path, f"is more than {max_bytes} bytes; a {what} may be at most that")
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputFileError(path, f"the {what} is not UTF-8 text ({exc.reason} at byte {exc.start})") from None


def check_output_path(path: str | os.PathLike, option: str, made_here: tuple | list = ()) -> None:
    """Refuse at once an output that exists and is not a regular file (a FIFO would hang the writer, a
    directory or device cannot take a report), or whose folder is missing; the terminal's streams and
    ``/dev/null`` are allowed. ``made_here``: folders the same command creates (``--csv DIR``)."""
    if is_stream_output(path):
        return
    try:
        st = os.stat(path)
    except OSError:
        made = {os.path.abspath(f) for f in made_here}
        if os.path.dirname(os.path.abspath(path)) not in made:
            check_parent_folder(path, option)
        return  # does not exist yet (or cannot be seen): the atomic write reports any other problem
    kind = kind_of(st.st_mode)
    if kind:
        raise OutputError(f"{path}: {option} is {kind}, not a file; give the name of a file to write "
                          f"(or /dev/stdout)")


def check_parent_folder(path: str | os.PathLike, option: str) -> None:
    """Refuse an output whose folder does not exist: a mistyped folder is never created silently."""
    parent = Path(os.path.abspath(path)).parent
    if parent.is_dir():
        return
    shown = os.path.dirname(os.path.normpath(str(path))) or str(parent)
    if parent.exists() or parent.is_symlink():
        raise OutputError(f"{shown}: the folder for {option} is not a folder; give a path in an existing folder")
    raise OutputError(f"{shown}: the folder for {option} does not exist (nothing was created); create it "
                      f"first (mkdir -p {shown}) or give a path in an existing folder")


def check_output_dir(path: str | os.PathLike, option: str) -> None:
    """Refuse at once an output folder that exists and is not a directory, or whose own folder is missing.

    A missing ``path`` itself is created by the writer (the option names a folder to write into);
    a missing folder above it is refused, so a typing error never builds a tree of folders.
    """
    try:
        st = os.stat(path)
    except OSError:
        check_parent_folder(path, option)
        return
    if not stat.S_ISDIR(st.st_mode):
        raise OutputError(f"{path}: {option} is {kind_of(st.st_mode) or 'a file'}, not a folder; give a folder to write into")

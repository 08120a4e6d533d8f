"""Argument types and option groups shared by several verbs."""

from __future__ import annotations

import argparse
import math
import re

from buswitness.errors import UsageError
from buswitness.serial import SerialFormat, parse_baud

_DURATION = re.compile(r"(\d+(?:\.\d+)?)\s*(ms|s|m|h|d)", re.IGNORECASE | re.ASCII)
_UNITS_S = {"ms": 1e-3, "s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}
_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|KiB|MiB|GiB)?\s*$", re.IGNORECASE | re.ASCII)
#: A plain number as typed: ASCII digits only (Python's own parsers also take other scripts' digits,
#: underscores, 'inf' and 'nan').
_DECIMAL = re.compile(r"^[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?$", re.ASCII)
_INTEGER = re.compile(r"^[+-]?\d+$", re.ASCII)
#: Longest duration any option takes: one capture covers at most a year (capture/fileformat.py MAX_SPAN_NS).
MAX_DURATION_S = 366 * 86400.0
#: Largest size an option takes (1 TB): no rotated part or file is larger in practice (common practice).
MAX_SIZE_BYTES = 10**12
_SIZE_UNITS = {"b": 1, "kb": 1000, "mb": 1000**2, "gb": 1000**3, "kib": 1024, "mib": 1024**2, "gib": 1024**3}


def duration_s(text: str) -> float:
    """``"8h"``, ``"90s"``, ``"1h30m"``, ``"200ms"`` or a bare number of seconds, as seconds."""
    s = str(text).strip()
    if _DECIMAL.match(s):
        value = float(s)
    else:
        pos, value = 0, 0.0
        for m in _DURATION.finditer(s):
            if m.start() != pos:
                break
            value += float(m.group(1)) * _UNITS_S[m.group(2).lower()]
            pos = m.end()
        if pos != len(s) or not s:
            raise argparse.ArgumentTypeError(f"{text!r} is not a duration (e.g. 8h, 90m, 30s, 200ms)") from None
    if not (value > 0 and math.isfinite(value)):
        raise argparse.ArgumentTypeError(f"{text!r}: a duration must be a finite time of more than zero")
    if value > MAX_DURATION_S:
        raise argparse.ArgumentTypeError(f"{text!r}: a duration may be at most {MAX_DURATION_S / 86400:.0f} days")
    return value


def size_bytes(text: str) -> int:
    """``"200MB"``, ``"1GiB"`` or a bare byte count."""
    m = _SIZE.match(str(text))
    if not m:
        raise argparse.ArgumentTypeError(f"{text!r} is not a size (e.g. 200MB or 1GiB)")
    value = int(float(m.group(1)) * _SIZE_UNITS[(m.group(2) or "b").lower()])
    if value <= 0:
        raise argparse.ArgumentTypeError(f"{text!r}: a size must be more than zero")
    if value > MAX_SIZE_BYTES:
        raise argparse.ArgumentTypeError(f"{text!r}: a size may be at most 1TB")
    return value


def roles_arg(text: str) -> list[str]:
    """``master,slaves``: what each port hears, in port order."""
    roles = [r.strip().lower() for r in text.split(",")]
    bad = [r for r in roles if r not in ("master", "slaves", "both")]
    if bad or not 1 <= len(roles) <= 2:
        raise argparse.ArgumentTypeError(f"{text!r}: give one role per port, each master, slaves or both "
                                         f"(e.g. master,slaves)")
    return roles


def baud_arg(text: str) -> int:
    try:
        return parse_baud(text)
    except UsageError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def format_arg(text: str) -> str:
    try:
        return SerialFormat.parse(text).short_form
    except UsageError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


#: What ``--baud`` and ``--format`` fall back to when nothing else states the bus's setting.
DEFAULT_SERIAL = SerialFormat()


def protocol_arg(text: str) -> str:
    """A field protocol's registry name (old names rtu/ascii are understood)."""
    from buswitness.protocols import canonical
    try:
        return canonical(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def add_protocol_option(parser: argparse.ArgumentParser, from_file: bool = True) -> None:
    """``--protocol modbus-rtu|modbus-ascii|profibus-dp`` (the registry in buswitness.protocols)."""
    from buswitness.protocols import DEFAULT, NAMES
    own = "the capture's own, else " if from_file else ""
    parser.add_argument("--protocol", type=protocol_arg, default=None, metavar="|".join(NAMES),
                        help=f"the field protocol on the bus (default: {own}{DEFAULT})")


def add_serial_options(parser: argparse.ArgumentParser, required: bool = False, from_file: bool = True) -> None:
    """``--baud`` and ``--format``: the bus's own character format (not necessarily the port's).

    Each option replaces only its own half: ``--format 8N2`` keeps the baud rate and ``--baud``
    keeps the character format, both taken from the input file when it states them
    (``from_file``), else from :data:`DEFAULT_SERIAL`.
    """
    own = "the capture's own setting, else " if from_file else ""
    parser.add_argument("--baud", type=baud_arg, default=None, required=required,
                        help=f"bus baud rate, e.g. 9600 or 19200 (default: {own}{DEFAULT_SERIAL.baud}); "
                             f"changes only the baud rate, never the character format")
    parser.add_argument("--format", dest="char_format", type=format_arg, default=None,
                        help=f"bus character format: data bits, parity, stop bits, e.g. 8E1, 8N2, 8N1, 7E1 "
                             f"(default: {own}{DEFAULT_SERIAL.short_form}); changes only the format, never "
                             f"the baud rate")


def serial_from_args(args: argparse.Namespace, default: SerialFormat | None = None) -> SerialFormat | None:
    """The SerialFormat the options name, each given half replacing only its own half of ``default``.

    With neither option given, ``default`` itself (None: keep what the input states).
    """
    baud = getattr(args, "baud", None)
    fmt = getattr(args, "char_format", None)
    if baud is None and fmt is None:
        return default
    return (default or DEFAULT_SERIAL).overridden(baud, fmt)


def serial_halves(args: argparse.Namespace) -> dict:
    """``baud`` and ``char_format`` as ``open_capture`` takes them: each overrides only its half of the file's."""
    return {"baud": getattr(args, "baud", None), "char_format": getattr(args, "char_format", None)}


def add_input_options(parser: argparse.ArgumentParser) -> None:
    """How to read an input file that may be a capture, hex text or raw bytes."""
    parser.add_argument("--input-kind", choices=("auto", "capture", "hex", "raw"), default="auto",
                        help="what the input file is (default: recognised from its first bytes)")
    parser.add_argument("--on-bad-line", choices=("stop", "skip"), default="stop",
                        help="hex text only: stop at a malformed line (default) or skip it with a warning")
    add_serial_options(parser)


def number_arg(lo: float, hi: float, what: str, *, integer: bool = False):
    """An argparse type for a plain number from ``lo`` to ``hi``: ASCII digits, finite, range-checked."""
    pattern = _INTEGER if integer else _DECIMAL

    def parse(text: str) -> float | int:
        s = str(text).strip()
        if not pattern.match(s):
            kind = "a whole number" if integer else "a number"
            raise argparse.ArgumentTypeError(f"{text!r} is not {kind} ({what}, from {lo:g} to {hi:g})")
        value = int(s) if integer else float(s)
        if not (math.isfinite(value) and lo <= value <= hi):
            raise argparse.ArgumentTypeError(f"{text!r}: {what} must be from {lo:g} to {hi:g}")
        return value

    return parse


def duration_at_most(limit_s: float, why: str):
    """An argparse type: a duration (see :func:`duration_s`) of at most ``limit_s``."""
    def parse(text: str) -> float:
        value = duration_s(text)
        if value > limit_s:
            raise argparse.ArgumentTypeError(f"{text!r}: at most {limit_s / 3600:g} h ({why})")
        return value

    return parse


def check_port(name: str) -> None:
    """Refuse at once a port argument that names something other than a serial device.

    A pyserial URL or a path that does not exist (yet) is left to the recorder; a FIFO, directory,
    regular file or a character device that the kernel does not list as a tty (``/dev/zero``)
    is a usage error. Pseudo-terminals have no sysfs entry and pass.
    """
    import os
    import stat as st_

    from buswitness.fsutil import kind_of

    if "://" in name:
        return
    try:
        st = os.stat(name)
    except OSError:
        return
    if st_.S_ISCHR(st.st_mode):
        link = f"/sys/dev/char/{os.major(st.st_rdev)}:{os.minor(st.st_rdev)}/subsystem"
        if os.path.exists(link) and os.path.basename(os.path.realpath(link)) != "tty":
            raise UsageError(f"{name}: is a character device but not a serial port (the kernel lists it "
                             f"under {os.path.basename(os.path.realpath(link))}, not tty)")
        return
    kind = kind_of(st.st_mode) or "a regular file"
    raise UsageError(f"{name}: is {kind}, not a serial port (give e.g. /dev/ttyUSB0)")

"""Argument types and option groups shared by several verbs."""

from __future__ import annotations

import argparse
import math
import re

from buswitness.errors import UsageError
from buswitness.serial import SerialFormat, parse_baud

_DURATION = re.compile(r"(\d+(?:\.\d+)?)\s*(ms|s|m|h|d)", re.IGNORECASE)
_UNITS_S = {"ms": 1e-3, "s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}
_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|KiB|MiB|GiB)?\s*$", re.IGNORECASE)
_SIZE_UNITS = {"b": 1, "kb": 1000, "mb": 1000**2, "gb": 1000**3, "kib": 1024, "mib": 1024**2, "gib": 1024**3}


def duration_s(text: str) -> float:
    """``"8h"``, ``"90s"``, ``"1h30m"``, ``"200ms"`` or a bare number of seconds, as seconds."""
    s = str(text).strip()
    try:
        value = float(s)
    except ValueError:
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
    return value


def size_bytes(text: str) -> int:
    """``"200MB"``, ``"1GiB"`` or a bare byte count."""
    m = _SIZE.match(str(text))
    if not m:
        raise argparse.ArgumentTypeError(f"{text!r} is not a size (e.g. 200MB or 1GiB)")
    value = int(float(m.group(1)) * _SIZE_UNITS[(m.group(2) or "b").lower()])
    if value <= 0:
        raise argparse.ArgumentTypeError(f"{text!r}: a size must be more than zero")
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

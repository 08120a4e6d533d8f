"""Open any input buswitness accepts, by content: a capture file (or rotated set), hex text, raw bytes."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import Protocol

from buswitness.capture.fileformat import MAGIC, CaptureHeader, CaptureReader, ReadReport, RecordBatch
from buswitness.capture.importers import HexTextSource, RawBinarySource, looks_like_hex_text
from buswitness.errors import InputFileError, NotACaptureError, UsageError
from buswitness.fsutil import check_input_file
from buswitness.serial import SerialFormat

INPUT_KINDS = ("auto", "capture", "hex", "raw")


class CaptureSource(Protocol):
    """What every input offers: a header, record batches in time order, and a damage report."""

    header: CaptureHeader
    report: ReadReport
    paths: list[Path]

    def iter_batches(self) -> Iterator[RecordBatch]: ...


def open_capture(path: str | os.PathLike, kind: str = "auto", serial: SerialFormat | None = None,
                 on_bad_line: str = "stop", *, baud: int | None = None,
                 char_format: str | None = None) -> CaptureSource:
    """Open ``path`` read-only as the given kind, or guess it from the first bytes.

    ``serial`` replaces the settings the file carries whole. ``baud`` and ``char_format``
    (``"8N2"``) each replace only their own half of the file's setting, or of the default
    (19200 8E1) when the file states none (raw bytes, hex text without ``# baud:`` lines).
    """
    if kind not in INPUT_KINDS:
        raise UsageError(f"input kind {kind!r} is not one of {', '.join(INPUT_KINDS)}")
    p = Path(path)
    check_input_file(p, "capture file")
    if kind == "auto":
        kind = _guess_kind(p)
    source: CaptureSource
    if kind == "capture":
        source = CaptureReader(p)
        if serial is not None:
            source.header.serial = serial
    elif kind == "hex":
        source = HexTextSource(p, serial=serial, on_bad_line=on_bad_line)
    else:
        if serial is None and (baud is not None or char_format is not None):
            serial = SerialFormat().overridden(baud, char_format)
        return RawBinarySource(p, serial=serial)
    source.header.serial = source.header.serial.overridden(baud, char_format)
    return source


def _guess_kind(p: Path) -> str:
    try:
        with open(p, "rb") as f:
            head = f.read(len(MAGIC))
    except OSError as exc:
        raise InputFileError(p, f"cannot be read ({exc.strerror or exc.__class__.__name__})") from None
    if not head:
        raise NotACaptureError(p, "is empty", "nothing was recorded into it")
    if head.startswith(MAGIC[:4]):
        return "capture"
    if looks_like_hex_text(p):
        return "hex"
    raise NotACaptureError(
        p, "is neither a buswitness capture nor timestamped hex text",
        "if it holds raw bytes from the bus, pass --input-kind raw with --baud and --format")

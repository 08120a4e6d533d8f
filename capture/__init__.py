"""Capture: raw bytes with host timestamps, the capture file, importers, and live recording."""

from buswitness.capture.fileformat import (
    FLAG_BREAK,
    FLAG_DISCONNECTED,
    FLAG_LINE_ERROR,
    FLAG_LOST,
    FLAG_PAUSED,
    FLAG_REOPENED,
    FLAG_UNTIMED,
    FORMAT_VERSION,
    CaptureHeader,
    CaptureReader,
    CaptureWriter,
    PortInfo,
    ReadReport,
    Record,
    RecordBatch,
    flag_names,
    read_header,
)
from buswitness.capture.sources import CaptureSource, open_capture

__all__ = [
    "FLAG_BREAK",
    "FLAG_DISCONNECTED",
    "FLAG_LINE_ERROR",
    "FLAG_LOST",
    "FLAG_PAUSED",
    "FLAG_REOPENED",
    "FLAG_UNTIMED",
    "FORMAT_VERSION",
    "CaptureHeader",
    "CaptureReader",
    "CaptureSource",
    "CaptureWriter",
    "PortInfo",
    "ReadReport",
    "Record",
    "RecordBatch",
    "flag_names",
    "open_capture",
    "read_header",
]

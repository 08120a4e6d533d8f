"""PARMRK unescaping at the byte level: 0xFF data, marked bytes, breaks, escapes split across reads.

Escape sequences are those of termios(3) (REFERENCES.md §6): ``FF FF`` is one 0xFF data
byte, ``FF 00 X`` is byte X received with a parity or framing error, ``FF 00 00`` a break.
Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

from __future__ import annotations

import os
import termios
import time

import pytest
import serial
from buswitness.capture.fileformat import FLAG_BREAK, FLAG_LINE_ERROR
from buswitness.capture.parmrk import ParmrkParser
from buswitness.capture.serialport import enable_error_marking, is_pty
from hypothesis import given, settings
from hypothesis import strategies as st

# (escaped input, expected segments) — termios(3) PARMRK rules.
VECTORS = (
    (b"\x01\x02\x03", [(b"\x01\x02\x03", 0)]),
    (b"\x01\xff\xff\x02", [(b"\x01\xff\x02", 0)]),
    (b"\xff\xff\xff\xff", [(b"\xff\xff", 0)]),
    (b"\x01\xff\x00\x41\x02", [(b"\x01", 0), (b"\x41", FLAG_LINE_ERROR), (b"\x02", 0)]),
    (b"\xff\x00\xff", [(b"\xff", FLAG_LINE_ERROR)]),  # a marked 0xFF is not doubled
    (b"\x01\xff\x00\x00\x02", [(b"\x01", 0), (b"", FLAG_BREAK), (b"\x02", 0)]),
    (b"\xff\x00\x10\xff\x00\x20", [(b"\x10", FLAG_LINE_ERROR), (b"\x20", FLAG_LINE_ERROR)]),
)


def _merge(segments):
    """Join neighbouring unflagged runs: chunking may split a good run, never change its bytes."""
    out = []
    for data, flags in segments:
        if out and flags == 0 and out[-1][1] == 0:
            out[-1] = (out[-1][0] + data, 0)
        elif data or flags:
            out.append((data, flags))
    return out


@pytest.mark.parametrize("raw, expected", VECTORS)
def test_vector_whole(raw, expected):
    assert ParmrkParser().feed(raw) == expected


@pytest.mark.parametrize("raw, expected", VECTORS)
def test_vector_byte_by_byte_gives_the_same_result(raw, expected):
    parser = ParmrkParser()
    segments = []
    for b in raw:
        segments += parser.feed(bytes((b,)))
    assert _merge(segments) == expected
    assert not parser.pending


@pytest.mark.parametrize("raw, expected", VECTORS)
def test_vector_split_at_every_point_gives_the_same_result(raw, expected):
    for cut in range(len(raw) + 1):
        parser = ParmrkParser()
        assert _merge(parser.feed(raw[:cut]) + parser.feed(raw[cut:])) == expected


def test_escape_split_across_two_reads_is_one_data_byte():
    parser = ParmrkParser()
    assert parser.feed(b"\x05\xff") == [(b"\x05", 0)]
    assert parser.pending
    assert parser.feed(b"\xff\x06") == [(b"\xff\x06", 0)]


def test_marked_byte_split_after_ff_00_is_still_marked():
    parser = ParmrkParser()
    assert parser.feed(b"\xff\x00") == []
    assert parser.feed(b"\x7f") == [(b"\x7f", FLAG_LINE_ERROR)]
    assert parser.marked_bytes == 1


def test_break_is_counted_and_has_no_data():
    parser = ParmrkParser()
    assert parser.feed(b"\xff\x00\x00") == [(b"", FLAG_BREAK)]
    assert parser.breaks == 1


def test_unfinished_escape_at_close_is_kept_as_its_bytes():
    parser = ParmrkParser()
    parser.feed(b"\x01\xff")
    assert parser.flush() == [(b"\xff", 0)]
    parser.feed(b"\xff\x00")
    assert parser.flush() == [(b"\xff\x00", 0)]
    assert not parser.pending


def test_ff_followed_by_another_byte_is_passed_through_unchanged():
    # Not a PARMRK sequence: the port was not in marking mode; nothing is dropped.
    assert ParmrkParser().feed(b"\xff\x41") == [(b"\xff\x41", 0)]


def _pty_port():
    master, slave = os.openpty()
    ser = serial.serial_for_url(os.ttyname(slave), baudrate=19200, timeout=0.5)
    return master, slave, ser


def test_real_pty_doubles_ff_and_the_parser_undoes_it():
    master, slave, ser = _pty_port()
    try:
        assert enable_error_marking(ser)
        os.write(master, b"\x01\xff\x02")
        time.sleep(0.1)
        raw = ser.read(ser.in_waiting)
        assert raw == b"\x01\xff\xff\x02"  # the tty layer escaped the real 0xFF
        assert ParmrkParser().feed(raw) == [(b"\x01\xff\x02", 0)]
    finally:
        ser.close()
        os.close(master)
        os.close(slave)


def test_real_pty_with_parity_keeps_marking_after_reconfiguration():
    master, slave, ser = _pty_port()
    try:
        assert is_pty(os.ttyname(slave))
        try:
            ser.parity = serial.PARITY_EVEN
            kept = bool(termios.tcgetattr(ser.fd)[2] & termios.PARENB)
        except termios.error:
            kept = False
        if not kept:
            pytest.skip("this kernel's pseudo-terminals refuse parity settings (EINVAL), so parity marking "
                        "cannot be tried on a pty; the parser tests above cover the marks byte by byte")
        # pyserial cleared the marks when it reconfigured; they must be re-applied.
        assert enable_error_marking(ser)
        os.write(master, b"\xff")
        time.sleep(0.1)
        assert ParmrkParser().feed(ser.read(ser.in_waiting)) == [(b"\xff", 0)]
    finally:
        ser.close()
        os.close(master)
        os.close(slave)


def _escape(items):
    """What the tty layer delivers for (byte, kind) items, kind in good/bad/break (termios(3) PARMRK)."""
    out = bytearray()
    for value, kind in items:
        if kind == "break":
            out += b"\xff\x00\x00"
        elif kind == "bad":
            out += bytes((0xFF, 0x00, value))
        elif value == 0xFF:
            out += b"\xff\xff"
        else:
            out.append(value)
    return bytes(out)


_items = st.lists(st.tuples(st.integers(0, 255), st.sampled_from(["good", "good", "good", "bad", "break"])),
                  max_size=60)


@settings(max_examples=300, deadline=None)
@given(items=_items, cuts=st.lists(st.integers(0, 200), max_size=8))
def test_any_stream_cut_anywhere_gives_back_its_bytes_marks_and_breaks(items, cuts):
    raw = _escape(items)
    parser = ParmrkParser()
    segments = []
    pos = 0
    for cut in sorted(c for c in cuts if c <= len(raw)):
        segments += parser.feed(raw[pos:cut])
        pos = cut
    segments += parser.feed(raw[pos:])
    assert not parser.pending
    expected = []
    for value, kind in items:
        if kind == "break":
            expected.append((b"", FLAG_BREAK))
        elif kind == "bad" and value != 0:
            expected.append((bytes((value,)), FLAG_LINE_ERROR))
        elif kind == "bad":
            expected.append((b"", FLAG_BREAK))  # a marked NUL reads as FF 00 00, the same as a break
        else:
            expected.append((bytes((value,)), 0))
    assert _merge(segments) == _merge(expected)

"""Undo the termios PARMRK escaping of serial input, as a stream.

With INPCK and PARMRK set (and ISTRIP, IGNPAR clear) the Linux tty layer marks what the
UART reported bad (termios(3); REFERENCES.md §6):

* ``FF FF``     one real 0xFF data byte;
* ``FF 00 X``   byte ``X`` arrived with a parity or framing error;
* ``FF 00 00``  a break (the line held low for longer than a character).

An escape may be split across two reads, so the parser keeps its state between calls.
Each call returns segments ``(bytes, flags)`` in arrival order: runs of good bytes, each
marked byte alone with ``FLAG_LINE_ERROR``, each break as an empty segment with ``FLAG_BREAK``.
"""

from __future__ import annotations

from buswitness.capture.fileformat import FLAG_BREAK, FLAG_LINE_ERROR

_ESC = 0xFF

# Parser states: plain data, after FF, after FF 00.
_DATA, _AFTER_FF, _AFTER_FF00 = 0, 1, 2

Segment = tuple[bytes, int]


class ParmrkParser:
    """Turn PARMRK-escaped chunks back into data bytes, line-error marks and breaks."""

    def __init__(self) -> None:
        self._state = _DATA
        self.marked_bytes = 0
        self.breaks = 0

    @property
    def pending(self) -> bool:
        """True while an escape sequence is cut off at the end of the last chunk."""
        return self._state != _DATA

    def feed(self, chunk: bytes) -> list[Segment]:
        """Parse one read's bytes; an escape cut off at the end is completed by the next call."""
        if self._state == _DATA and _ESC not in chunk:
            return [(bytes(chunk), 0)] if chunk else []
        out: list[Segment] = []
        run = bytearray()
        i, n = 0, len(chunk)
        while i < n:
            if self._state == _DATA:
                j = chunk.find(b"\xff", i)
                if j < 0:
                    run += chunk[i:]
                    break
                run += chunk[i:j]
                self._state = _AFTER_FF
                i = j + 1
            elif self._state == _AFTER_FF:
                b = chunk[i]
                i += 1
                if b == _ESC:
                    run.append(_ESC)
                    self._state = _DATA
                elif b == 0:
                    self._state = _AFTER_FF00
                else:
                    # Not a PARMRK sequence (the port was not in marking mode): keep both bytes.
                    run += bytes((_ESC, b))
                    self._state = _DATA
            else:
                b = chunk[i]
                i += 1
                self._state = _DATA
                if run:
                    out.append((bytes(run), 0))
                    run = bytearray()
                if b == 0:
                    self.breaks += 1
                    out.append((b"", FLAG_BREAK))
                else:
                    self.marked_bytes += 1
                    out.append((bytes((b,)), FLAG_LINE_ERROR))
        if run:
            out.append((bytes(run), 0))
        return out

    def flush(self) -> list[Segment]:
        """End of input (port closed): an unfinished escape is kept as the bytes it was."""
        state, self._state = self._state, _DATA
        if state == _AFTER_FF:
            return [(b"\xff", 0)]
        if state == _AFTER_FF00:
            return [(b"\xff\x00", 0)]
        return []

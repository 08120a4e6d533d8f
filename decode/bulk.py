"""The framer's bulk path: regular traffic framed by a guess-and-verify walk, CRCs checked in columns.

On a healthy bus requests and responses alternate, so the length of each frame follows from
its function code, its byte-count field and the direction the alternation predicts. The walk
only adds integers (no CRC) and yields candidate frames; :func:`verify` then checks every
CRC at once with :func:`~buswitness.decode.crc.crc16_rows`, one numpy pass per frame length.
Everything up to the first frame that fails — or that could also be split another way — is
accepted; from there the sequential framer (:mod:`buswitness.decode.framer`) takes over until
the stream is regular again. The two paths give the same frames on the same bytes.
"""

from __future__ import annotations

import numpy as np

from buswitness.decode.crc import crc16_rows
from buswitness.decode.framer import RegionScanner, Span
from buswitness.decode.lengths import _BC8, _FIXED, _RULES, EITHER, MAX_FRAME, MIN_FRAME, REQUEST, RESPONSE

#: The walk stops this many bytes before the end so every length field it reads is present.
LOOKAHEAD = 12


def _tables() -> tuple[list[int], list[int], list[int], list[int], list[int], list[int]]:
    """Per function code: length = base + mul * buf[p + off], for requests and for responses (0: no rule)."""
    rb, rm, ro = [0] * 256, [0] * 256, [0] * 256
    sb, sm, so = [0] * 256, [0] * 256, [0] * 256
    for fc, (req, rsp) in _RULES.items():
        if fc == 0x2B:
            continue  # the device-identification answer needs its object list walked
        for (kind, off, base), b, m, o in ((req, rb, rm, ro), (rsp, sb, sm, so)):
            if kind == _FIXED:
                b[fc] = base
            elif kind == _BC8:
                b[fc], m[fc], o[fc] = base, 1, off
    for fc in range(0x80, 0x100):
        if (fc & 0x7F) in _RULES:
            sb[fc] = 5
    return rb, rm, ro, sb, sm, so


_RB, _RM, _RO, _SB, _SM, _SO = _tables()


def walk(buf: bytes, p: int, end: int, expect_response: bool) -> tuple[list[int], list[int], list[int], list[int]]:
    """Candidate frames from ``p`` on: starts, lengths, shapes and the other direction's length.

    Stops at a code without a rule, an impossible length, or ``LOOKAHEAD`` bytes before ``end``.
    """
    starts: list[int] = []
    lens: list[int] = []
    shapes: list[int] = []
    alts: list[int] = []
    add_start, add_len, add_shape, add_alt = starts.append, lens.append, shapes.append, alts.append
    rb, rm, ro, sb, sm, so = _RB, _RM, _RO, _SB, _SM, _SO
    stop = end - LOOKAHEAD
    while p <= stop:
        fc = buf[p + 1]
        lreq = rb[fc] + rm[fc] * buf[p + ro[fc]]
        lrsp = sb[fc] + sm[fc] * buf[p + so[fc]]
        if (expect_response and lrsp) or not lreq:
            length, alt, shape = lrsp, lreq, RESPONSE
            expect_response = False
        else:
            length, alt, shape = lreq, lrsp, REQUEST
            expect_response = True
        if length < MIN_FRAME or length > MAX_FRAME or p + length > end:
            break
        add_start(p)
        add_len(length)
        add_shape(shape)
        add_alt(alt)
        p += length
    return starts, lens, shapes, alts


def verify(arr: np.ndarray, starts: np.ndarray, lens: np.ndarray, alts: np.ndarray) -> int:
    """How many leading candidates are sure frames: CRC good, and no longer split equally possible.

    A frame followed by 0x00 stays CRC-valid when that byte is added (the CRC of 0x00 from a
    zero state is zero); where the other direction's rule allows exactly that length, the
    candidate is ambiguous and left to the sequential framer.
    """
    n = starts.shape[0]
    if n == 0:
        return 0
    bad = np.zeros(n, dtype=bool)
    for length in np.unique(lens).tolist():
        sel = np.flatnonzero(lens == length)
        rows = arr[starts[sel, None] + np.arange(length)]
        bad[sel] = crc16_rows(rows) != 0
    ends = starts + lens
    longer = (alts == lens + 1)
    if longer.any():
        nxt = arr[np.minimum(ends, arr.shape[0] - 1)]
        bad |= longer & (nxt == 0)
    first = np.flatnonzero(bad)
    return int(first[0]) if first.size else n


def bulk_spans(buf: bytes, arr: np.ndarray, p: int, end: int, expect_response: bool
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """Sure frames from ``p``: starts, lengths, shapes (numpy, possibly empty) and the next guess.

    A frame whose request and response rules give the same length gets shape ``EITHER``:
    only the pairing state can say which it is (echo codes, FC01 answers of 3 bytes).
    """
    starts, lens, shapes, alts = walk(buf, p, end, expect_response)
    s = np.asarray(starts, dtype=np.int64)
    n = np.asarray(lens, dtype=np.int64)
    a = np.asarray(alts, dtype=np.int64)
    n_ok = verify(arr, s, n, a)
    if n_ok:
        expect_response = shapes[n_ok - 1] == REQUEST
    sh = np.where(a[:n_ok] == n[:n_ok], EITHER, np.asarray(shapes[:n_ok], dtype=np.int8)).astype(np.int8)
    return s[:n_ok], n[:n_ok], sh, expect_response


def frame_only(payload: bytes | np.ndarray) -> int:
    """Frame a byte stream with no timing (bulk path plus sequential fallback); return the frame count.

    The framing-only figure for the benchmark: CRC-valid frames found, nothing else built.
    """
    arr = np.frombuffer(bytes(payload), dtype=np.uint8) if not isinstance(payload, np.ndarray) else payload
    buf = arr.tobytes()
    end = len(buf)
    count, p, expect = 0, 0, False
    scanner = RegionScanner()
    while p < end:
        starts, lens, _shapes, expect = bulk_spans(buf, arr, p, end, expect)
        if starts.size:
            count += starts.size
            p = int(starts[-1] + lens[-1])
        out: list[Span] = []
        scanner.pos, scanner.junk_start, scanner.anchored = p, None, True
        scanner.scan(buf, end, True, out, frames=2)
        frames = [s for s in out if s.shape]
        count += len(frames)
        if frames:
            expect = frames[-1].shape == REQUEST if frames[-1].shape != EITHER else not expect
        if scanner.pos <= p:
            break
        p = scanner.pos
    return count

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
from buswitness.decode.lengths import (_BC8, _FIXED, _RULES, EITHER, MAX_FRAME, MIN_FRAME, REQUEST, RESPONSE,
                                       vector_lengths)

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


def walk(buf: bytes, p: int, end: int, expect_response: bool) -> tuple[list[int], list[bool], int]:
    """Candidate frames from ``p`` on: their starts, whether each was taken as a request, and where they end.

    The length comes from the rule of the expected direction (the other one when that has
    none). Stops at a code without a rule, an impossible length, or ``LOOKAHEAD`` bytes
    before ``end``. This loop is the bulk path's only per-frame Python work: keep it lean.
    """
    starts: list[int] = []
    requests: list[bool] = []
    add_start, add_kind = starts.append, requests.append
    rb, rm, ro, sb, sm, so = _RB, _RM, _RO, _SB, _SM, _SO
    stop = end - LOOKAHEAD
    if not expect_response:
        # The common case, a request and its answer, two frames per turn of the loop.
        while p <= stop:
            fc = buf[p + 1]
            n = rb[fc] + rm[fc] * buf[p + ro[fc]]
            q = p + n
            if not n or n > MAX_FRAME or q > stop:
                break
            fc = buf[q + 1]
            m = sb[fc] + sm[fc] * buf[q + so[fc]]
            if m < MIN_FRAME or m > MAX_FRAME or q + m > end:
                break
            add_start(p)
            add_start(q)
            p = q + m
        requests = [True, False] * (len(starts) // 2)
        add_kind = requests.append
    while p <= stop:
        fc = buf[p + 1]
        if expect_response:
            n = sb[fc] + sm[fc] * buf[p + so[fc]]
            if n:
                expect_response = False
            else:
                n = rb[fc] + rm[fc] * buf[p + ro[fc]]
        else:
            n = rb[fc] + rm[fc] * buf[p + ro[fc]]
            if n:
                expect_response = True
            else:
                n = sb[fc] + sm[fc] * buf[p + so[fc]]
        if n < MIN_FRAME or n > MAX_FRAME or p + n > end:
            break
        add_start(p)
        add_kind(expect_response)
        p += n
    return starts, requests, p


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
    starts, requests, stop = walk(buf, p, end, expect_response)
    if not starts:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int8), expect_response
    s = np.asarray(starts, dtype=np.int64)
    n = np.diff(np.append(s, stop))
    is_req = np.asarray(requests, dtype=bool)
    req_len, rsp_len = vector_lengths(arr, s)
    a = np.where(is_req, rsp_len, req_len)
    n_ok = verify(arr, s, n, a)
    if n_ok:
        expect_response = bool(is_req[n_ok - 1])
    shapes = np.where(is_req, REQUEST, RESPONSE)
    sh = np.where(a[:n_ok] == n[:n_ok], EITHER, shapes[:n_ok]).astype(np.int8)
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

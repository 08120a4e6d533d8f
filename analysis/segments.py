"""Decoding a long capture on every core: time segments decoded at once, joined where they agree.

The capture's records are cut into steps (at most ``STEP_RECORDS`` records of one block), the
same steps in every process, and the steps into ``jobs`` segments by their place in the file,
of about equal work: the first, which needs no warm-up, takes that much more (:meth:`Plan.cut`).
Segment ``k`` is decoded by its own process, which starts ``WARM_BYTES`` of records (or a
sixteenth of the capture) before the segment's cut with a fresh decoder: by the cut, that
decoder has usually seen the open requests, the master's waits and the stations' usual answers
the decode from the start of the capture has seen (decoder state that crosses the seam). The
process before it decodes on ``OVER_STEPS`` steps past the cut.

The join is checked, never assumed. Over the overlap the two processes' tables (frames,
transactions, events, and the timing contradictions counted) must be the same, step by step,
from half-way through the warm-up to the end of the overlap; and at the handover the later
decoder must be in the earlier one's state (:func:`decoder_state`: pairing, the queue to it,
framing and byte times; positions relative, counters as far as a rule reads them). The one
thing a later decoder cannot know, a station's slowest answer since the capture began, must not
have been read by pairing before both agree on it (:func:`_slowest_settled`). Then the later
decoder's tables after the overlap are the ones a single pass gives, for the same records. Each segment's rows from the end of its own
overlap to the end of the next overlap go into its figures, and the figures of the segments
merge into those of the whole capture (analysis/figures.py ``Figures.merge`` joins contiguous
parts of one capture exactly). Where a seam's two decodes never agree, the first segment's decoder
(in the calling process, from the capture's start) goes on to the end: the capture in one pass,
with a notice, without decoding the first segment again (only if that decoder stopped short, a
read error before its overlap's end say, is the capture decoded again from the start).
"""

from __future__ import annotations

import copy
import hashlib
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, fields

import numpy as np
from buswitness.capture.fileformat import INDEX_DTYPE, ReadReport, SkimmedBlock, WatchPoint
from buswitness.decode.rawbytes import RawColumn
from buswitness.records import RecordBatch

#: Records per step (at most, from one block; blocks are joined up to it): the unit in which two
#: decodes of an overlap are compared.
STEP_RECORDS = 1 << 15
#: ... or this many bytes of payload, whichever comes first (the decoder's cost per call wants large
#: steps, memory and the overlap small ones: 24 h at 1 ms in two segments, 16k records a step 15.9 s,
#: 32k 12.9-14.1 s, 64k 14.4 s; peak of the 16 ms bench day 250, 267-271, 335 MB).
STEP_BYTES = 2 << 20
#: Bytes of records a segment's decoder sees before its cut (its warm-up): four steps at least.
WARM_BYTES = 8 << 20
#: ... or this share of the capture when that is more (1/16: about 3 % more decoding on two cores).
WARM_SHARE = 16
#: Steps the previous segment decodes past the cut.
OVER_STEPS = 2
#: A capture smaller than this is decoded in one pass: starting processes costs more than it saves,
#: and a seam that does not join costs the later segments' work (the 8 h demo night at 19200, 17 MB:
#: 72 s in segments whose seam failed, 43 s in one pass, when a failed seam meant a second decode
#: from the start; a 1 h 115200 capture, 46 MB, gains 10 %).
PARALLEL_MIN_BYTES = 64 << 20
#: At most this many segments, whatever the core count.
MAX_JOBS = 8
_RECORD_BYTES = INDEX_DTYPE.itemsize  # one record's entry in a block's index


def output_digest(out, contradictions: tuple = ()) -> str:
    """A digest of every value of the three tables' columns, in order (and the step's timing contradictions).

    Read from the decoder's numpy columns (decode/tables.py ``DecodeOutput.columns``): no DataFrame
    is built, and a bytes column is hashed as its lengths and its bytes joined.
    """
    h = hashlib.sha256(repr(contradictions).encode())  # about twice blake2b's speed on this CPU (SHA instructions)
    for table in out.columns():
        h.update(f"|{len(table)}|".encode())
        for name, col in table.data.items():
            if isinstance(col, np.ndarray) and col.dtype != object:
                h.update(f"{name}:{col.dtype}".encode())
                h.update(np.ascontiguousarray(col).tobytes())
                continue
            if isinstance(col, RawColumn):
                lens, data = col.joined()
            else:
                values = [v if isinstance(v, (bytes, bytearray)) else repr(v).encode() for v in col]
                lens, data = np.fromiter(map(len, values), np.int64, len(values)), b"".join(values)
            h.update(f"{name}:object".encode())
            h.update(lens.tobytes())
            h.update(data)
    return h.hexdigest()


def _walk(x, rel: int, seen: set) -> object:
    """A plain, comparable form of decoder state; ``rel`` is subtracted from stream positions."""
    if x is None or isinstance(x, (bool, int, float, str, bytes)):
        return x
    if isinstance(x, (bytearray, memoryview)):
        return bytes(x)
    if isinstance(x, np.ndarray):
        return (str(x.dtype), x.shape, x.tobytes())
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, (list, tuple)) or type(x).__name__ == "deque":
        return (type(x).__name__, tuple(_walk(v, rel, seen) for v in x))
    if isinstance(x, (set, frozenset)):
        return ("set", tuple(sorted(repr(_walk(v, rel, seen)) for v in x)))
    if isinstance(x, dict):
        return ("dict", tuple(sorted((repr(k), _walk(v, rel, seen)) for k, v in x.items())))
    if id(x) in seen:
        return ("seen", type(x).__name__)
    seen.add(id(x))
    attrs = getattr(x, "__dict__", None)
    if attrs is None:
        slots = [n for c in type(x).__mro__ for n in getattr(c, "__slots__", ())]
        attrs = {n: getattr(x, n) for n in slots if hasattr(x, n)}
    return (type(x).__qualname__, tuple(sorted((k, _walk(v, rel, seen)) for k, v in attrs.items())))


def _station_state(st) -> object:
    """A station's record as pairing decides by it (decode/pairing.py): counts only as far as a rule
    reads them (at least STATION_MIN_ANSWERS, none; at least DEAD_AFTER). Its slowest answer (a
    maximum over the whole capture, which a decoder started later cannot know) is compared apart
    (:func:`slowest_answers`)."""
    from buswitness.decode import pairing as pr
    rest = {k: v for k, v in vars(st).items() if k not in ("answers", "unanswered", "slowest_ns")}
    return (min(st.answers, pr.STATION_MIN_ANSWERS), min(st.unanswered, pr.DEAD_AFTER), _walk(rest, 0, set()))


def slowest_answers(decoder) -> dict[int, float]:
    """Each station's slowest answer as pairing reads it (``Pairing._slowest_ns`` floors it)."""
    from buswitness.decode import pairing as pr
    floor = pr.ECHO_FLOOR_NS / pr.ECHO_SLACK
    return {a: max(st.slowest_ns, floor) for a, st in decoder.pairing.stations.items()}


def _watch_slowest(decoder, consulted: set, step: list) -> None:
    """Note every step in which pairing reads a slowest answer (all its reads go through ``_slowest_ns``)."""
    pairing = decoder.pairing
    read = pairing._slowest_ns

    def watched(st):
        consulted.add(step[0])
        return read(st)

    pairing._slowest_ns = watched


def decoder_state(decoder) -> str | None:
    """A digest of everything in ``decoder`` that decides its later output, stream positions taken
    relative to each port's unsettled bytes and counters as far as a rule reads them; None where
    the decoder is not the one this knows (a seam is then never joined)."""
    from buswitness.decode.pairing import Pairing
    pairing = decoder.pairing
    if type(pairing) is not Pairing:
        return None
    h = hashlib.blake2b(digest_size=20)
    p_state = {k: v for k, v in vars(pairing).items() if k not in ("stations", "answers", "_slowest_ns")}
    h.update(repr(_walk(p_state, 0, set())).encode())
    for addr in sorted(pairing.stations):
        h.update(repr((addr, _station_state(pairing.stations[addr]))).encode())
    # the queue between framing and pairing: keys and items, without the running sequence numbers
    h.update(repr([(key, _walk(item, 0, set())) for key, _seq, item in sorted(decoder._queue)]).encode())
    for port_id in sorted(decoder.ports):
        port = decoder.ports[port_id]
        base = port.base
        tl = port.timeline
        # the held records (relative positions below, their times and floors as they are); the storage
        # layout (_ints/_floors capacity, _lo/_n) depends on history and decides nothing
        timeline = {k: v for k, v in vars(tl).items()
                    if k not in ("starts", "lasts", "_next_pos", "contradictions", "_ints", "_floors", "_lo", "_n",
                                 "_p_pos", "_p_t", "_p_prev")}
        # the pending read by relative position; nan (none pending) compared as None
        timeline["pending"] = (None if tl._p_t != tl._p_t else (tl._p_t, tl._p_prev, tl._p_pos - base))
        timeline["held"] = (tl.times.tolist(), tl.floors.tolist(), tl.pre_floors.tolist(),
                            (tl.windows - base).tolist())
        marks = {k: [v[0], v[1], bytes(v[2]), v[3] - base] for k, v in port._marks.items()}
        held = [(pos - base, t, _walk(msg, 0, set())) for pos, t, msg in port._held]
        rest = {k: v for k, v in vars(port).items()
                if k not in ("base", "timeline", "silence_at", "_marks", "_held", "proto", "timing")}
        h.update(repr((port_id, _walk(rest, 0, set()), (tl.starts - base).tolist(), (tl.lasts - base).tolist(),
                       tl._next_pos - base, _walk(timeline, 0, set()), [x - base for x in port.silence_at],
                       marks, held)).encode())
    return h.hexdigest()


def steps(reader, skip_before: int = 0) -> Iterator[tuple[int, int, RecordBatch]]:
    """(step index, place in the file before it, records) over the whole capture, the same in every process.

    A block larger than ``STEP_RECORDS`` is cut; smaller consecutive blocks (a recording writes
    one a second) are joined up to ``STEP_RECORDS`` records or ``STEP_BYTES`` bytes, as the
    one-pass decode joins them (decode/decoder.py ``joined_batches``): the decoder's cost is per
    call, and a step is also the unit the overlap digests are compared in.

    Steps that start before ``skip_before`` are counted and placed but neither built nor
    yielded: a later segment passes over the capture's first part only to number its steps. A
    reader that can, skims the blocks there (``iter_skimming``: checked, not unpacked); records a
    full reading would leave out there (an impossible time) number the steps after them otherwise,
    which the segment's :class:`WatchPoint` shows (:func:`seams_agree`).
    """
    i = pos = start = count = size = 0
    pending: list[RecordBatch] = []
    skims = skip_before > 0 and hasattr(reader, "iter_skimming")
    for batch in reader.iter_skimming(skip_before, STEP_RECORDS) if skims else reader.iter_batches():
        n = len(batch)
        if not n:
            continue
        skimmed = isinstance(batch, SkimmedBlock)
        lengths = batch.lengths if skimmed else batch.length
        ends = np.cumsum(lengths) if lengths is not None else None  # None: a skimmed block of one step
        for a in range(0, n, STEP_RECORDS):
            b = min(a + STEP_RECORDS, n)
            p0 = int(ends[a - 1]) if a else 0
            p1 = int(ends[b - 1]) if ends is not None else batch.payload_bytes
            if not count:
                start = pos
            if start >= skip_before:
                if skimmed:  # a bug check: the reader skims only blocks that end before skip_before
                    raise RuntimeError("a skimmed block reached past the place skimming was asked to stop")
                pending.append(RecordBatch(batch.t_ns[a:b], batch.length[a:b], batch.port[a:b],
                                           batch.flags[a:b], batch.payload[p0:p1]))
            count += b - a
            size += p1 - p0
            pos += (b - a) * _RECORD_BYTES + (p1 - p0)
            if count >= STEP_RECORDS or size >= STEP_BYTES:
                if start >= skip_before:
                    yield i, start, pending[0] if len(pending) == 1 else RecordBatch.concat(pending)
                i += 1
                pending, count, size = [], 0, 0
    if pending:
        yield i, start, pending[0] if len(pending) == 1 else RecordBatch.concat(pending)


@dataclass
class Plan:
    """Where segment ``k`` starts and ends, by place in the file (bytes of records before a step)."""

    total: int
    jobs: int

    def cut(self, k: int) -> int:
        """Where segment ``k`` starts: every segment but the first also decodes its warm-up, so the
        first takes that much more of the capture and each gets the same work (``w`` bytes decoded)."""
        if k <= 0:
            return 0
        if k >= self.jobs:
            return self.total
        warm = self.warm_bytes
        w = (self.total + (self.jobs - 1) * warm) // self.jobs
        if w <= warm:  # a warm-up as long as a segment: even cuts
            return self.total * k // self.jobs
        return k * w - (k - 1) * warm

    @property
    def warm_bytes(self) -> int:
        """The warm-up: WARM_BYTES, or a sixteenth of the capture when that is more (a longer history)."""
        return max(WARM_BYTES, self.total // WARM_SHARE)

    def warm(self, k: int) -> int:
        return max(0, self.cut(k) - self.warm_bytes)

    def agree_from(self, k: int) -> int:
        return max(0, self.cut(k) - self.warm_bytes // 2)


@dataclass
class SegmentResult:
    k: int
    figures: object = None
    head: dict = field(default_factory=dict)   #: step -> digest, from half-way through the warm-up to the overlap's end
    tail: dict = field(default_factory=dict)   #: the same for the next segment's overlap
    agree_from: int = -1                        #: first step the head must agree from
    contradictions: dict = field(default_factory=dict)
    report: object = None
    tables: list | None = None                  #: the owned decoder outputs themselves (keep_tables)
    head_state: str | None = None               #: decoder state where this segment's own rows begin
    tail_state: str | None = None               #: decoder state where the next segment's own rows begin
    head_slowest: dict = field(default_factory=dict)  #: slowest answers where its own rows begin
    tail_slowest: dict = field(default_factory=dict)  #: the same where the next segment's own rows begin
    rises: list = field(default_factory=list)   #: (step, {station: slowest answer}) whenever one rose
    consulted: set = field(default_factory=set)  #: steps in which pairing read a slowest answer
    handover: int = -1                          #: the last step before this segment's own rows
    went_on: bool = False                       #: decoded on to the capture's end (a seam after it failed)
    head_watch: WatchPoint | None = None        #: where its reader stood at its warm-up's place
    tail_watch: WatchPoint | None = None        #: ... and at the next segment's warm-up's place


def run_segment(paths: list, header, cfg, plan: Plan, k: int, keep_tables: bool = False,
                go_on: Callable[[SegmentResult], bool] | None = None) -> SegmentResult:
    """Decode segment ``k`` (in a worker process): its figures and the digests of its overlaps.

    With ``keep_tables`` the decoder outputs the segment owns are kept instead of counted. With
    ``go_on``, at the end of its overlap the segment asks it (with what it found so far) whether
    to go on to the capture's end instead: a seam after it that did not join is then decoded on
    by the decoder that came from the start, not decoded again from the start.
    """
    from buswitness.analysis.pipeline import AnalysisOptions, analyze_tables
    from buswitness.capture.fileformat import CaptureReader
    from buswitness.decode import Decoder
    reader = CaptureReader([str(p) for p in paths])
    decoder = Decoder(cfg)
    last = k == plan.jobs - 1
    reader.watch(*([plan.warm(k)] if k else []), *([] if last else [plan.warm(k + 1)]))
    out = SegmentResult(k)
    state = {"cut": None, "last": last}
    step = [0]
    if k:
        _watch_slowest(decoder, out.consulted, step)

    def counts() -> dict:
        return {p: port.timeline.contradictions for p, port in decoder.ports.items()}

    def owned_outputs():
        started = False
        next_cut_step = None
        for i, pos, batch in steps(reader, plan.warm(k) if k else 0):
            if not started:
                if k and pos < plan.warm(k):
                    continue
                started = True
            if k and state["cut"] is None and pos >= plan.cut(k):
                state["cut"] = i
            if out.agree_from < 0 and k and pos >= plan.agree_from(k):
                out.agree_from = i
            if not state["last"] and next_cut_step is None and pos >= plan.cut(k + 1):
                next_cut_step = i
            before = counts()
            step[0] = i
            seen_slowest = slowest_answers(decoder) if k else None
            result = decoder.feed_batch(batch)
            after = counts()
            if k and state["cut"] is not None and i >= state["cut"] + OVER_STEPS:
                now = slowest_answers(decoder)
                if now != seen_slowest:
                    out.rises.append((i, now))
            step_contra = tuple(sorted((p, n - before.get(p, 0)) for p, n in after.items() if n != before.get(p, 0)))
            in_head = k and (state["cut"] is None or i < state["cut"] + OVER_STEPS)
            # digests only where the seam compares them: from half-way through the warm-up
            head_digest = in_head and out.agree_from >= 0
            tail_digest = not state["last"] and pos >= plan.agree_from(k + 1)
            if head_digest or tail_digest:
                digest = output_digest(result, step_contra)
                if head_digest:
                    out.head[i] = digest
                if tail_digest:
                    out.tail[i] = digest
            if k and state["cut"] is not None and i == state["cut"] + OVER_STEPS - 1:
                out.head_state, out.head_slowest, out.handover = decoder_state(decoder), slowest_answers(decoder), i
            if next_cut_step is not None and i == next_cut_step + OVER_STEPS - 1:
                out.tail_state, out.tail_slowest = decoder_state(decoder), slowest_answers(decoder)
            owned = not in_head
            if owned:
                for p, n in step_contra:
                    out.contradictions[p] = out.contradictions.get(p, 0) + n
                yield result
            if not state["last"] and next_cut_step is not None and i >= next_cut_step + OVER_STEPS - 1:
                out.tail_watch = reader.watched.get(plan.warm(k + 1))  # what go_on's seam check reads
                if go_on is None or not go_on(out):
                    return
                state["last"] = out.went_on = True  # on to the end, as one pass
        if state["last"]:
            before = counts()
            result = decoder.flush()
            for p, n in counts().items():
                out.contradictions[p] = out.contradictions.get(p, 0) + n - before.get(p, 0)
            yield result

    if keep_tables:
        out.tables = list(owned_outputs())
    else:
        out.figures = analyze_tables(header, owned_outputs(), AnalysisOptions()).unjudged
    out.head_watch = reader.watched.get(plan.warm(k)) if k else None
    out.tail_watch = None if last else reader.watched.get(plan.warm(k + 1))
    if state["last"]:
        out.report = reader.report
    return out


def _slowest_settled(prev: SegmentResult, seg: SegmentResult) -> bool:
    """True when the slowest answers ``seg``'s decoder did not know never decided anything.

    At the handover the decoder from the start knows each station's slowest answer over the whole
    capture so far; the later one only since its warm start, so it may know a smaller one. Both
    become the same at the first answer slower than the true one. Until then, pairing must not
    have read a slowest answer at all (it reads them in one place, ``Pairing._slowest_ns``).
    """
    true = prev.tail_slowest
    if set(true) != set(seg.head_slowest):
        return False
    late = [a for a in true if seg.head_slowest[a] != true[a]]
    if not late:
        return True
    settled = seg.handover
    for a in late:
        step = next((i for i, now in seg.rises if now.get(a, 0.0) >= true[a]), None)
        settled = max(settled, step if step is not None else 1 << 62)  # None: never, to the segment's end
    return not any(seg.handover < i <= settled for i in seg.consulted)


def _same_place(a: WatchPoint | None, b: WatchPoint | None) -> bool:
    """True when two readers stood at the same block, having placed the same blocks before it: the
    later segment skimmed the capture's start and a full reading agrees with its count."""
    return a is not None and b is not None and (a.part, a.offset, a.place) == (b.part, b.offset, b.place)


def read_report(parts: list[SegmentResult]) -> ReadReport:
    """The capture's read report from the segments' readers: each counts the blocks from its own
    warm-up's place to the next one's (where the next reader takes over)."""
    whole = copy.deepcopy(parts[0].tail_watch.report if len(parts) > 1 else parts[0].report)
    for k, seg in enumerate(parts[1:], start=1):
        end = seg.report if k == len(parts) - 1 else seg.tail_watch.report
        whole.add(end.since(seg.head_watch.report))
    return whole


def seams_agree(parts: list[SegmentResult]) -> list[int]:
    """The seams (k: between segment k-1 and k) that did not join.

    A seam joins when the two decodes of its overlap gave the same tables for every step from
    half-way through the warm-up, and at the handover the later decoder is in the state of the
    earlier one (:func:`decoder_state`): from there on both give the same output for the same
    input, so the later segment's rows are those of one pass.
    """
    bad = []
    for prev, seg in zip(parts, parts[1:]):
        needed = [i for i in seg.head if i >= seg.agree_from]
        if (not _same_place(prev.tail_watch, seg.head_watch)
                or seg.agree_from < 0 or not needed or any(prev.tail.get(i) != seg.head[i] for i in needed)
                or seg.head_state is None or seg.head_state != prev.tail_state
                or not _slowest_settled(prev, seg)):
            bad.append(seg.k)
    return bad


def jobs_for(options, source, proto, sinks_need_tables: bool) -> int:
    """Segments to decode at once for this run: 1 for one pass."""
    from buswitness.capture.fileformat import CaptureReader
    wanted = options.jobs if options.jobs is not None else (os.cpu_count() or 1)
    if wanted <= 1 or sinks_need_tables or not isinstance(source, CaptureReader) or hasattr(proto, "new_figures"):
        return 1
    if not source.header.capture_id:
        return 1  # Figures.merge joins the parts of one capture by its id: without one, no exact join
    size = sum(os.path.getsize(p) for p in source.paths if os.path.exists(p))
    if size < PARALLEL_MIN_BYTES:
        return 1
    return min(wanted, MAX_JOBS, max(1, size // (4 * WARM_BYTES)))


def segmented_outputs(paths: list, header, cfg, jobs: int) -> list | None:
    """The decoder outputs of ``jobs`` segments joined, in one process (for checking the joins against
    one pass); None when a seam did not join."""
    plan = Plan(sum(os.path.getsize(p) for p in paths), jobs)
    parts = [run_segment(paths, header, cfg, plan, k, keep_tables=True) for k in range(jobs)]
    if seams_agree(parts):
        return None
    return [o for p in parts for o in p.tables]


@dataclass
class Parallel:
    figures: object
    contradictions: dict
    report: object


def decode_parallel(source, header, cfg, jobs: int, notice: Callable[[str], None]) -> Parallel | None:
    """Figures of the whole capture from ``jobs`` segments decoded at once. Where a seam did not join,
    the first segment's decoder has gone on to the end (one pass); None where it could not (it
    stopped before its overlap's end, a read error say): then the caller decodes in one pass."""
    import concurrent.futures
    import multiprocessing

    from buswitness.analysis.figures import Figures
    paths = [str(p) for p in source.paths]
    total = sum(os.path.getsize(p) for p in paths)
    plan = Plan(total, jobs)
    # fork where there is one: the workers start at once with the modules already loaded, and a
    # caller's script needs no ``if __name__ == "__main__"`` guard (spawn would run it again)
    ctx = multiprocessing.get_context("fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn")
    checked: dict = {}

    def go_on(first: SegmentResult) -> bool:
        """At the end of the first segment's overlap: the other segments' results, and whether a seam
        failed (then the first segment's decoder goes on to the end: the capture in one pass)."""
        checked["parts"] = [first] + [f.result() for f in futures]
        checked["bad"] = seams_agree(checked["parts"])
        if checked["bad"]:
            checked["parts"] = None  # their figures are not used: not held through the rest
        pool.shutdown(wait=True)  # the workers are done: not left idle while this decodes on
        return bool(checked["bad"])

    with concurrent.futures.ProcessPoolExecutor(max_workers=jobs - 1, mp_context=ctx) as pool:
        futures = [pool.submit(run_segment, paths, header, cfg, plan, k) for k in range(1, jobs)]
        first = run_segment(paths, header, cfg, plan, 0, go_on=go_on)
        parts = checked.get("parts") or [first] + [f.result() for f in futures]
    bad = checked["bad"] if "bad" in checked else seams_agree(parts)
    if bad:
        said = (f"the decodes of {len(bad)} of {jobs - 1} segment seam(s) did not agree over their overlap: "
                f"decoded in one pass instead")
        if not first.went_on:
            notice(said)
            return None
        notice(said + " (the first segment's decoder went on to the end)")
        return Parallel(Figures.merge([first.figures]), dict(first.contradictions),
                        _into(getattr(source, "report", None), first.report))
    figures = Figures.merge([p.figures for p in parts])
    contradictions: dict = {}
    for p in parts:
        for port, n in p.contradictions.items():
            contradictions[port] = contradictions.get(port, 0) + n
    return Parallel(figures, contradictions, _into(getattr(source, "report", None), read_report(parts)))


def _into(report, whole):
    """The source's own read report (its files, parts and opening warnings) given what the
    segments' readers found over the whole capture."""
    if report is not None:
        for f in fields(whole):
            if f.name not in {"files", "missing_parts", "warnings"}:
                setattr(report, f.name, getattr(whole, f.name))
        report.warnings = list(report.warnings) + [w for w in whole.warnings if w not in report.warnings]
    return report

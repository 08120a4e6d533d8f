"""Decoding a long capture on every core: time segments decoded at once, joined where they agree.

The capture's records are cut into steps (at most ``STEP_RECORDS`` records of one block), the
same steps in every process, and the steps into ``jobs`` segments of about equal size by their
place in the file. Segment ``k`` is decoded by its own process, which starts ``WARM_BYTES`` of
records before the segment's cut with a fresh decoder: by the cut, that decoder has seen the
open requests, the master's wait and the stations' usual answers the decode from the start of
the capture has seen (decoder state that crosses the seam). The process before it decodes on
``OVER_STEPS`` steps past the cut.

The join is checked, never assumed: over the overlap, the two processes' tables (frames,
transactions, events, and the timing contradictions counted) must be the same, step by step, for
every step from half-way through the warm-up to the end of the overlap. Then the decoder that
started fresh is in the state of the one that came from the start, and its tables after the
overlap are the ones a single pass would give. Each segment's rows from the end of its own
overlap to the end of the next overlap go into its figures, and the figures of the segments
merge into those of the whole capture (analysis/figures.py ``Figures.merge`` joins contiguous
parts of one capture exactly). A seam whose two decodes never agree makes the whole capture
decode in one pass, with a notice.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, fields

import numpy as np
import pandas as pd
from buswitness.records import RecordBatch

#: Records per step: the unit in which two decodes of an overlap are compared.
STEP_RECORDS = 4096
#: Bytes of records a segment's decoder sees before its cut (its warm-up).
WARM_BYTES = 2 << 20
#: Steps the previous segment decodes past the cut.
OVER_STEPS = 4
#: A capture smaller than this is decoded in one pass (starting processes costs more than it saves).
PARALLEL_MIN_BYTES = 12 << 20
#: At most this many segments, whatever the core count.
MAX_JOBS = 8
_RECORD_BYTES = 12  # one record's entry in a block's index (capture/fileformat.py INDEX_DTYPE)


def tables_of(out) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """The three tables of a decoder output (decode/tables.py ``DecodeOutput``): the one adaptor to its form."""
    if hasattr(out, "to_frames"):
        frames = out.to_frames()
        return frames.frames, frames.transactions, frames.events
    return out.frames, out.transactions, out.events


def output_digest(out, contradictions: tuple = ()) -> str:
    """A digest of every value of the three tables, in order (and the step's timing contradictions)."""
    h = hashlib.blake2b(repr(contradictions).encode(), digest_size=16)
    for table in tables_of(out):
        h.update(f"|{len(table)}|".encode())
        for name in table.columns:
            col = table[name]
            h.update(f"{name}:{col.dtype}".encode())
            if isinstance(col.dtype, pd.CategoricalDtype):
                h.update(repr(list(col.cat.categories)).encode())
                h.update(np.ascontiguousarray(col.cat.codes.to_numpy()).tobytes())
            elif col.dtype == object:
                for v in col.tolist():
                    b = v if isinstance(v, (bytes, bytearray)) else repr(v).encode()
                    h.update(len(b).to_bytes(4, "little"))
                    h.update(b)
            else:
                h.update(np.ascontiguousarray(col.to_numpy()).tobytes())
    return h.hexdigest()


def steps(reader) -> Iterator[tuple[int, int, RecordBatch]]:
    """(step index, place in the file before it, records) over the whole capture, the same in every process."""
    i = pos = 0
    for batch in reader.iter_batches():
        n = len(batch)
        if not n:
            continue
        ends = np.cumsum(batch.length)
        for a in range(0, n, STEP_RECORDS):
            b = min(a + STEP_RECORDS, n)
            p0 = int(ends[a - 1]) if a else 0
            p1 = int(ends[b - 1])
            yield i, pos, RecordBatch(batch.t_ns[a:b], batch.length[a:b], batch.port[a:b], batch.flags[a:b],
                                      batch.payload[p0:p1])
            pos += (b - a) * _RECORD_BYTES + (p1 - p0)
            i += 1


@dataclass
class Plan:
    """Where segment ``k`` starts and ends, by place in the file (bytes of records before a step)."""

    total: int
    jobs: int

    def cut(self, k: int) -> int:
        return self.total * k // self.jobs

    def warm(self, k: int) -> int:
        return max(0, self.cut(k) - WARM_BYTES)

    def agree_from(self, k: int) -> int:
        return max(0, self.cut(k) - WARM_BYTES // 2)


@dataclass
class SegmentResult:
    k: int
    figures: object = None
    head: dict = field(default_factory=dict)   #: step -> digest, from the warm start to the end of the overlap
    tail: dict = field(default_factory=dict)   #: the same for the next segment's overlap
    agree_from: int = -1                        #: first step the head must agree from
    contradictions: dict = field(default_factory=dict)
    report: object = None
    tables: list | None = None                  #: the owned decoder outputs themselves (keep_tables)


def run_segment(paths: list, header, cfg, plan: Plan, k: int, keep_tables: bool = False) -> SegmentResult:
    """Decode segment ``k`` (in a worker process): its figures and the digests of its overlaps.

    With ``keep_tables`` the decoder outputs the segment owns are kept instead of counted.
    """
    from buswitness.analysis.pipeline import AnalysisOptions, analyze_tables
    from buswitness.capture.fileformat import CaptureReader
    from buswitness.decode import Decoder
    reader = CaptureReader([str(p) for p in paths])
    decoder = Decoder(cfg)
    last = k == plan.jobs - 1
    out = SegmentResult(k)
    state = {"cut": None, "next_cut": None, "next_warm": None, "owned": k == 0, "contra": {}}

    def counts() -> dict:
        return {p: port.timeline.contradictions for p, port in decoder.ports.items()}

    def owned_outputs():
        started = False
        next_cut_step = None
        for i, pos, batch in steps(reader):
            if not started:
                if k and pos < plan.warm(k):
                    continue
                started = True
            if k and state["cut"] is None and pos >= plan.cut(k):
                state["cut"] = i
            if out.agree_from < 0 and k and pos >= plan.agree_from(k):
                out.agree_from = i
            if not last and next_cut_step is None and pos >= plan.cut(k + 1):
                next_cut_step = i
            before = counts()
            result = decoder.feed_batch(batch)
            after = counts()
            step_contra = tuple(sorted((p, n - before.get(p, 0)) for p, n in after.items() if n != before.get(p, 0)))
            in_head = k and (state["cut"] is None or i < state["cut"] + OVER_STEPS)
            in_tail = not last and pos >= plan.warm(k + 1)
            if in_head or in_tail:
                digest = output_digest(result, step_contra)
                if in_head:
                    out.head[i] = digest
                if in_tail:
                    out.tail[i] = digest
            owned = not in_head
            if owned:
                for p, n in step_contra:
                    out.contradictions[p] = out.contradictions.get(p, 0) + n
                yield result
            if next_cut_step is not None and i >= next_cut_step + OVER_STEPS - 1:
                return
        if last:
            before = counts()
            result = decoder.flush()
            for p, n in counts().items():
                out.contradictions[p] = out.contradictions.get(p, 0) + n - before.get(p, 0)
            yield result

    if keep_tables:
        out.tables = list(owned_outputs())
    else:
        out.figures = analyze_tables(header, owned_outputs(), AnalysisOptions()).unjudged
    if last:
        out.report = reader.report
    return out


def seams_agree(parts: list[SegmentResult]) -> list[int]:
    """The seams (k: between segment k-1 and k) whose overlap decodes were not the same."""
    bad = []
    for prev, seg in zip(parts, parts[1:]):
        needed = [i for i in seg.head if i >= seg.agree_from]
        if seg.agree_from < 0 or not needed or any(prev.tail.get(i) != seg.head[i] for i in needed):
            bad.append(seg.k)
    return bad


def jobs_for(options, source, proto, sinks_need_tables: bool) -> int:
    """Segments to decode at once for this run: 1 for one pass."""
    from buswitness.capture.fileformat import CaptureReader
    wanted = options.jobs if options.jobs is not None else (os.cpu_count() or 1)
    if wanted <= 1 or sinks_need_tables or not isinstance(source, CaptureReader) or hasattr(proto, "new_figures"):
        return 1
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
    """Figures of the whole capture from ``jobs`` segments decoded at once; None when a seam did not join."""
    import concurrent.futures
    import multiprocessing

    from buswitness.analysis.figures import Figures
    paths = [str(p) for p in source.paths]
    total = sum(os.path.getsize(p) for p in paths)
    plan = Plan(total, jobs)
    # fork where there is one: the workers start at once with the modules already loaded, and a
    # caller's script needs no ``if __name__ == "__main__"`` guard (spawn would run it again)
    ctx = multiprocessing.get_context("fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn")
    with concurrent.futures.ProcessPoolExecutor(max_workers=jobs - 1, mp_context=ctx) as pool:
        futures = [pool.submit(run_segment, paths, header, cfg, plan, k) for k in range(1, jobs)]
        parts = [run_segment(paths, header, cfg, plan, 0)] + [f.result() for f in futures]
    bad = seams_agree(parts)
    if bad:
        notice(f"the decodes of {len(bad)} of {jobs - 1} segment seam(s) did not agree over their overlap: "
               f"decoded in one pass instead")
        return None
    figures = Figures.merge([p.figures for p in parts])
    contradictions: dict = {}
    for p in parts:
        for port, n in p.contradictions.items():
            contradictions[port] = contradictions.get(port, 0) + n
    report = getattr(source, "report", None)
    last = parts[-1].report
    if report is not None and last is not None:
        keep = {"files", "missing_parts", "warnings"}
        for f in fields(last):
            if f.name not in keep:
                setattr(report, f.name, getattr(last, f.name))
        report.warnings = list(report.warnings) + [w for w in last.warnings if w not in report.warnings]
    return Parallel(figures, contradictions, report)

"""Two devices answering one address: most of that address's answers garbled, the line otherwise fine."""

from __future__ import annotations

from statistics import median

from buswitness.analysis.finding import WIRING_CAUTION, Cause, Finding
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.rules.common import capture_span, damaged_share, failure_examples, pct, polled, share
from buswitness.analysis.rules.thresholds import Thresholds


def duplicate_address(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """One address answered twice: garbled where two drivers overlap, or a second valid answer nobody awaits."""
    stations = polled(result, th)
    out = []
    for s in stations:
        own = damaged_share(s)
        others = [damaged_share(o) for o in stations if o.address != s.address]
        if not others or median(others) >= th.duplicate_others_max:
            continue
        overlap = s.events.get("line_error", 0) + s.events.get("break", 0) + s.collisions
        orphans = s.events.get("orphan_response", 0)
        fighting = own >= th.duplicate_damaged_share and share(overlap, s.corrupt) >= th.duplicate_overlap_per_answer
        twice = share(orphans, s.requests) >= th.duplicate_orphan_share and s.late < th.late_min_count
        if not (fighting or twice):
            continue
        marks = []
        if fighting:
            marks.append(f"{pct(own)} of its answers are garbled ({s.corrupt} of {s.requests}, {overlap} framing "
                         f"errors and breaks, the marks of two drivers talking at once)")
        if orphans and share(orphans, s.requests) >= 0.1 * th.duplicate_orphan_share:
            marks.append(f"{orphans} valid answers from it came when none was awaited (a second answer to the "
                         f"same poll)")
        t0, t1 = capture_span(result)
        out.append(Finding(
            rule="duplicate-address", severity="critical", score=max(own, share(orphans, s.requests)),
            station=s.address, station_label=s.label, t_start_s=t0, t_end_s=t1,
            statement=(f"Two devices probably answer as {s.label}: {'; '.join(marks)}; the other stations have "
                       f"{pct(median(others))} of their answers damaged."),
            evidence={"requests": s.requests, "damaged": s.corrupt, "answered": s.answered,
                      "damaged_share": round(own, 5), "others_median_share": round(median(others), 5),
                      "framing_errors_and_breaks": overlap, "crc_errors": s.crc_errors, "orphan_answers": orphans},
            examples=failure_examples(result, s.address, outcomes=("corrupt",)),
            causes=[Cause(f"A second device is set to address {s.address} (a replacement or spare left at its "
                          f"factory address is the usual way).",
                          f"Disconnect the devices you believe are at {s.address} one at a time and watch whether "
                          f"the other's answers come through clean; read every device's address setting."),
                    Cause("One device's driver stays on after its answer and clashes with it (a transceiver "
                          "fault at that drop).",
                          "Watch whether the damage stops when that station is unplugged.")],
            caution=WIRING_CAUTION))
    return out

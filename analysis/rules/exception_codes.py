"""Exception responses by code, with what each code usually means on site (codes: MAP p48-49)."""

from __future__ import annotations

from buswitness.analysis.finding import Cause, Finding
from buswitness.analysis.result import EXCEPTION_NAMES, AnalysisResult
from buswitness.analysis.rules.common import EXAMPLES, capture_span, example, pct, polled, share
from buswitness.analysis.rules.thresholds import Thresholds

#: Per code: the likely cause on site and what to check next.
CODE_CAUSES = {
    1: ("The master uses a function code this device does not support.",
        "Compare the function codes in the master's poll list with the device manual's list."),
    2: (("The master's register map does not match the device's: it asks for addresses the device does not "
         "have (often an off-by-one between 1-based register numbers and 0-based addresses; common practice)."),
        "Compare the start address and quantity of the failing requests with the device's register map."),
    3: (("A quantity or value in the request is out of the device's range (e.g. more registers than it "
         "returns at once)."), "Check the failing requests' quantity and written values against the device manual."),
    4: ("The device reports an internal failure while handling the request.",
        "Read the device's own diagnostics or alarm log; ask the vendor."),
    5: ("The device accepted a long operation and will finish later (a normal answer to some commands).",
        "Check that the master polls for completion instead of treating it as an error."),
    6: ("The device is busy with a long operation and refuses requests meanwhile.",
        "Check for other clients or long commands at those times; the master should retry later."),
    8: ("The device found a memory parity error reading a file record.", "Ask the vendor; the device may be failing."),
    10: ("A gateway in the path has no route to the target.", "Check the gateway's routing configuration."),
    11: ("A gateway forwarded the request but its target device did not answer.",
         "Check the device behind the gateway: power, wiring and address."),
}


def _name(code: int) -> str:
    return EXCEPTION_NAMES.get(code, "non-standard code")


def exceptions(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """One finding per station that answered with exceptions, its codes most frequent first."""
    out = []
    for s in polled(result, th):
        if not s.exceptions:
            continue
        codes = sorted(s.exceptions_by_code.items(), key=lambda kv: (-kv[1], kv[0]))
        rate = share(s.exceptions, s.requests)
        fault = any(c in th.device_fault_codes for c, _ in codes)
        severity = "warning" if rate >= th.exception_warning_share or fault else "notice"
        listed = ", ".join(f"code {c:02X} {_name(c)} ({n})" for c, n in codes)
        causes = [Cause(*CODE_CAUSES.get(c, ("The device answers with a code the standard does not define.",
                                             "Look the code up in the device manual.")))
                  for c, _ in codes]
        rows = [r for r in sorted(result.slowest_rows(s.address), key=lambda r: r["t_s"])
                if r["outcome"] == "exception"]
        t0, t1 = capture_span(result)
        out.append(Finding(
            rule="exceptions", severity=severity, score=rate, station=s.address, station_label=s.label,
            t_start_s=t0, t_end_s=t1,
            statement=(f"{s.label} answered {pct(rate)} of its requests with an exception: {listed}."),
            evidence={"requests": s.requests, "exceptions": s.exceptions,
                      "by_code": {f"{c:02X}": {"name": _name(c), "count": n} for c, n in codes},
                      "functions_requested": {str(f): n for f, n in sorted(s.functions.items())}},
            examples=[example(result, r) for r in rows[:EXAMPLES]], causes=causes))
    return out

"""The installation check's outputs: the text ``plan check`` prints, its JSON and the standalone plan.html.

The page is built like the dashboard (analysis/dashboard.py): plain data first, then an
autoescaping template with inline CSS and no script, under the same Content-Security-Policy.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

from buswitness.analysis.busplan import BusPlan
from buswitness.analysis.finding import Finding
from buswitness.analysis.planrules import PLAN_CAUTION, PlanResult, counts
from buswitness.analysis.result import AnalysisResult
from buswitness.fsutil import atomic_write

WIDTH = 100


def _wrap(text: str, indent: str) -> str:
    return textwrap.fill(text, width=WIDTH, initial_indent=indent, subsequent_indent=indent)


def plan_heading(plan: BusPlan) -> str:
    segs = plan.segments()
    start, end = plan.trunk_span()
    rate = f", {plan.baud} bps" if plan.baud else ""
    return (f"{plan.name or 'Bus'}: {len(plan.devices)} devices, {len(plan.repeaters)} repeater(s), "
            f"{len(segs)} segment(s), trunk {end - start:g} m{rate}")


def plan_text(plan: BusPlan, results: list[PlanResult], findings: list[Finding],
              result: AnalysisResult | None) -> str:
    """What ``plan check`` prints: the verdicts (failures first), then the findings joined with the capture."""
    n = counts(results)
    lines = [f"Bus description {plan.path}", f"  {plan_heading(plan)}",
             f"  {n['fail']} fail, {n['warn']} warn, {n['pass']} pass", ""]
    for r in results:
        lines.append(_wrap(f"{r.status.upper():5} {r.rule}: {r.statement}", ""))
        if r.status != "pass":
            if r.fix:
                lines.append(_wrap(f"fix: {r.fix}", "      "))
            lines.append(_wrap(f"source: {r.source}", "      "))
    if any(r.caution for r in results):
        lines += ["", _wrap(f"Caution: {PLAN_CAUTION}", "")]
    if result is not None:
        lines += ["", f"Joined with the capture {', '.join(Path(p).name for p in result.paths) or ''} "
                      f"({result.bus.requests} requests, {result.bus.duration_s / 3600:.2f} h):"]
        joined = [f for f in findings if f.rule.startswith("plan-")]
        if not joined:
            lines.append("  The traffic shows no pattern along the cable that the description explains.")
        for f in findings:
            tag = "plan+traffic" if f.rule.startswith("plan-") else "traffic"
            lines.append(_wrap(f"{f.severity.upper()} [{tag}] {f.rule}: {f.statement}", "  "))
    return "\n".join(lines)


def plan_json(plan: BusPlan, results: list[PlanResult], findings: list[Finding],
              result: AnalysisResult | None) -> dict:
    """The check as JSON: the description's summary, every result, and the findings when a capture was given."""
    out: dict = {"description": plan.path, "name": plan.name, "baud": plan.baud, "counts": counts(results),
                 "segments": [{"index": s.index, "start_m": s.start_m, "end_m": s.end_m} for s in plan.segments()],
                 "results": [r.to_dict() for r in results]}
    if result is not None:
        out["capture"] = [str(p) for p in result.paths]
        out["findings"] = [f.to_dict() for f in findings]
        out["stations"] = along_cable(plan, result)
    return out


def along_cable(plan: BusPlan, result: AnalysisResult) -> list[dict]:
    """Each described station's trouble in the capture, in position order (plan.html's table, the JSON)."""
    from buswitness.analysis.planjoin import health
    rows = []
    for d in sorted(plan.stations, key=lambda d: d.position_m):
        s = result.station(d.address) if d.address is not None else None
        ev = s.events if s is not None else {}
        rows.append({"address": d.address, "label": d.label, "position_m": d.position_m, "stub_m": d.stub_m,
                     "segment": plan.segment_of(d.position_m).index,
                     "requests": s.requests if s else 0, "failed_share": health(s),
                     "damaged": s.corrupt if s else 0, "timeouts": s.timeouts if s else 0,
                     "late": s.late if s else 0, "collisions": s.collisions if s else 0,
                     "line_marks": int(ev.get("line_error", 0) + ev.get("break", 0)),
                     "stray_bytes": int(ev.get("stray_bytes", 0))})
    return rows


def render_plan_page(plan: BusPlan, results: list[PlanResult], findings: list[Finding],
                     result: AnalysisResult | None) -> str:
    """plan.html as one string: the drawing, the verdicts and the joined findings."""
    from buswitness import __version__
    from buswitness.analysis.render import environment, stylesheet
    from markupsafe import Markup
    env = environment()
    return env.get_template("plan.html").render(
        plan=plan, heading=plan_heading(plan), results=results, n=counts(results), findings=findings,
        result=result, p=panel_data(plan, results, result), version=__version__,
        along=along_cable(plan, result) if result is not None else [],
        files=[Path(p).name for p in result.paths] if result is not None else [],
        css=Markup(stylesheet("plan.css") + stylesheet("plan_panel.css")))


def panel_data(plan: BusPlan, results: list[PlanResult], result: AnalysisResult | None) -> dict:
    """What templates/plan_panel.html shows: the drawing, its legend and the numbered marks."""
    from buswitness.analysis.plandraw import draw_plan, legend_items, numbered_marks
    from markupsafe import Markup
    marks = numbered_marks(results)
    return {"svg": Markup(draw_plan(plan, results, result)), "legend": legend_items(), "marks": marks,
            "shaded": result is not None, "sniffer": plan.sniffer is not None, "caution": PLAN_CAUTION if any(r.caution for _, r in marks) else ""}


def write_plan_page(plan: BusPlan, results: list[PlanResult], findings: list[Finding],
                    result: AnalysisResult | None, path: str | Path) -> Path:
    """Write plan.html atomically."""
    text = render_plan_page(plan, results, findings, result)
    with atomic_write(path) as f:
        f.write(text)
    return Path(path)

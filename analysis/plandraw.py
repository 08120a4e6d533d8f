"""The drawing of the bus as described: an inline SVG for plan.html and the dashboard's plan panel.

The trunk runs left to right to scale (metres from the master's end); segments alternate in
shade and are split by repeaters; each device sits on the trunk, or at the end of its drop when
it hangs on a stub (drawn below, longer for a longer stub); terminators, bias networks and shield
ground points are marked where they are; every failed or warned rule gets a numbered mark at its
place, listed under the drawing. With a capture, each station is shaded by the share of its polls
that failed. Our own look: plain shapes, a calm palette, words beside every mark.
Every element a test or a reader looks for carries ``data-device`` or ``data-rule``.
"""

from __future__ import annotations

from html import escape

from buswitness.analysis.busplan import BusPlan
from buswitness.analysis.planrules import PlanResult, bias_on, terminators_on
from buswitness.analysis.result import AnalysisResult

WIDTH = 1120
MARGIN_X = 70
LEVEL_H = 34
LABEL_CHAR_PX = 7.4
DROP_BASE_PX = 18
DROP_PX_PER_M = 1.4
DROP_MAX_PX = 150

INK = "#27323a"
MUTED = "#66727b"
SEGMENT_SHADES = ("#2f6f8f", "#6b8f5a")
#: Station shading by the share of polls that failed (timeouts, late or damaged answers).
HEALTH_STEPS = ((0.002, "#d9e8dc", "under 0.2 %"), (0.01, "#efd9a0", "0.2-1 %"), (0.05, "#de9a58", "1-5 %"),
                (float("inf"), "#a8432f", "5 % or more"))
NO_DATA = ("#ffffff", "not in the capture")
FAIL_COLOUR = "#9c2f2b"
WARN_COLOUR = "#b86e14"


def health_colour(share_: float | None) -> str:
    if share_ is None:
        return NO_DATA[0]
    for limit, colour, _ in HEALTH_STEPS:
        if share_ < limit:
            return colour
    return HEALTH_STEPS[-1][1]


def legend_items() -> list[tuple[str, str]]:
    """(colour, text) pairs of the station shading."""
    return [(c, t) for _, c, t in HEALTH_STEPS] + [NO_DATA]


def _e(text: object) -> str:
    return escape(str(text), quote=True)


def _levels(items: list[tuple[float, float]]) -> list[int]:
    """Greedy rows for labels given (x, width): the lowest row where the label does not overlap another."""
    rows: list[float] = []  # right edge used in each row
    out = []
    for x, w in items:
        for i, right in enumerate(rows):
            if x - w / 2 > right + 8:
                rows[i] = x + w / 2
                out.append(i)
                break
        else:
            rows.append(x + w / 2)
            out.append(len(rows) - 1)
    return out


def _ul(v: float) -> str:
    for den in (2, 4, 8):
        if abs(v * den - round(v * den)) < 1e-9 and v < 1:
            return f"{round(v * den)}/{den} UL"
    return f"{v:g} UL"


def draw_plan(plan: BusPlan, results: list[PlanResult], result: AnalysisResult | None = None) -> str:
    """The SVG drawing as text (escaped; safe to inline)."""
    from buswitness.analysis.planjoin import health
    start, end = plan.trunk_span()
    span = max(end - start, 1.0)
    usable = WIDTH - 2 * MARGIN_X

    def x(pos: float) -> float:
        return round(MARGIN_X + (pos - start) / span * usable, 1)

    devices = plan.devices
    labels = []
    for d in devices:
        w = max(len(d.name or d.key) + 5, len(f"{d.position_m:g} m · 1/8 UL")) * LABEL_CHAR_PX
        labels.append((d, min(max(x(d.position_m), w / 2 + 4), WIDTH - w / 2 - 4), w))
    label_x = {d.key: lx for d, lx, _ in labels}
    order = sorted(range(len(labels)), key=lambda i: labels[i][1])
    lv = _levels([(labels[i][1], labels[i][2]) for i in order])
    level = {labels[i][0].key: lv[k] for k, i in enumerate(order)}
    n_levels = max(lv, default=0) + 1
    trunk_y = 50 + n_levels * LEVEL_H
    max_drop = max((min(DROP_MAX_PX, DROP_BASE_PX + d.stub_m * DROP_PX_PER_M) for d in devices if d.stub_m > 0),
                   default=0)
    axis_y = trunk_y + max(70, max_drop + 30)
    marks = [r for r in results if r.status != "pass"]
    mark_y0 = axis_y + 62
    mark_items = [(x(r.position_m if r.position_m is not None else start), 34.0 + len(r.rule) * LABEL_CHAR_PX)
                  for r in marks]
    # a badge and its rule name to the right of the mark's place; rows keep them apart
    by_x = sorted(range(len(marks)), key=lambda i: mark_items[i][0])
    rows = _levels([(mark_items[i][0] + mark_items[i][1] / 2 - 12, mark_items[i][1]) for i in by_x])
    mark_lv = [0] * len(marks)
    for i, row in zip(by_x, rows):
        mark_lv[i] = row
    height = mark_y0 + (max(mark_lv, default=-1) + 1) * 30 + 30
    parts: list[str] = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="bus-plan" viewBox="0 0 {WIDTH} {height}" '
        f'width="100%" role="img" aria-labelledby="plan-title">',
        f'<title id="plan-title">{_e(plan.name or "Bus")} as described: {len(devices)} devices, '
        f'{len(plan.segments())} segment(s), {len(marks)} rule(s) not passed</title>',
        '<style>.bus-plan text{font:12px system-ui,"DejaVu Sans",sans-serif;fill:' + INK + '}'
        '.bus-plan .small{font-size:10.5px;fill:' + MUTED + '}.bus-plan .mark text{font-weight:700;fill:#fff}'
        '.bus-plan .name{font-weight:600}</style>',
    ]
    # scale: metres along the trunk, under the drops
    step = next(s for s in (10, 20, 50, 100, 200, 250, 500, 1000, 2000, 5000, 10000) if span / s <= 10)
    parts.append(f'<line x1="{x(start)}" y1="{axis_y}" x2="{x(end)}" y2="{axis_y}" stroke="{MUTED}"/>')
    tick = (start // step) * step
    while tick <= end + 1e-9:
        if tick >= start:
            parts.append(f'<line x1="{x(tick)}" y1="{axis_y}" x2="{x(tick)}" y2="{axis_y + 5}" '
                         f'stroke="{MUTED}"/><text class="small" x="{x(tick)}" y="{axis_y + 17}" '
                         f'text-anchor="middle">{tick:g} m</text>')
        tick += step
    # segments
    for seg in plan.segments():
        colour = SEGMENT_SHADES[(seg.index - 1) % 2]
        parts.append(f'<g class="segment" data-segment="{seg.index}"><line x1="{x(seg.start_m)}" y1="{trunk_y}" '
                     f'x2="{x(seg.end_m)}" y2="{trunk_y}" stroke="{colour}" stroke-width="6" stroke-linecap="butt"/>'
                     f'<line x1="{x(seg.start_m)}" y1="{axis_y - 4}" x2="{x(seg.end_m)}" y2="{axis_y - 4}" '
                     f'stroke="{colour}" stroke-width="3"/>'
                     f'<text class="small" x="{(x(seg.start_m) + x(seg.end_m)) / 2}" y="{axis_y + 32}" '
                     f'text-anchor="middle">segment {seg.index}: {seg.start_m:g}-{seg.end_m:g} m</text></g>')
    if plan.ring:
        parts.append(f'<path d="M{x(end)} {trunk_y} q 40 0 40 -40 v -{trunk_y - 70} h -{x(end) - x(start) + 80} '
                     f'v {trunk_y - 70} q 0 40 40 40" fill="none" stroke="{FAIL_COLOUR}" stroke-dasharray="6 4"/>')
    # shield grounds, bias, terminators
    for g in plan.shield_grounds_m or []:
        gx = x(g)
        parts.append(f'<g class="shield-ground" data-position="{g:g}"><line x1="{gx}" y1="{trunk_y + 3}" x2="{gx}" '
                     f'y2="{trunk_y + 50}" stroke="{MUTED}" stroke-dasharray="2 2"/><path d="M{gx - 7} {trunk_y + 50} '
                     f'h14 l-7 8 z" fill="{MUTED}"/><text class="small" x="{gx + 9}" y="{trunk_y + 58}">shield to '
                     f'earth</text></g>')
    for seg in plan.segments():
        mid = (seg.start_m + seg.end_m) / 2
        for pt in terminators_on(plan, seg):
            tx = x(pt.position_m) + (-17 if pt.position_m <= mid else 17)
            ty = trunk_y + (min(DROP_MAX_PX, DROP_BASE_PX + pt.stub_m * DROP_PX_PER_M) if pt.stub_m > 0 else 0)
            parts.append(f'<g class="terminator" data-device="{_e(pt.key)}-terminator"><title>terminator '
                         f'{pt.ohm or 0:g} ohm at {_e(pt.label)}</title><rect x="{tx - 3}" y="{ty - 11}" width="6" '
                         f'height="22" rx="1.5" fill="{INK}"/><text class="small" x="{tx}" y="{ty + 23}" '
                         f'text-anchor="middle">{pt.ohm or 0:g} Ω</text></g>')
        for pt in bias_on(plan, seg):
            bx = x(pt.position_m) + 16
            parts.append(f'<g class="bias" data-device="{_e(pt.key)}-bias"><title>bias network at {_e(pt.label)}'
                         f'</title><path d="M{bx - 5} {trunk_y + 13} l5 -7 l5 7 z M{bx - 5} {trunk_y + 16} l5 7 l5 -7 z" '
                         f'fill="#8a4f7d"/></g>')
    for r in results:
        if r.rule == "termination" and r.status == "fail" and "end_m" in r.numbers and \
                not r.numbers.get("terminators_here"):
            mx = x(r.numbers["end_m"]) + (-17 if r.numbers["end_m"] <= start else 17)
            parts.append(f'<g class="terminator-missing" data-rule="termination-missing"><rect x="{mx - 4}" '
                         f'y="{trunk_y - 12}" width="8" height="24" rx="1.5" fill="none" stroke="{FAIL_COLOUR}" '
                         f'stroke-width="1.5" stroke-dasharray="3 2"/><text class="small" x="{mx}" y="{trunk_y + 26}" '
                         f'text-anchor="middle" style="fill:{FAIL_COLOUR}">none</text></g>')
    # repeaters
    for r in plan.repeaters:
        rx = x(r.position_m)
        parts.append(f'<g class="repeater" data-device="{_e(r.key)}"><title>{_e(r.label)} at {r.position_m:g} m'
                     f'</title><rect x="{rx - 11}" y="{trunk_y - 16}" width="22" height="32" rx="4" fill="#fff" '
                     f'stroke="{INK}" stroke-width="2"/><path d="M{rx - 5} {trunk_y - 7} l8 7 l-8 7" fill="none" '
                     f'stroke="{INK}" stroke-width="2"/><text class="name" x="{rx}" y="{trunk_y - 22}" '
                     f'text-anchor="middle">{_e(r.name)}</text></g>')
    # devices
    for d in devices:
        dx = x(d.position_m)
        lvl = level[d.key]
        figures = result.station(d.address) if result is not None and d.address is not None else None
        share_ = health(figures)
        fill = health_colour(share_)
        dy = trunk_y
        body = []
        if d.stub_m > 0:
            dy = trunk_y + min(DROP_MAX_PX, DROP_BASE_PX + d.stub_m * DROP_PX_PER_M)
            body.append(f'<line x1="{dx}" y1="{trunk_y}" x2="{dx}" y2="{dy}" stroke="{INK}" stroke-width="3"/>'
                        f'<text class="small" x="{dx + 12}" y="{(trunk_y + dy) / 2 + 4}">{d.stub_m:g} m stub</text>')
        ly = trunk_y - 30 - lvl * LEVEL_H
        lx = label_x[d.key]
        body.append(f'<polyline points="{dx},{min(dy, trunk_y) - 11} {dx},{ly + 12} {lx},{ly + 7}" fill="none" '
                    f'stroke="#b9b2a4" stroke-dasharray="1 3"/>')
        if d.key == "master":
            body.append(f'<rect x="{dx - 11}" y="{dy - 11}" width="22" height="22" rx="3" fill="{INK}"/>'
                        f'<text x="{dx}" y="{dy + 4}" text-anchor="middle" style="fill:#fff;font-weight:700">M</text>')
        elif d.key == "sniffer":
            body.append(f'<rect x="{dx - 8}" y="{dy - 8}" width="16" height="16" rx="2" fill="#fff" stroke="{INK}" '
                        f'stroke-width="2" stroke-dasharray="3 2"/><text x="{dx}" y="{dy + 4}" text-anchor="middle" '
                        f'style="font-weight:700;font-size:10px">L</text>')
        else:
            body.append(f'<circle cx="{dx}" cy="{dy}" r="9" fill="{fill}" stroke="{INK}" stroke-width="2"/>')
        if d.label_a != d.wire_on_a:
            body.append(f'<text x="{dx}" y="{dy + 26}" text-anchor="middle" style="fill:{FAIL_COLOUR};'
                        f'font-weight:700">D0/D1 reversed</text>')
        health_text = "" if share_ is None else f" · {100 * share_:.2g} % of polls failed"
        title = f"{d.label} at {d.position_m:g} m, {_ul(d.unit_load)}" + \
            (f", {d.stub_m:g} m stub" if d.stub_m else "") + health_text
        body.append(f'<text class="name" x="{lx}" y="{ly - 10}" text-anchor="middle">{_e(d.name or d.key)}'
                    f'{"" if d.address is None or not d.name else f" ({d.address})"}</text>'
                    f'<text class="small" x="{lx}" y="{ly + 3}" text-anchor="middle">{d.position_m:g} m · '
                    f'{_ul(d.unit_load)}</text>')
        attrs = f' data-address="{d.address}"' if d.address is not None else ""
        shade = "" if share_ is None else f' data-failed-share="{share_:.5f}"'
        parts.append(f'<g class="device" data-device="{_e(d.key)}"{attrs}{shade}><title>{_e(title)}</title>'
                     + "".join(body) + "</g>")
    # rule marks
    for k, (r, lvl) in enumerate(zip(marks, mark_lv), start=1):
        mx = mark_items[k - 1][0]
        my = mark_y0 + lvl * 30
        colour = FAIL_COLOUR if r.status == "fail" else WARN_COLOUR
        parts.append(f'<g class="mark mark-{r.status}" data-rule="{_e(r.rule)}" data-status="{r.status}" '
                     f'data-devices="{_e(",".join(r.devices))}"><title>{_e(r.status)}: {_e(r.statement)}</title>'
                     f'<line x1="{mx}" y1="{trunk_y + 8}" x2="{mx}" y2="{my - 11}" stroke="{colour}" '
                     f'stroke-width="1.2" stroke-dasharray="3 2"/><rect x="{mx - 12}" y="{my - 11}" width="24" '
                     f'height="20" rx="{10 if r.status == "fail" else 3}" fill="{colour}"/>'
                     f'<text x="{mx}" y="{my + 3}" text-anchor="middle">{k}</text>'
                     f'<text class="rule-name" x="{mx + 16 if mx + mark_items[k - 1][1] < WIDTH else mx - 16}" '
                     f'y="{my + 3}" text-anchor="{"start" if mx + mark_items[k - 1][1] < WIDTH else "end"}" '
                     f'style="fill:{colour};font-weight:600">{_e(r.rule)}</text></g>')
    parts.append("</svg>")
    return "".join(parts)


def numbered_marks(results: list[PlanResult]) -> list[tuple[int, PlanResult]]:
    """The results marked in the drawing, with the number each mark shows."""
    return list(enumerate((r for r in results if r.status != "pass"), start=1))


__all__ = ["draw_plan", "health_colour", "legend_items", "numbered_marks"]

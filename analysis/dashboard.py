"""The dashboard: one self-contained HTML file answering "which station fails, when, how badly".

Built in two steps: plain data objects from the AnalysisResult, then an autoescaping template.
Chart data travel as JSON in a ``<script type="application/json">`` element (escaped against
``</script>``); plotly's JavaScript is inlined once; nothing is fetched from anywhere.
"""

from __future__ import annotations

import html
import itertools
import math
from pathlib import Path

from buswitness.analysis.render import environment, finite, script_json, stylesheet
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.summary import UNTIMED_NOTE
from buswitness.fsutil import atomic_write
from markupsafe import Markup

#: Rows in the frame browser (the slowest answers and first failures of each station).
BROWSER_ROWS_PER_STATION = 12
#: Traces drawn per chart before the rest start hidden (toggle them in the legend).
VISIBLE_STATIONS = 8
#: Our palette: calm, readable on a laptop in a plant room; one colour per station cycles.
STATION_COLOURS = ("#2f6f8f", "#b5651d", "#5b8a3a", "#8a4f7d", "#c29b2f", "#3d7f7a", "#9c4a3c", "#55607a",
                   "#7a8f2f", "#a0587a")
FAULT_COLOURS = {"timeout": "#b0413e", "late": "#d08a2c", "corrupt": "#7b5ea7", "crc_errors": "#4a7fa8",
                 "collisions": "#2e8b74"}


def _plotly_js() -> str:
    from plotly.offline import get_plotlyjs
    return get_plotlyjs()


def _minute_axis(result: AnalysisResult, n: int) -> list:
    if result.utc_at(0.0):
        return [result.utc_at(result.minute_start_s(i))[:19] for i in range(n)]
    return [round(result.minute_start_s(i) / 3600.0, 4) for i in range(n)]


def _label(text: str) -> str:
    """Plotly reads a few HTML-like tags in trace names; entities keep a name plain text."""
    return html.escape(text, quote=True)


#: Up to this many points in the time-series traces, they are drawn as SVG ("scatter"); above, with
#: WebGL ("scattergl"), which stays quick with a week of minutes for many stations. Plotly's WebGL
#: layer (regl) compiles its draw calls with the Function constructor, so only a page that needs it
#: allows 'unsafe-eval' in its content-security policy (docs/reliability.md, section 6).
SVG_POINT_LIMIT = 50_000
CSP_BASE = "default-src 'none'; script-src 'unsafe-inline'{eval}; style-src 'unsafe-inline'; img-src data:; font-src data:"


def _choose_renderer(figures: dict) -> bool:
    """Draw the time series as SVG when they are small enough; True when some chart still needs WebGL."""
    gl = [t for fig in figures.values() for t in fig["data"] if t.get("type") == "scattergl"]
    if sum(len(t.get("x") or ()) for t in gl) <= SVG_POINT_LIMIT:
        for t in gl:
            t["type"] = "scatter"
        return False
    return bool(gl)


def content_security_policy(figures: dict) -> str:
    """The page's policy: scripts only inline, and evaluation of strings only for WebGL charts."""
    needs_eval = any(t.get("type", "").endswith("gl") for fig in figures.values() for t in fig["data"])
    return CSP_BASE.format(eval=" 'unsafe-eval'" if needs_eval else "")


def charts(result: AnalysisResult) -> dict:
    """Plotly figure specs (data + layout) for every chart of the dashboard."""
    figures = _charts(result)
    _choose_renderer(figures)
    return figures


def _charts(result: AnalysisResult) -> dict:
    n = result.minutes()
    x = _minute_axis(result, n)
    x_title = "time (UTC)" if result.utc_at(0.0) else "hours since capture start"
    base_layout = {"margin": {"l": 60, "r": 20, "t": 10, "b": 45}, "paper_bgcolor": "rgba(0,0,0,0)",
                   "plot_bgcolor": "#fbfaf7", "font": {"family": "system-ui, sans-serif", "size": 12,
                                                       "color": "#27323a"},
                   "legend": {"orientation": "h", "x": 0, "y": 1.02, "yanchor": "bottom"}, "hovermode": "closest"}
    rt_traces, dist_traces, avail_traces, heat_z, heat_y = [], [], [], [], []
    for i, s in enumerate(result.stations):
        colour = STATION_COLOURS[i % len(STATION_COLOURS)]
        visible = True if i < VISIBLE_STATIONS else "legendonly"
        series = result.station_series(s.address)
        name = _label(s.label)
        if any(math.isfinite(v) for v in series["rt_p95"]):
            rt_traces.append({"type": "scattergl", "mode": "lines", "name": f"{name} p50", "x": x,
                              "y": finite(series["rt_p50"]), "line": {"color": colour, "width": 1},
                              "legendgroup": name, "visible": visible})
            rt_traces.append({"type": "scattergl", "mode": "lines", "name": f"{name} p95", "x": x,
                              "y": finite(series["rt_p95"]), "line": {"color": colour, "width": 2, "dash": "dot"},
                              "legendgroup": name, "visible": visible})
            rt_traces.append({"type": "scattergl", "mode": "markers", "name": f"{name} max", "x": x,
                              "y": finite(series["rt_max"]), "marker": {"color": colour, "size": 4, "symbol": "x"},
                              "legendgroup": name, "visible": visible})
        if s.requests:
            avail = [None if n == 0 else round(100.0 * (a + b) / n, 2)
                     for a, b, n in zip(series["ok"], series["exception"], series["requests"])]
            avail_traces.append({"type": "scattergl", "mode": "lines", "name": name, "x": x, "y": avail,
                                 "line": {"color": colour, "width": 1.5}, "visible": visible})
        edges, counts = result.response_histogram(s.address)
        if counts:
            centres = [(a * b) ** 0.5 for a, b in itertools.pairwise(edges)]
            widths = [b - a for a, b in itertools.pairwise(edges)]
            dist_traces.append({"type": "bar", "name": name, "x": centres, "y": counts, "width": widths,
                                "marker": {"color": colour}, "opacity": 0.75, "visible": visible})
        heat_y.append(name if len(s.label) <= 30 else _label(f"{s.label[:22]}… ({s.address})"))
        heat_z.append([a + b + c + d + e for a, b, c, d, e in zip(series["timeout"], series["late"],
                                                                  series["corrupt"], series["crc_errors"],
                                                                  series["collisions"])])
    timeout = result.timeout.timeout_ms
    shapes = []
    if timeout is not None and rt_traces:
        shapes.append({"type": "line", "xref": "paper", "x0": 0, "x1": 1, "y0": timeout, "y1": timeout,
                       "line": {"color": "#b0413e", "width": 1.5, "dash": "dash"}})
    bus = result.bus_series()
    event_traces = [{"type": "bar", "name": kind.replace("event_", "").replace("_", " "), "x": x, "y": values}
                    for kind, values in bus.items() if kind.startswith("event_")]
    return {
        "rt": {"data": rt_traces, "layout": {**base_layout, "yaxis": {"title": {"text": "response time (ms)"},
                                                                        "rangemode": "tozero"},
                                             "xaxis": {"title": {"text": x_title, "standoff": 4}}, "shapes": shapes}},
        "avail": {"data": avail_traces, "layout": {**base_layout,
                                                   "yaxis": {"title": {"text": "answered in time (%)"},
                                                             "range": [0, 102]},
                                                   "xaxis": {"title": {"text": x_title, "standoff": 4}}}},
        "dist": {"data": dist_traces, "layout": {**base_layout, "barmode": "overlay",
                                                 "xaxis": {"type": "log", "title": {"text": "response time (ms)"}},
                                                 "yaxis": {"title": {"text": "answers"}},
                                                 "shapes": [dict(s, xref="x", yref="paper", x0=timeout, x1=timeout,
                                                                 y0=0, y1=1) for s in shapes]}},
        "timeline": {"data": [{"type": "heatmap", "x": x, "y": heat_y, "z": heat_z, "zmin": 0,
                               "zmax": max(1, max((max(row, default=0) for row in heat_z), default=0)),
                               "colorscale": [[0, "#f4f1ea"], [0.001, "#f1d9a6"], [0.3, "#d08a2c"],
                                              [1, "#8c2f2b"]],
                               "colorbar": {"title": {"text": "per minute"}}, "hoverongaps": False}],
                     "layout": {**base_layout, "margin": {"l": 190, "r": 20, "t": 10, "b": 45},
                                "xaxis": {"title": {"text": x_title, "standoff": 4}}}},
        "events": {"data": event_traces, "layout": {**base_layout, "barmode": "stack",
                                                    "yaxis": {"title": {"text": "events per minute"}},
                                                    "xaxis": {"title": {"text": x_title, "standoff": 4}}}},
        "util": {"data": [{"type": "scatter", "mode": "lines", "name": "line busy", "x": x,
                           "y": [round(100 * u, 3) for u in bus["utilisation"]], "fill": "tozeroy",
                           "line": {"color": "#2f6f8f"}}],
                 "layout": {**base_layout, "yaxis": {"title": {"text": "line busy (%)"}, "rangemode": "tozero"},
                            "xaxis": {"title": {"text": x_title, "standoff": 4}}}},
    }


#: Example transactions shown under each finding (the rest are in the exports).
EXAMPLES_PER_FINDING = 5


def finding_views(result: AnalysisResult) -> list[dict]:
    return [{"severity": f.severity, "statement": f.statement, "station_label": f.station_label,
             "evidence": f.evidence, "examples": f.examples[:EXAMPLES_PER_FINDING], "causes": f.causes,
             "caution": f.caution,
             "when": "" if f.t_start_s is None else f"{_clock(result, f.t_start_s)} to {_clock(result, f.t_end_s)}"}
            for f in result.findings]


def _clock(result: AnalysisResult, t_s: float | None) -> str:
    if t_s is None:
        return "end"
    utc = result.utc_at(t_s)
    return utc[11:19] + " UTC" if utc else f"{t_s / 3600:.2f} h"


def dashboard_data(result: AnalysisResult) -> dict:
    """Everything the template shows, as plain data."""
    rows = []
    for s in result.stations:
        rows.append({"s": s, "fail_pct": None if not s.requests else 100.0 * (s.timeouts + s.late + s.corrupt)
                     / s.requests})
    browser = []
    for r in result.worst_transactions(BROWSER_ROWS_PER_STATION):
        r = dict(r)
        r["clock"] = r["utc"][11:23] if r.get("utc") else f"{r['t_s']:.3f} s"
        browser.append(r)
    damage = result.damage
    return {"plan": plan_panel(result), "untimed": UNTIMED_NOTE if result.header.timing == "none" else "", "result": result, "bus": result.bus, "timeout": result.timeout, "rows": rows, "browser": browser,
            "findings": finding_views(result), "damage": None if damage is None or damage.clean else damage,
            "start": result.header.start_utc, "duration_h": result.bus.duration_s / 3600.0,
            "files": [Path(p).name for p in result.paths]}


def plan_panel(result: AnalysisResult) -> dict | None:
    """The drawing of the bus when the station map is a bus description (analysis/planreport.py), else None."""
    plan = getattr(result.station_map, "plan", None)
    if plan is None:
        return None
    from buswitness.analysis.planreport import panel_data
    from buswitness.analysis.planrules import check_plan
    return panel_data(plan, check_plan(plan), result)


def render_dashboard(result: AnalysisResult) -> str:
    """The dashboard page as one string."""
    env = environment()
    data = dashboard_data(result)
    css = stylesheet("dashboard.css") + (stylesheet("plan_panel.css") if data["plan"] else "")
    figures = charts(result)
    return env.get_template("dashboard.html").render(
        d=data, css=Markup(css), plotly_js=Markup(_plotly_js()),
        chart_json=Markup(script_json(figures)), csp=Markup(content_security_policy(figures)))


def write_dashboard(result: AnalysisResult, path: str | Path) -> Path:
    """Write the dashboard atomically."""
    text = render_dashboard(result)
    with atomic_write(path) as f:
        f.write(text)
    return Path(path)

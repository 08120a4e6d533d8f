"""The dashboard: one self-contained HTML file answering "which station fails, when, how badly".

Built in two steps: plain data objects from the AnalysisResult, then an autoescaping template.
Chart data travel as JSON in a ``<script type="application/json">`` element (escaped against
``</script>``); a partial plotly.js bundle (cartesian traces only, analysis/templates/vendor/) is
inlined once; nothing is fetched from anywhere.
"""

from __future__ import annotations

import html
import itertools
import math
from pathlib import Path

from buswitness.analysis.render import environment, script_json, stylesheet
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.summary import UNTIMED_NOTE
from buswitness.analysis.timebins import Bins, TimeDetail, bins_for
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


#: The partial plotly.js bundle inlined in the page (analysis/templates/vendor/README.md: package, version, licence).
PLOTLY_BUNDLE = "vendor/plotly-cartesian.min.js"


def _plotly_js() -> str:
    """plotly.js with only the cartesian trace types (scatter, bar, heatmap ...): 1.5 MB instead of 4.7 MB."""
    return stylesheet(PLOTLY_BUNDLE)


def _label(text: str) -> str:
    """Plotly reads a few HTML-like tags in trace names; entities keep a name plain text."""
    return html.escape(text, quote=True)


#: The page's policy: scripts and styles only inline, images only from data: and blob: URLs (plotly's
#: "download as PNG" draws the chart into an image from a data: URL and saves it through a blob:).
#: No chart needs the evaluation of strings: every trace is SVG (the bundle has no WebGL trace).
CSP = ("default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; img-src data: blob:; "
       "font-src data:")
#: The x values of a trace that uses the page's shared time axis (filled in by the page's script).
SHARED_X = "@time"
#: Small multiples: pixels per row of station plots (1 column up to 3 stations, 2 up to 12, then 3).
MULTIPLE_ROW_PX = 118
#: A station's plot is on a log scale when its slowest answers are this many times its fastest bins, else
#: on a linear one from zero; the timeout line is drawn on a linear plot only when it is this close to the data.
LOG_SPAN = 8.0
#: Bins whose band reads under this (ms) do not set a plot's scale: they are the adapter's zeros (see zero_spike).
SCALE_FLOOR_MS = 0.5
TIMEOUT_IN_VIEW = 1.6


def content_security_policy(figures: dict | None = None) -> str:
    """The page's content-security policy (the same for every dashboard)."""
    return CSP


def charts(result: AnalysisResult, detail: TimeDetail | None = None) -> dict:
    """Plotly figure specs (data + layout) of every chart with something to draw, and the shared time axis."""
    bins = bins_for(result, detail)
    out = {"time": bins.x, "per": bins.per}
    figures = _charts(result, bins)
    out.update({k: v for k, v in figures.items() if v["data"]})
    return out


def _base_layout() -> dict:
    return {"margin": {"l": 60, "r": 20, "t": 10, "b": 60}, "paper_bgcolor": "#ffffff",  # the cards are white; a downloaded PNG is not see-through
            "plot_bgcolor": "#fbfaf7", "font": {"family": "system-ui, sans-serif", "size": 12, "color": "#27323a"},
            "legend": {"orientation": "h", "x": 0, "y": 1.02, "yanchor": "bottom"}, "hovermode": "closest"}


def _columns(n: int) -> int:
    return 1 if n <= 3 else 2 if n <= 12 else 3


def _small_multiples(result: AnalysisResult, bins: Bins) -> dict:
    """Response time per station: one small plot each (its own scale), on one shared (linked) time axis."""
    stations = [s for s in result.stations
                if any(v is not None for v in bins.stations.get(s.address, {}).get("p95", []))]
    n = len(stations)
    if not n:
        return {"data": [], "layout": {}}
    cols = _columns(n)
    rows = math.ceil(n / cols)
    height = rows * MULTIPLE_ROW_PX + 80
    plot_h = height - 20 - 60
    gap_y = 30 / plot_h
    gap_x = 0.05
    timeout = result.timeout.timeout_ms
    layout = {**_base_layout(), "height": height, "showlegend": True, "margin": {"l": 55, "r": 15, "t": 20, "b": 60},
              "legend": {"orientation": "h", "x": 1, "xanchor": "right", "y": 1.0, "yanchor": "bottom"}}
    data, annotations, shapes = [], [], []
    for i, s in enumerate(stations):
        r, c = divmod(i, cols)
        ax = "" if i == 0 else str(i + 1)
        series = bins.stations[s.address]
        bottom = r == rows - 1 or i + cols >= n
        layout[f"xaxis{ax}"] = {"domain": [c / cols + (gap_x / 2 if c else 0), (c + 1) / cols - (gap_x / 2 if c < cols - 1 else 0)],
                                "anchor": f"y{ax}", "showticklabels": bottom, "ticks": "outside" if bottom else "",
                                **({"matches": "x"} if i else {}),
                                **({"title": {"text": bins.x_title, "standoff": 12}} if bottom and c == 0 else {})}
        values = [v for key in ("p50", "p95", "max") for v in series[key] if v is not None]
        real = [v for v in values if v >= SCALE_FLOOR_MS] or values  # not the adapter's zeros (zero_spike)
        low, high = min(real), max(real)
        log = high > LOG_SPAN * max(low, SCALE_FLOOR_MS)
        with_timeout = bool(timeout) and (log or timeout <= TIMEOUT_IN_VIEW * high)
        top = max(high, timeout if with_timeout else 0.0)
        yrange = ([math.log10(max(low, SCALE_FLOOR_MS) / 1.5), math.log10(top * 1.5)] if log else [0, top * 1.12])
        layout[f"yaxis{ax}"] = {"domain": [max(0.0, 1 - (r + 1) / rows), 1 - r / rows - gap_y],
                                "anchor": f"x{ax}", "type": "log" if log else "linear", "range": yrange,
                                "tickfont": {"size": 10},
                                **({"dtick": 1, "exponentformat": "none"} if log else {"nticks": 4}),
                                **({"title": {"text": "ms", "standoff": 2}} if c == 0 else {})}
        annotations.append({"xref": f"x{ax} domain", "yref": f"y{ax} domain", "x": 0, "y": 1, "xanchor": "left",
                            "yanchor": "bottom", "showarrow": False, "text": _label(s.label), "font": {"size": 12}})
        common = {"xaxis": f"x{ax}", "yaxis": f"y{ax}", "x": SHARED_X, "hovertemplate": "%{y:.1f} ms<extra>" +
                  _label(s.label) + "</extra>"}
        data.append({**common, "type": "scatter", "mode": "lines", "name": "p50", "legendgroup": "p50",
                     "showlegend": i == 0, "y": series["p50"], "line": {"color": "#2f6f8f", "width": 1}})
        data.append({**common, "type": "scatter", "mode": "lines", "name": "p95", "legendgroup": "p95",
                     "showlegend": i == 0, "y": series["p95"], "line": {"color": "#b5651d", "width": 1.8}})
        data.append({**common, "type": "scatter", "mode": "markers", "name": "slowest", "legendgroup": "max",
                     "showlegend": i == 0, "y": series["max"],
                     "marker": {"color": "#8c2f2b", "size": 4, "symbol": "x-thin-open", "line": {"width": 1}}})
        if with_timeout:
            shapes.append({"type": "line", "xref": f"x{ax} domain", "x0": 0, "x1": 1, "yref": f"y{ax}",
                           "y0": timeout, "y1": timeout, "line": {"color": "#b0413e", "width": 1, "dash": "dash"}})
    layout["annotations"] = annotations
    layout["shapes"] = shapes
    return {"data": data, "layout": layout}


#: Midpoints under this (ms) are the timestamp model's floor, not a station's answer: no Modbus station
#: answers within a tenth of a millisecond (frames are separated by at least t3.5, 1.75 ms or more,
#: MSL §2.5.1.1 p13 and its remark).
ZERO_SPIKE_MS = 0.1


def zero_spike(result: AnalysisResult) -> dict | None:
    """Answers whose response time reads as about zero, and the adapter latency that puts them there.

    When the request's last bytes and the answer's first come back in one read of the adapter (its
    latency timer held them together), their timestamps cannot be told apart: the midpoint of the
    interval lands at zero while the interval itself spans up to the latency timer."""
    count = 0
    for s in result.stations:
        edges, counts = result.response_histogram(s.address)
        count += sum(n for b, n in zip(edges[1:], counts) if b <= ZERO_SPIKE_MS)
    if not count:
        return None
    latency = max((p.latency_ms for p in result.header.ports if p.latency_ms is not None), default=None)
    return {"count": count, "limit_ms": ZERO_SPIKE_MS, "latency_ms": latency}


def _charts(result: AnalysisResult, bins: Bins) -> dict:
    base_layout = _base_layout()
    x_axis = {"title": {"text": bins.x_title, "standoff": 12}}  # clear of the date line under the ticks
    avail_traces, dist_traces, heat_z, heat_y = [], [], [], []
    for i, s in enumerate(result.stations):
        colour = STATION_COLOURS[i % len(STATION_COLOURS)]
        visible = True if i < VISIBLE_STATIONS else "legendonly"
        series = bins.stations.get(s.address)
        name = _label(s.label)
        if series is None:
            continue
        if s.requests and any(series["requests"]):
            avail = [None if n == 0 else round(100.0 * a / n, 2) for a, n in zip(series["in_time"], series["requests"])]
            avail_traces.append({"type": "scatter", "mode": "lines", "name": name, "x": SHARED_X, "y": avail,
                                 "line": {"color": colour, "width": 1.5}, "visible": visible})
        edges, counts = result.response_histogram(s.address)
        if counts:
            centres = [(a * b) ** 0.5 for a, b in itertools.pairwise(edges)]
            widths = [b - a for a, b in itertools.pairwise(edges)]
            dist_traces.append({"type": "bar", "name": name, "x": centres, "y": counts, "width": widths,
                                "marker": {"color": colour}, "opacity": 0.75, "visible": visible})
        if s.requests:
            heat_y.append(name if len(s.label) <= 30 else _label(f"{s.label[:22]}… ({s.address})"))
            heat_z.append(series["trouble"])
    timeout = result.timeout.timeout_ms
    dist_shapes, dist_notes = [], []
    if timeout is not None and dist_traces:
        dist_shapes.append({"type": "line", "xref": "x", "x0": timeout, "x1": timeout, "yref": "paper", "y0": 0,
                            "y1": 1, "line": {"color": "#b0413e", "width": 1.5, "dash": "dash"}})
        dist_notes.append({"xref": "x", "x": math.log10(timeout), "yref": "paper", "y": 1, "yanchor": "bottom",
                           "text": f"timeout {timeout:.0f} ms", "showarrow": False, "font": {"size": 11,
                                                                                          "color": "#b0413e"}})
    spike = zero_spike(result) if dist_traces else None
    if spike:
        latency = f" (latency timer {spike['latency_ms']:g} ms)" if spike["latency_ms"] is not None else ""
        dist_notes.append({"xref": "x", "x": math.log10(spike["limit_ms"] / 4), "yref": "paper", "y": 0.6,
                           "ax": 30, "ay": -30, "showarrow": True, "arrowhead": 2, "arrowcolor": "#66727b",
                           "xanchor": "left", "align": "left", "bgcolor": "rgba(255,255,255,0.85)",
                           "font": {"size": 11},
                           "text": (f"{spike['count']} answers read as about 0 ms: request and answer<br>"
                                    f"came in one read of the adapter{latency}, so their<br>"
                                    "times cannot be told apart; the real time lies in their interval")})
    events = [{"type": "bar", "name": kind.replace("_", " "), "x": SHARED_X, "y": values}
              for kind, values in bins.events.items()]
    per = bins.per
    heat_max = max(1, max((max(row, default=0) for row in heat_z), default=0))
    return {
        "rt": _small_multiples(result, bins),
        "avail": {"data": avail_traces, "layout": {**base_layout,
                                                   "yaxis": {"title": {"text": "answered in time (%)"},
                                                             "range": [0, 102]}, "xaxis": x_axis}},
        "dist": {"data": dist_traces, "layout": {**base_layout, "barmode": "overlay",
                                                 "xaxis": {"type": "log", "title": {"text": "response time (ms)"}},
                                                 "yaxis": {"title": {"text": "answers"}},
                                                 "shapes": dist_shapes, "annotations": dist_notes}},
        "timeline": {"data": [{"type": "heatmap", "x": SHARED_X, "y": heat_y, "z": heat_z, "zmin": 0, "zmax": heat_max,
                               "colorscale": [[0, "#f4f1ea"], [0.001, "#f1d9a6"], [0.3, "#d08a2c"], [1, "#8c2f2b"]],
                               "colorbar": {"title": {"text": per}}, "hoverongaps": False}]
                     if heat_z and any(any(row) for row in heat_z) else [],
                     "layout": {**base_layout, "margin": {"l": 190, "r": 20, "t": 10, "b": 60}, "xaxis": x_axis}},
        "events": {"data": events, "layout": {**base_layout, "barmode": "stack",
                                              "yaxis": {"title": {"text": f"events {per}"}}, "xaxis": x_axis}},
        "util": {"data": [{"type": "scatter", "mode": "lines", "name": "line busy", "x": SHARED_X,
                           "y": [round(100 * u, 3) for u in bins.utilisation], "fill": "tozeroy",
                           "line": {"color": "#2f6f8f"}}] if any(bins.utilisation) else [],
                 "layout": {**base_layout, "yaxis": {"title": {"text": "line busy (%)"}, "rangemode": "tozero"},
                            "xaxis": x_axis}},
    }


#: Example transactions shown under each finding (the rest are in the exports).
EXAMPLES_PER_FINDING = 5


def finding_views(result: AnalysisResult) -> list[dict]:
    return [{"severity": f.severity, "statement": f.statement, "station_label": f.station_label,
             "evidence": f.evidence, "examples": f.examples[:EXAMPLES_PER_FINDING], "causes": f.causes,
             "caution": f.caution,
             "when": "" if f.t_start_s is None or f.t_end_s == f.t_start_s
             else f"{_clock(result, f.t_start_s)} to {_clock(result, f.t_end_s)}"}
            for f in result.findings]


def _clock(result: AnalysisResult, t_s: float | None) -> str:
    if t_s is None:
        return "end"
    utc = result.utc_at(t_s)
    hours = t_s / 3600
    return utc[11:19] + " UTC" if utc else f"{0.0 if abs(hours) < 0.005 else hours:.2f} h"


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


def render_dashboard(result: AnalysisResult, detail: TimeDetail | None = None) -> str:
    """The dashboard page as one string; ``detail`` (from the dashboard sink) draws a short capture in finer bins."""
    env = environment()
    data = dashboard_data(result)
    css = stylesheet("dashboard.css") + (stylesheet("plan_panel.css") if data["plan"] else "")
    figures = charts(result, detail)
    return env.get_template("dashboard.html").render(
        d=data, css=Markup(css), plotly_js=Markup(_plotly_js()), shown=set(figures), per=figures["per"],
        spike=zero_spike(result), chart_json=Markup(script_json(figures)), csp=Markup(content_security_policy()))


def write_dashboard(result: AnalysisResult, path: str | Path, detail: TimeDetail | None = None) -> Path:
    """Write the dashboard atomically."""
    text = render_dashboard(result, detail)
    with atomic_write(path) as f:
        f.write(text)
    return Path(path)

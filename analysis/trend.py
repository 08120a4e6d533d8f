"""Trends across nights: per station and night figures from the fleet dataset, and what changed when.

The queries run on DuckDB (embedded) straight over the dataset's Parquet files
(analysis/dataset.py, docs/fleet.md): no copy, no server. Several captures of one bus in one
night add up exactly: counts are summed and the percentiles come from the merged
response-time histograms (the ``rt_bins``/``rt_counts`` of each capture), read by nearest
rank and reported as the bin's centre within the exact minimum and maximum, as for one capture.
A night with one capture reports that capture's own figures (summary.json) unchanged.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from datetime import date
from pathlib import Path

import pandas as pd
from buswitness.analysis.histogram import FINE
from buswitness.errors import UsageError

#: A step in p95 between two nights: the later night's p95 is this many times the earlier (or less
#: than its inverse) *and* differs by at least STEP_P95_MIN_MS (common practice: a change well beyond
#: the night-to-night spread of a steady station, and beyond the histogram's 1 % resolution).
STEP_P95_RATIO = 1.5
STEP_P95_MIN_MS = 5.0
#: A step in the failure rate ((timeouts + late + exceptions + corrupt) / requests) between two nights:
#: at least this many percentage points and at least four times (or a quarter of) the other night (common practice).
STEP_RATE_MIN = 0.01
STEP_RATE_RATIO = 4.0
#: Nights with fewer requests to a station than this are shown but never compared.
MIN_REQUESTS = 20

QUANTILES = (("p50_ms", 0.50), ("p95_ms", 0.95), ("p99_ms", 0.99))


def _glob(root: Path, table: str) -> str:
    return (root / "site=*" / "bus=*" / "date=*" / "capture=*" / f"{table}.parquet").as_posix()


def connect(root: str | Path):
    """A DuckDB connection with one view per dataset table (frames, transactions, events, stations, minutes).

    Every view carries the partition columns ``site``, ``bus``, ``date`` and ``capture`` and is
    limited to the captures in the manifest (a capture being added is never half seen).
    """
    import duckdb
    from buswitness.analysis.dataset import TABLES, manifest
    root = Path(root)
    if not root.is_dir():
        raise UsageError(f"{root}: no such dataset folder (make one with: buswitness dataset add {root} CAPTURE...)")
    ids = sorted(manifest(root))
    if not ids:
        raise UsageError(f"{root}: the dataset holds no captures yet (buswitness dataset add {root} CAPTURE...)")
    con = duckdb.connect()
    con.execute("CREATE TEMP TABLE known AS SELECT unnest(?::VARCHAR[]) AS capture_id", [ids])
    for table in TABLES:
        path = _glob(root, table).replace("'", "''")
        con.execute(f"CREATE VIEW {table} AS SELECT * FROM read_parquet('{path}', hive_partitioning = true, "
                    f"hive_types = {{'site': VARCHAR, 'bus': VARCHAR, 'date': DATE, 'capture': VARCHAR}}) "
                    f"WHERE capture_id IN (SELECT capture_id FROM known)")
    return con


def _where(station: int | None, site: str | None, bus: str | None, since: date | None) -> tuple[str, list]:
    clauses, params = ["TRUE"], []
    for column, value in (("station", station), ("site", site), ("bus", bus), ("night", since)):
        if value is not None:
            clauses.append(f"{column} >= ?" if column == "night" else f"{column} = ?")
            params.append(value)
    return " AND ".join(clauses), params


def nightly(root: str | Path, station: int | None = None, site: str | None = None, bus: str | None = None,
            since: date | None = None, con=None) -> pd.DataFrame:
    """Per site, bus, night and station: requests, timeouts, late, errors, failure rate, p50/p95/p99 (ms)."""
    con = con or connect(root)
    where, params = _where(station, site, bus, since)
    lo, ratio = FINE.lo_ms, FINE.ratio
    q_cols = ",\n".join(f"min(bin) FILTER (WHERE cum >= greatest(1, ceil({q} * tot))) AS k_{name}"
                        for name, q in QUANTILES)
    value = ",\n".join(
        f"CASE WHEN c.captures = 1 THEN c.one_{name} WHEN q.k_{name} IS NULL THEN NULL ELSE "
        f"round(least(greatest({lo} * pow({ratio}, q.k_{name} + 0.5), c.vmin), c.vmax), 3) END AS {name}"
        for name, _ in QUANTILES)
    sql = f"""
    WITH s AS (SELECT * FROM stations WHERE {where}),
    c AS (
        SELECT site, bus, night, station, any_value(name) AS name, count(DISTINCT capture_id) AS captures,
               sum(requests) AS requests, sum(answered) AS answered, sum(timeouts) AS timeouts, sum(late) AS late,
               sum(exceptions) AS exceptions, sum(corrupt) AS corrupt, sum(crc_errors) AS crc_errors,
               sum(retries) AS retries, min(min_ms) AS vmin, max(max_ms) AS vmax,
               any_value(p50_ms) AS one_p50_ms, any_value(p95_ms) AS one_p95_ms, any_value(p99_ms) AS one_p99_ms
        FROM s GROUP BY site, bus, night, station),
    h AS (
        SELECT site, bus, night, station, bin, sum(n) AS n
        FROM (SELECT site, bus, night, station, unnest(rt_bins) AS bin, unnest(rt_counts) AS n FROM s)
        GROUP BY site, bus, night, station, bin),
    cum AS (
        SELECT *, sum(n) OVER (PARTITION BY site, bus, night, station ORDER BY bin) AS cum,
                  sum(n) OVER (PARTITION BY site, bus, night, station) AS tot FROM h),
    q AS (SELECT site, bus, night, station, {q_cols} FROM cum GROUP BY site, bus, night, station)
    SELECT c.site, c.bus, c.night, c.station, c.name, c.captures, c.requests, c.answered, c.timeouts, c.late,
           c.exceptions, c.corrupt, c.exceptions + c.corrupt AS errors, c.crc_errors, c.retries,
           CASE WHEN c.requests > 0 THEN (c.timeouts + c.late + c.exceptions + c.corrupt) / c.requests END
               AS failure_rate,
           {value}
    FROM c LEFT JOIN q USING (site, bus, night, station)
    ORDER BY c.site, c.bus, c.station, c.night
    """
    df = con.execute(sql, params).df()
    df["night"] = pd.to_datetime(df["night"]).dt.date
    return df


@dataclass
class Change:
    """A step between two consecutive nights of one station."""

    site: str
    bus: str
    station: int
    name: str
    figure: str        #: "p95" or "failure rate"
    direction: str     #: "worse" or "better"
    night: str         #: the night it happened (ISO date): the first night at the new level
    before_night: str
    before: float
    after: float
    night_index: int   #: 1-based position of the night among the station's nights

    def text(self) -> str:
        who = f"station {self.station}" + (f" ({self.name})" if self.name else "") + f" on {self.site}/{self.bus}"
        if self.figure == "p95":
            what = f"p95 response time {self.before:.1f} ms -> {self.after:.1f} ms"
        else:
            what = f"failure rate {100 * self.before:.1f} % -> {100 * self.after:.1f} %"
        return f"{self.night} (night {self.night_index}): {who} got {self.direction}: {what} (from {self.before_night})"

    def to_dict(self) -> dict:
        return asdict(self)


def changes(table: pd.DataFrame) -> list[Change]:
    """Steps in p95 or in the failure rate between consecutive nights of each station, in time order."""
    out: list[Change] = []
    for (site, bus, station), g in table.groupby(["site", "bus", "station"], sort=True):
        g = g.sort_values("night").reset_index(drop=True)
        for i in range(1, len(g)):
            a, b = g.iloc[i - 1], g.iloc[i]
            if a["requests"] < MIN_REQUESTS or b["requests"] < MIN_REQUESTS:
                continue
            base = dict(site=site, bus=bus, station=int(station), name=str(b["name"] or ""), night=str(b["night"]),
                        before_night=str(a["night"]), night_index=i + 1)
            p_a, p_b = a["p95_ms"], b["p95_ms"]
            if _num(p_a) and _num(p_b) and abs(p_b - p_a) >= STEP_P95_MIN_MS and (
                    p_b >= STEP_P95_RATIO * p_a or p_a >= STEP_P95_RATIO * p_b):
                out.append(Change(figure="p95", direction="worse" if p_b > p_a else "better",
                                  before=float(p_a), after=float(p_b), **base))
            r_a, r_b = a["failure_rate"], b["failure_rate"]
            if _num(r_a) and _num(r_b) and abs(r_b - r_a) >= STEP_RATE_MIN and (
                    r_b >= STEP_RATE_RATIO * r_a or r_a >= STEP_RATE_RATIO * r_b):
                out.append(Change(figure="failure rate", direction="worse" if r_b > r_a else "better",
                                  before=float(r_a), after=float(r_b), **base))
    return sorted(out, key=lambda c: (c.night, c.site, c.bus, c.station, c.figure))


def bus_ranking(table: pd.DataFrame) -> pd.DataFrame:
    """Each bus on its latest night, worst first: requests, failures, failure rate, slowest station by p95."""
    if table.empty:
        return pd.DataFrame(columns=["site", "bus", "night", "requests", "failed", "failure_rate", "worst_station",
                                     "worst_p95_ms"])
    rows = []
    for (site, bus), g in table.groupby(["site", "bus"], sort=True):
        last = g[g["night"] == g["night"].max()]
        failed = int((last["timeouts"] + last["late"] + last["errors"]).sum())
        requests = int(last["requests"].sum())
        slow = last.sort_values("p95_ms", ascending=False, na_position="last").iloc[0]
        rows.append({"site": site, "bus": bus, "night": last["night"].iloc[0], "requests": requests, "failed": failed,
                     "failure_rate": failed / requests if requests else None, "worst_station": int(slow["station"]),
                     "worst_p95_ms": slow["p95_ms"]})
    out = pd.DataFrame(rows)
    return out.sort_values(["failure_rate", "worst_p95_ms"], ascending=False, na_position="last").reset_index(drop=True)


def _num(v) -> bool:
    return v is not None and not (isinstance(v, float) and math.isnan(v))


def text_summary(table: pd.DataFrame, found: list[Change]) -> str:
    """The trend as text: what changed and when, then each station's nights."""
    if table.empty:
        return "no nights match (check --station, --site, --bus and --since)"
    nights = sorted(set(table["night"]))
    buses = table[["site", "bus"]].drop_duplicates()
    lines = [f"{len(nights)} night(s) from {nights[0]} to {nights[-1]}, {len(buses)} bus(es), "
             f"{table['station'].nunique()} station address(es)"]
    lines.append("")
    if found:
        lines.append("what changed and when:")
        lines.extend(f"  {c.text()}" for c in found)
    else:
        lines.append("what changed and when: no step in p95 or failure rate between nights")
    ranking = bus_ranking(table)
    if len(ranking) > 1:
        lines.append("")
        lines.append("buses on their latest night, worst first:")
        for _, r in ranking.iterrows():
            rate = "-" if not _num(r["failure_rate"]) else f"{100 * r['failure_rate']:.2f} %"
            lines.append(f"  {r['site']}/{r['bus']:12s} {str(r['night'])}  failed {r['failed']} of {r['requests']} "
                         f"({rate}), slowest station {r['worst_station']} p95 {_ms(r['worst_p95_ms'])} ms")
    for (site, bus, station), g in table.groupby(["site", "bus", "station"], sort=True):
        name = str(g["name"].iloc[0] or "")
        lines.append("")
        lines.append(f"{site}/{bus} station {station}" + (f" ({name})" if name else ""))
        lines.append(f"  {'night':10s} {'requests':>9s} {'timeouts':>8s} {'late':>6s} {'errors':>6s} "
                     f"{'p50 ms':>8s} {'p95 ms':>8s} {'p99 ms':>8s}")
        for _, r in g.iterrows():
            lines.append(f"  {str(r['night']):10s} {int(r['requests']):9d} {int(r['timeouts']):8d} {int(r['late']):6d} "
                         f"{int(r['errors']):6d} {_ms(r['p50_ms']):>8s} {_ms(r['p95_ms']):>8s} {_ms(r['p99_ms']):>8s}")
    return "\n".join(lines)


def _ms(v) -> str:
    return f"{v:.1f}" if _num(v) else "-"


# -- the page ----------------------------------------------------------------------------------------

COLOURS = {"p50_ms": "#5b8a3a", "p95_ms": "#2f6f8f", "p99_ms": "#8a4f7d", "timeouts": "#b0413e", "late": "#d08a2c",
           "errors": "#7b5ea7"}


def charts(table: pd.DataFrame, found: list[Change]) -> list[dict]:
    """One plotly figure per site, bus and station: response-time percentiles and failures by night."""
    out = []
    changed = {(c.site, c.bus, c.station) for c in found}
    groups = sorted(table.groupby(["site", "bus", "station"], sort=True),
                    key=lambda kv: (tuple(kv[0][:2]) + (int(kv[0][2]),)) not in changed)
    for (site, bus, station), g in groups:
        g = g.sort_values("night")
        x = [str(n) for n in g["night"]]
        data = []
        for col in ("p50_ms", "p95_ms", "p99_ms"):
            data.append({"type": "scatter", "mode": "lines+markers", "name": col.replace("_ms", ""), "x": x,
                         "y": [None if not _num(v) else float(v) for v in g[col]], "line": {"color": COLOURS[col]},
                         "hovertemplate": "%{x}: %{y:.1f} ms<extra>" + col.replace("_ms", "") + "</extra>"})
        for col in ("timeouts", "late", "errors"):
            data.append({"type": "bar", "name": col, "x": x, "y": [int(v) for v in g[col]], "yaxis": "y2",
                         "marker": {"color": COLOURS[col]}, "opacity": 0.55})
        marks = [c for c in found if (c.site, c.bus, c.station) == (site, bus, int(station))]
        shapes = [{"type": "line", "x0": c.night, "x1": c.night, "yref": "paper", "y0": 0, "y1": 1,
                   "line": {"color": "#9c2f2b" if c.direction == "worse" else "#5a6f2f", "dash": "dot", "width": 2}}
                  for c in marks]
        annotations = [{"x": c.night, "yref": "paper", "y": 1.0, "text": f"{c.figure} {c.direction}",
                        "showarrow": False, "yanchor": "bottom", "xanchor": "left", "font": {"size": 11},
                        "yshift": 14 * k} for k, c in enumerate(marks)]
        most = int((g["timeouts"] + g["late"] + g["errors"]).max()) if len(g) else 0
        layout = {"margin": {"l": 60, "r": 60, "t": 40, "b": 50}, "paper_bgcolor": "rgba(0,0,0,0)",
                  "plot_bgcolor": "#fbfaf7", "barmode": "stack", "height": 380,
                  "font": {"family": "system-ui, sans-serif", "size": 12, "color": "#27323a"},
                  "legend": {"orientation": "h", "x": 0, "y": -0.22, "yanchor": "top"},
                  "xaxis": {"type": "category", "title": {"text": "night (UTC date of the capture start)"}},
                  "yaxis": {"title": {"text": "response time (ms)"}, "rangemode": "tozero"},
                  "yaxis2": {"title": {"text": "requests failed"}, "overlaying": "y", "side": "right",
                             "rangemode": "tozero", "showgrid": False, "tickmode": "linear", "tick0": 0,
                             "dtick": max(1, math.ceil(most / 4)), **({"range": [0, 1]} if most == 0 else {})},
                  "shapes": shapes, "annotations": annotations}
        name = str(g["name"].iloc[0] or "")
        out.append({"id": f"chart-{len(out)}", "title": f"{site} / {bus} · station {station}"
                    + (f" · {name}" if name else ""), "spec": {"data": data, "layout": layout},
                    "rows": g.to_dict("records")})
    return out


def render_page(table: pd.DataFrame, found: list[Change], root: str | Path, filters: dict) -> str:
    from buswitness import __version__
    from buswitness.analysis.dashboard import _plotly_js
    from buswitness.analysis.render import environment, script_json, stylesheet
    from markupsafe import Markup
    figs = charts(table, found)
    nights = sorted(set(table["night"])) if not table.empty else []
    env = environment()
    return env.get_template("trend.html").render(
        t={"root": str(root), "filters": {k: v for k, v in filters.items() if v is not None}, "charts": figs,
           "changes": found, "nights": nights, "ranking": bus_ranking(table).to_dict("records"), "text": text_summary(table, found), "version": __version__,
           "buses": table[["site", "bus"]].drop_duplicates().shape[0] if not table.empty else 0},
        css=Markup(stylesheet("dashboard.css") + stylesheet("trend.css")), plotly_js=Markup(_plotly_js()),
        chart_json=Markup(script_json({c["id"]: c["spec"] for c in figs})))


def write_page(path: str | Path, table: pd.DataFrame, found: list[Change], root: str | Path, filters: dict) -> Path:
    from buswitness.fsutil import atomic_write
    text = render_page(table, found, root, filters)
    with atomic_write(path) as f:
        f.write(text)
    return Path(path)

"""The fleet dataset and trends: a week of simulated nights for two buses.

Bus "east" has a station that degrades from night 4 and is fixed on night 6 (simulate/nights.py);
bus "west" stays healthy. The oracles: the simulator's own schedule of the fault (which nights,
which station), and each capture's summary.json figures, which the DuckDB queries over the
dataset must reproduce exactly.

Source: the checks compare with what the test itself made (the simulator's schedule of the fault, each capture's own summary.json); no check value comes from outside the project.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytest.importorskip("duckdb")
pytest.importorskip("pyarrow")

from buswitness.analysis.dataset import TABLES, add_captures, check, manifest, repair
from buswitness.analysis.pipeline import AnalysisOptions, analyze
from buswitness.analysis.summary import summary_dict
from buswitness.analysis.trend import changes, connect, nightly, text_summary
from buswitness.capture.sources import open_capture
from buswitness.simulate.nights import Fault, fleet_nights

NIGHTS = 7
FAULT = Fault(station=3, worse_from=4, fixed_on=6)
NIGHT_S = 60.0


@pytest.fixture(scope="module")
def week(tmp_path_factory):
    folder = tmp_path_factory.mktemp("week")
    return fleet_nights(folder / "captures", {"east": FAULT, "west": None}, NIGHTS, NIGHT_S)


@pytest.fixture(scope="module")
def dataset(week, tmp_path_factory):
    root = tmp_path_factory.mktemp("fleet") / "ds"
    for bus, paths in week.items():
        add_captures(root, paths, site="plant", bus=bus)
    return root


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*"))
            if p.is_file() and "_staging" not in p.parts}


def test_every_capture_is_in_the_dataset_partitioned_by_site_bus_and_date(dataset, week):
    entries = manifest(dataset)
    assert len(entries) == 2 * NIGHTS and check(dataset) == []
    assert {(e["site"], e["bus"]) for e in entries.values()} == {("plant", "east"), ("plant", "west")}
    assert sorted({e["date"] for e in entries.values()}) == [f"2026-{d}" for d in
                                                             ("11-30", "12-01", "12-02", "12-03", "12-04", "12-05",
                                                              "12-06")]
    for e in entries.values():
        folder = dataset / e["path"]
        assert folder.parts[-4:] == (f"site={e['site']}", f"bus={e['bus']}", f"date={e['date']}",
                                     f"capture={e['capture_id']}")
        assert all((folder / f"{t}.parquet").is_file() for t in TABLES)


def test_tables_carry_capture_id_typed_utc_times_protocol_and_schema_version(dataset):
    con = connect(dataset)
    for table, column in (("frames", "t_start"), ("transactions", "t_request_end"), ("events", "t"),
                          ("stations", "start"), ("minutes", "minute")):
        types = {row[0]: row[1] for row in con.execute(f"DESCRIBE {table}").fetchall()}
        assert types[column] in ("TIMESTAMP WITH TIME ZONE", "TIMESTAMP_NS WITH TIME ZONE", "TIMESTAMPTZ_NS",
                                 "TIMESTAMPTZ"), (table, types[column])
        assert {"capture_id", "protocol", "schema_version", "site", "bus", "date"} <= set(types), table
    assert con.execute("SELECT DISTINCT protocol, schema_version FROM frames").fetchall() == [("modbus-rtu", 1)]
    # the first frame of each night lies just after 22:00 UTC of its date
    rows = con.execute("SELECT date, min(t_start) FROM frames WHERE bus = 'east' GROUP BY date ORDER BY date").fetchall()
    assert all(t.hour == 22 and t.minute == 0 and t.date() == d for d, t in rows)


def test_duckdb_figures_equal_each_captures_summary_json_exactly(dataset, week):
    con = connect(dataset)
    for path in week["east"][2:5] + week["west"][:1]:
        summary = summary_dict(analyze(open_capture(path), AnalysisOptions()))
        cid = next(e["capture_id"] for e in manifest(dataset).values() if e["date"] == summary["capture"][
            "start_utc"][:10] and e["bus"] == path.name.split("-")[0])
        got = con.execute("SELECT * EXCLUDE (rt_bins, rt_counts) FROM stations WHERE capture_id = ? ORDER BY station",
                          [cid]).df()
        assert list(got["station"]) == [s["address"] for s in summary["stations"]]
        for s, (_, row) in zip(summary["stations"], got.iterrows()):
            for key in ("requests", "answered", "ok", "timeouts", "late", "exceptions", "corrupt", "crc_errors",
                        "collisions", "retries"):
                assert row[key] == s[key], (path.name, s["address"], key)
            for q in ("min", "p50", "p95", "p99", "max"):
                assert (row[f"{q}_ms"] if row[f"{q}_ms"] == row[f"{q}_ms"] else None) == s["response_ms"][q]
        # the transactions table holds the same outcomes as the figures (judged against the same timeout)
        counts = dict(((st, o), n) for st, o, n in con.execute(
            "SELECT station, outcome, count(*) FROM transactions WHERE capture_id = ? GROUP BY ALL", [cid]).fetchall())
        for s in summary["stations"]:
            assert counts.get((s["address"], "timeout"), 0) == s["timeouts"]
            assert counts.get((s["address"], "late"), 0) == s["late"]
            assert counts.get((s["address"], "ok"), 0) == s["ok"]
        # and the nightly trend of a night with one capture is that capture's figures
        night = nightly(dataset, bus=path.name.split("-")[0], con=con)
        night = night[night["night"].astype(str) == summary["capture"]["start_utc"][:10]]
        for s in summary["stations"]:
            r = night[night["station"] == s["address"]].iloc[0]
            assert (r["requests"], r["timeouts"], r["late"], r["p95_ms"]) == (
                s["requests"], s["timeouts"], s["late"], s["response_ms"]["p95"])


def test_trend_names_the_station_the_night_it_got_worse_and_the_night_of_the_fix(dataset):
    table = nightly(dataset)
    found = changes(table)
    east3 = [c for c in found if (c.bus, c.station) == ("east", FAULT.station)]
    # p95 of a 60 s night of a degraded station rides on a handful of late answers, so it may also
    # step between two degraded nights; it first worsens on the night the fault began and last
    # improves on the night of the fix
    p95 = [(c.direction, c.night_index) for c in east3 if c.figure == "p95"]
    assert p95[0] == ("worse", FAULT.worse_from) and p95[-1] == ("better", FAULT.fixed_on)
    assert all(FAULT.worse_from <= n <= FAULT.fixed_on for _d, n in p95)
    failures = [(c.direction, c.night_index) for c in east3 if c.figure != "p95"]
    assert set(failures) == {("worse", FAULT.worse_from), ("better", FAULT.fixed_on)}
    assert {(c.direction, c.night) for c in east3 if c.figure != "p95"} == {("worse", "2026-12-03"),
                                                                            ("better", "2026-12-05")}
    assert not [c for c in found if c.bus == "west"]
    text = text_summary(table, found)
    assert "2026-12-03 (night 4): station 3" in text and "2026-12-05 (night 6): station 3" in text


def test_trend_filters_by_station_bus_and_since(dataset):
    table = nightly(dataset, station=3, bus="east", since=__import__("datetime").date(2026, 12, 2))
    assert set(table["station"]) == {3} and set(table["bus"]) == {"east"}
    assert [str(n) for n in table["night"]] == ["2026-12-02", "2026-12-03", "2026-12-04", "2026-12-05", "2026-12-06"]


def test_two_captures_of_one_night_add_up_exactly(tmp_path, week):
    """Two captures on the same bus and night: counts add, percentiles from the merged histograms."""
    from buswitness.analysis.result import merge_results
    from buswitness.simulate.nights import night_capture
    other = night_capture(tmp_path, "east", 2, NIGHT_S, FAULT, seed=7)
    root = tmp_path / "ds"
    add_captures(root, [week["east"][1], other], site="plant", bus="east")
    merged = merge_results([analyze(open_capture(p), AnalysisOptions()) for p in (week["east"][1], other)])
    table = nightly(root)
    assert (table["captures"] == 2).all()
    for s in merged.stations:
        r = table[table["station"] == s.address].iloc[0]
        assert r["requests"] == s.requests and r["timeouts"] == s.timeouts
        # percentiles: same histogram, same nearest-rank rule (merged result clamps to the merged min/max)
        assert r["p50_ms"] == s.response_ms["p50"] and r["p95_ms"] == s.response_ms["p95"]


def test_re_adding_a_capture_is_a_no_op(dataset, week):
    before = _files(dataset)
    stamps = {p: p.stat().st_mtime_ns for p in dataset.rglob("*.parquet")}
    done = add_captures(dataset, week["east"][:3] + week["east"][:1], site="plant", bus="east")
    assert [d.status for d in done] == ["present"] * 4
    assert _files(dataset) == before and stamps == {p: p.stat().st_mtime_ns for p in dataset.rglob("*.parquet")}
    # the same content under another name and another bus is still the same capture
    copy = dataset.parent / "renamed.bwcap"
    copy.write_bytes(week["east"][0].read_bytes())
    assert add_captures(dataset, [copy], site="plant", bus="west")[0].status == "present"


def test_a_failure_while_adding_leaves_nothing_behind(tmp_path, week, monkeypatch):
    from buswitness.analysis import dataset as ds
    root = tmp_path / "ds"
    add_captures(root, week["west"][:1], site="plant", bus="west")
    before = _files(root)

    def broken(self, result):
        raise KeyboardInterrupt  # as if interrupted while the capture's folder is being finished

    monkeypatch.setattr(ds.DatasetSink, "_minutes", broken)
    with pytest.raises(KeyboardInterrupt):
        add_captures(root, week["west"][1:2], site="plant", bus="west")
    assert _files(root) == before and check(root) == []
    assert not any((root / "_staging").iterdir())


def test_repair_leaves_the_staging_folder_of_a_running_add_alone(tmp_path):
    from buswitness.analysis.dataset import _host
    root = tmp_path / "ds"
    running = root / "_staging" / f"abc.{_host()}.{os.getpid()}.0000"
    gone = root / "_staging" / f"abd.{_host()}.999999999.0000"
    for p in (running, gone):
        p.mkdir(parents=True)
    repair(root)
    assert running.exists() and not gone.exists()


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "buswitness.cli.main", *args]


@pytest.mark.slow
def test_killing_dataset_add_leaves_the_dataset_consistent_and_adding_again_completes_it(tmp_path, week):
    root = tmp_path / "ds"
    paths = [str(p) for p in week["east"] + week["west"]]
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    for delay in (0.8, 1.6, 2.4, 3.2):
        proc = subprocess.Popen(_cli("dataset", "add", str(root), *paths, "--serial", "--no-progress"),
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
        time.sleep(delay)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        # whatever was in place is whole: every listed capture complete, nothing half seen by a query
        for folder in root.glob("site=*/bus=*/date=*/capture=*"):
            assert all((folder / f"{t}.parquet").is_file() for t in TABLES) and (folder / "capture.json").is_file()
        repair(root)
        assert check(root) == []
        if (root / "_manifest").exists() and manifest(root):
            connect(root).execute("SELECT count(*) FROM frames").fetchall()
    r = subprocess.run(_cli("dataset", "add", str(root), *paths, "--serial", "--no-progress"), capture_output=True,
                       text=True, env=env)
    assert r.returncode == 0, r.stderr
    assert len(manifest(root)) == len(paths) and check(root) == []


def test_a_dask_local_cluster_builds_the_same_dataset_as_the_serial_path(tmp_path, week):
    distributed = pytest.importorskip("distributed")
    paths = week["east"][:3] + week["west"][:2]
    serial, parallel = tmp_path / "serial", tmp_path / "dask"
    add_captures(serial, paths, site="plant", bus="mixed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        done = add_captures(parallel, paths, site="plant", bus="mixed", scheduler=client)
    assert sorted(d.status for d in done) == ["added"] * len(paths)
    a, b = _files(serial), _files(parallel)
    assert sorted(a) == sorted(b)
    assert a == b  # byte for byte: every Parquet file, capture.json and manifest entry


def test_dataset_and_trend_commands(tmp_path, week):
    root = tmp_path / "ds"
    r = subprocess.run(_cli("dataset", "add", str(root), *map(str, week["east"]), "--site", "plant", "--bus", "east",
                            "--serial"), capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert r.stdout.count("added ") == NIGHTS and "7 capture(s) added" in r.stdout
    r = subprocess.run(_cli("dataset", "add", str(root), str(week["east"][0]), "--site", "plant", "--bus", "east"),
                       capture_output=True, text=True)
    assert r.returncode == 0 and "0 capture(s) added, 1 already" in r.stdout
    r = subprocess.run(_cli("trend", str(root), "--station", "3", "--html", str(tmp_path / "t.html"), "--json",
                            str(tmp_path / "t.json")), capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert "2026-12-03 (night 4): station 3" in r.stdout
    page = (tmp_path / "t.html").read_text()
    assert "Plotly" in page and "https://" not in page.split("<script>")[0]
    data = json.loads((tmp_path / "t.json").read_text())
    nights = {c["night"] for c in data["changes"]}  # (a p95 step between two degraded nights may show too)
    assert {"2026-12-03", "2026-12-05"} <= nights <= {"2026-12-03", "2026-12-04", "2026-12-05"}
    # more than one capture: built on a local Dask cluster by default
    r = subprocess.run(_cli("dataset", "add", str(tmp_path / "ds-dask"), *map(str, week["west"][:3]), "--site", "plant",
                            "--bus", "west", "--workers", "2", "--no-progress"), capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert "3 capture(s) added" in r.stdout and check(tmp_path / "ds-dask") == []
    for bad in (["dataset", "add", str(root), str(week["east"][0]), "--site", "a b"], ["trend", str(tmp_path / "none")]):
        r = subprocess.run(_cli(*bad), capture_output=True, text=True)
        assert r.returncode in (2, 3) and len(r.stderr.strip().splitlines()) == 1, r.stderr

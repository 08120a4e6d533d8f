"""Outputs as sinks: analyze(source, sinks=[...]) feeds each one; progress is a callback, never drawn.

Source: the checks compare with what the test itself made; no check value comes from outside the project.
"""

from __future__ import annotations

import json

import pytest
from buswitness.analysis.pipeline import AnalysisOptions, analyze
from buswitness.analysis.sinks import Sink
from buswitness.analysis.sinks.csv import CsvSink
from buswitness.analysis.sinks.dashboard import DashboardSink
from buswitness.analysis.sinks.parquet import ParquetSink
from buswitness.analysis.sinks.summary import SummarySink
from buswitness.capture.sources import open_capture
from buswitness.simulate import load_scenario, simulate


@pytest.fixture(scope="module")
def capture(tmp_path_factory):
    path = tmp_path_factory.mktemp("sinks") / "night.bwcap"
    simulate(load_scenario("fault-absent"), duration_s=60, seed=2).write(path)
    return path


def test_every_sink_writes_its_output_and_the_progress_callback_sees_every_byte(capture, tmp_path, capfd):
    pytest.importorskip("pyarrow")
    calls = []
    sinks = [DashboardSink(tmp_path / "report.html"), SummarySink(tmp_path / "summary.json"),
             CsvSink(tmp_path / "csv"), ParquetSink(tmp_path / "pq")]
    (tmp_path / "csv").mkdir()
    (tmp_path / "pq").mkdir()
    result = analyze(open_capture(capture), AnalysisOptions(), sinks=sinks,
                     progress=lambda done, total: calls.append((done, total)))
    names = sorted(p.name for p in result.written)
    assert names == sorted(["report.html", "summary.json"] + [f"{t}.{k}" for t in ("transactions", "frames", "events")
                                                              for k in ("csv", "parquet")])
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert [s["requests"] for s in summary["stations"]] == [s.requests for s in result.stations]
    assert calls and calls[-1][0] >= calls[0][0] and all(t == calls[0][1] for _, t in calls)
    assert capfd.readouterr().err == ""  # the analysis floor draws nothing


class Broken(Sink):
    def close(self, result):
        raise RuntimeError("disk gone")


def test_a_failing_sink_leaves_no_half_written_output(capture, tmp_path):
    (tmp_path / "csv").mkdir()
    with pytest.raises(RuntimeError):
        analyze(open_capture(capture), AnalysisOptions(), sinks=[Broken(), CsvSink(tmp_path / "csv")])
    assert list((tmp_path / "csv").iterdir()) == []

"""Reports never call the minimum and maximum response times exact: they are interval midpoints.

Source: the project's own timestamp model (docs/reading-the-report.md); no check value comes
from outside the project.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from buswitness.analysis import AnalysisOptions, analyze
from buswitness.analysis.dashboard import write_dashboard
from buswitness.analysis.evidence import write_evidence
from buswitness.analysis.summary import summary_dict, text_summary
from buswitness.capture.sources import open_capture

ROOT = Path(__file__).resolve().parent.parent
_EXACT_EXTREMES = re.compile(r"(min(imum)?|max(imum)?)[^.;\n]{0,40}\bexact", re.IGNORECASE)


@pytest.fixture(scope="module")
def result():
    return analyze(open_capture(ROOT / "sample_captures" / "tiny-poll.hex"), AnalysisOptions(progress=False))


def _text(html: str) -> str:
    return " ".join(re.sub(r"<[^>]+>", " ", html).split())


def test_text_summary_calls_the_response_figures_midpoints(result):
    text = text_summary(result)
    assert not _EXACT_EXTREMES.search(text)
    assert "response (interval midpoints) p50" in text


def test_summary_json_method_says_min_and_max_are_midpoints(result):
    rule = summary_dict(result)["method"]["quantile_rule"]
    assert not _EXACT_EXTREMES.search(rule)
    assert "min and max are the smallest and largest midpoints" in rule


def test_evidence_and_dashboard_say_min_and_max_are_midpoints(result, tmp_path):
    station = result.stations[0].address
    evidence = _text(write_evidence(result, station, tmp_path / "e.html").read_text())
    dashboard = _text(write_dashboard(result, tmp_path / "d.html").read_text())
    for page in (evidence, dashboard):
        assert not _EXACT_EXTREMES.search(page)
    assert "minimum and maximum are the smallest and largest midpoints" in evidence
    assert "max is the largest midpoint" in dashboard


@pytest.mark.parametrize("doc", ["docs/reading-the-report.md", "docs/summary-schema.md"])
def test_docs_do_not_call_min_and_max_exact(doc):
    text = " ".join((ROOT / doc).read_text().split())
    assert not re.search(r"min(imum)? and max(imum)? (are )?exact", text, re.IGNORECASE)
    assert "largest midpoints" in text

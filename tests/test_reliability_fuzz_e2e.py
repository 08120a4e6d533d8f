"""End-to-end fuzzing in CI: 10,000 generated captures, header fields included, through what ``analyze``
and ``evidence`` run (``fuzz/e2e.py``), with no exception other than the typed ones.

Each case is a fresh capture file: a header with up to four hostile field values (wrong types,
dates near the year 9999, huge or negative numbers, control characters, markup) and up to 40
records of Modbus traffic, noise, any ports and flags, and times that jump towards the ends of
int64. Every case goes through the capture reader, the decoder's settings and every function of
``analyze`` and ``evidence`` that reads the header or the damage report (text summary,
summary.json, dashboard and evidence data, their templates now and then); every 200th case goes
through the whole of both verbs (decoding and figures included), in-process. Outside CI,
``fuzz/fuzz_e2e.py`` runs the same cases by the million.
Source: the checks compare with the project's own contract (docs/reliability.md: a typed error
or a result, never another exception); no check value comes from outside the project.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "fuzz"))

import e2e  # noqa: E402

CASES = 10_000


@pytest.mark.slow
def test_ten_thousand_generated_captures_give_a_typed_error_or_reports():
    runner = e2e.SlimRunner()
    tally = e2e.run_slim_cases(range(CASES), runner)
    assert tally.cases == CASES
    assert not tally.failures, "\n".join(f"seed {s}:\n{tb}" for s, tb in tally.failures[:3])
    # The generator must reach both outcomes often, or it tests nothing.
    assert 0.2 * CASES < tally.refused < 0.8 * CASES


def test_generated_captures_through_the_whole_of_analyze_and_evidence():
    # The record-time bugs the harness found (docs/reliability.md) showed in the first 40 cases.
    tally = e2e.run_cases(range(40))
    assert not tally.failures, tally.failures[0][1] if tally.failures else ""


def test_the_same_seed_gives_the_same_capture():
    assert e2e.make_case(17) == e2e.make_case(17)
    assert e2e.make_case(17) != e2e.make_case(18)

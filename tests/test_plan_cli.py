"""``buswitness plan check``: verdicts printed, JSON written, mistakes are one line with the README's exit codes.

Source: the checks compare with the sample description and the rules' own sources (tests/test_planrules.py);
exit codes are the README's.
"""

from __future__ import annotations

import json
from pathlib import Path

from buswitness.cli.main import main

SAMPLE = Path(__file__).resolve().parents[1] / "sample_captures" / "pumpstation-bus.toml"


def test_check_prints_failures_first_with_fix_source_and_caution(capsys, tmp_path):
    out_json = tmp_path / "plan.json"
    assert main(["plan", "check", str(SAMPLE), "--json", str(out_json)]) == 0
    text = capsys.readouterr().out
    assert "3 fail, 0 warn" in text
    lines = [ln for ln in text.splitlines() if ln[:4] in ("FAIL", "WARN", "PASS")]
    assert [ln[:4] for ln in lines][:3] == ["FAIL"] * 3 and lines[-1].startswith("PASS")
    assert "MSL §3.4.5" in text and "local electrical codes and licensed practice" in text
    data = json.loads(out_json.read_text())
    assert data["counts"] == {"fail": 3, "warn": 0, "pass": 7}
    assert {r["rule"] for r in data["results"] if r["status"] == "fail"} == {"termination", "stub-length", "bias"}


def test_bad_description_is_one_line_exit_3(capsys, tmp_path):
    bad = tmp_path / "bus.toml"
    bad.write_text('[bus]\nname = "x"\n[stations.7]\nposition_m = "far"\n')
    assert main(["plan", "check", str(bad)]) == 3
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "line 4" in err and "position_m" in err


def test_plan_without_subcommand_is_a_usage_error(capsys):
    assert main(["plan"]) == 2
    assert "plan check" in capsys.readouterr().err


def test_missing_capture_is_exit_3(capsys, tmp_path):
    assert main(["plan", "check", str(SAMPLE), "--capture", str(tmp_path / "none.bwcap"), "--no-progress"]) == 3

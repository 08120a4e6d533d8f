"""``buswitness demo``: the README's first command writes a realistic night's reports.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import json

from buswitness.cli.main import main


def test_demo_writes_capture_reports_and_the_late_stations_evidence(tmp_path, capsys):
    folder = tmp_path / "demo"
    assert main(["demo", "--dir", str(folder), "--duration", "20m", "--no-progress"]) == 0
    out = capsys.readouterr().out
    names = sorted(p.name for p in folder.iterdir())
    assert names == ["evidence-station7.html", "pumpstation-night.bwcap", "report.html", "stations.toml",
                     "summary.json"]
    for name in names:
        assert str(folder / name) in out
    summary = json.loads((folder / "summary.json").read_text())
    drive_b = next(s for s in summary["stations"] if s["address"] == 7)
    assert drive_b["label"] == "Pump drive B (7)" and drive_b["late"] > 0
    assert "so the dropout after 02:00 is not, or not wholly, in it" in out
    assert "Pump drive B (7)" in (folder / "evidence-station7.html").read_text()


def test_demo_run_twice_replaces_its_own_files(tmp_path):
    folder = tmp_path / "demo"
    for _ in range(2):
        assert main(["demo", "--dir", str(folder), "--duration", "2m", "--no-progress"]) == 0
    assert not [p for p in folder.iterdir() if p.name.endswith(".part")]

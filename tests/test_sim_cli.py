"""``buswitness simulate`` on the command line.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from buswitness.capture.fileformat import read_header
from buswitness.cli.main import main


def test_simulate_writes_capture_and_truth_and_says_so(tmp_path, capsys):
    cap, truth = tmp_path / "a.bwcap", tmp_path / "a.truth.json"
    rc = main(["simulate", "--scenario", "fault-late", "--duration", "15s", "--seed", "2", "-o", str(cap),
               "--truth", str(truth), "--latency-ms", "1"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "wrote" in out and "records" in out and "in " in out
    assert read_header(cap).ports[0].latency_ms == 1
    assert truth.stat().st_size > 0


def test_simulate_refuses_to_overwrite(tmp_path, capsys):
    cap = tmp_path / "a.bwcap"
    cap.write_bytes(b"keep me")
    rc = main(["simulate", "--duration", "2s", "-o", str(cap)])
    assert rc == 3
    assert "already exists" in capsys.readouterr().err
    assert cap.read_bytes() == b"keep me"


def test_simulate_list_names_the_builtin_scenarios(capsys):
    assert main(["simulate", "--list"]) == 0
    out = capsys.readouterr().out
    assert "pumpstation" in out and "fault-duplicate" in out

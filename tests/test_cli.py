"""The command line: verbs, help, version, exit codes and one-line errors."""

import subprocess
import sys
from pathlib import Path

import pytest
from buswitness.cli.main import VERBS, main

SAMPLES = Path(__file__).resolve().parent.parent / "sample_captures"


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "buswitness.cli.main", *args], capture_output=True, text=True,
                          timeout=120)


def test_version():
    out = run_cli("--version")
    assert out.returncode == 0 and out.stdout.startswith("buswitness ")


@pytest.mark.parametrize("verb", [v.__name__.rsplit("cmd_", 1)[1] for v in VERBS])
def test_every_verb_has_help(verb, capsys):
    with pytest.raises(SystemExit) as exc:
        main([verb, "--help"])
    assert exc.value.code == 0
    assert "usage: buswitness " + verb in capsys.readouterr().out


def test_no_verb_is_a_usage_error():
    assert run_cli().returncode == 2


def test_inspect_prints_header_and_counts():
    out = run_cli("inspect", str(SAMPLES / "tiny-poll.hex"))
    assert out.returncode == 0, out.stderr
    assert "19200 8E1" in out.stdout
    assert "port 0: 6 records, 51 bytes" in out.stdout


def test_inspect_of_another_kind_of_file_exits_3_with_one_line(tmp_path):
    p = tmp_path / "notes.bin"
    p.write_bytes(b"\x00\x01\x02garbage")
    out = run_cli("inspect", str(p))
    assert out.returncode == 3
    assert out.stderr.count("\n") == 1 and "Traceback" not in out.stderr
    assert "notes.bin" in out.stderr


def test_bad_format_option_is_a_usage_error():
    out = run_cli("inspect", str(SAMPLES / "tiny-poll.bin"), "--input-kind", "raw", "--format", "9Q1")
    assert out.returncode == 2
    assert "9Q1" in out.stderr

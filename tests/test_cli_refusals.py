"""Options that cannot be wrong silently: every refusal of issue #15 item 3, one line each.

Source: the checks here compare with what the test itself made (paths, ptys, sample captures of
this repository) and with the project's own messages; no check value comes from outside the project.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from buswitness.capture import serialport
from buswitness.cli.main import main

SAMPLES = Path(__file__).resolve().parent.parent / "sample_captures"


def _one_line(capsys) -> str:
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1, err
    return err


@pytest.fixture()
def pty_node():
    """A real serial-like device node (a pty slave) the test owns."""
    master, slave = os.openpty()
    yield os.ttyname(slave)
    os.close(master)
    os.close(slave)


# -- --roles must match the number of ports ---------------------------------------------------------

@pytest.mark.parametrize("verb", ["record", "watch"])
def test_two_roles_for_one_port_is_a_usage_error(verb, tmp_path, capsys):
    argv = [verb, str(tmp_path / "ttyNone"), "--roles", "master,slaves", "-o", str(tmp_path / "x.bwcap")]
    assert main(argv) == 2
    assert "--roles names 2 role(s) for 1 port(s)" in _one_line(capsys)
    assert not (tmp_path / "x.bwcap").exists()


def test_one_role_for_two_ports_is_a_usage_error(tmp_path, capsys):
    argv = ["record", str(tmp_path / "a"), str(tmp_path / "b"), "--roles", "master", "-o", str(tmp_path / "x.bwcap")]
    assert main(argv) == 2
    assert "--roles names 1 role(s) for 2 port(s)" in _one_line(capsys)


def test_analyze_roles_for_more_ports_than_the_capture_holds_is_a_usage_error(tmp_path, capsys):
    argv = ["analyze", str(SAMPLES / "tiny-poll.hex"), "--roles", "master,slaves", "--json", str(tmp_path / "s.json"),
            "--no-progress"]
    assert main(argv) == 2
    err = _one_line(capsys)
    assert "--roles names 2 role(s) but" in err and "holds 1 port(s)" in err
    assert not (tmp_path / "s.json").exists()


# -- one adapter named twice ----------------------------------------------------------------------

def test_same_port_twice_is_refused(pty_node, tmp_path, capsys):
    assert main(["record", pty_node, pty_node, "-o", str(tmp_path / "x.bwcap")]) == 2
    assert "is the same port" in _one_line(capsys)


def test_a_link_and_the_node_it_points_to_are_one_adapter(pty_node, tmp_path, capsys):
    # As /dev/serial/by-id/usb-...-if00-port0 -> ../../ttyUSB0: compared by real path.
    link = tmp_path / "usb-Fictional_Adapter_A1-if00-port0"
    link.symlink_to(pty_node)
    assert main(["record", str(link), pty_node, "-o", str(tmp_path / "x.bwcap")]) == 2
    err = _one_line(capsys)
    assert f"is the same device as {link}" in err and pty_node in err
    assert not (tmp_path / "x.bwcap").exists()


def test_two_nodes_with_one_usb_serial_number_are_one_adapter(tmp_path, monkeypatch, capsys):
    first, second = os.openpty(), os.openpty()
    try:
        a, b = os.ttyname(first[1]), os.ttyname(second[1])
        # pyserial's list_ports reports the adapter's serial number for each node; here both say the same.
        monkeypatch.setattr(serialport, "usb_serial_number", lambda device: "FICT-0001")
        assert main(["record", a, b, "-o", str(tmp_path / "x.bwcap")]) == 2
        err = _one_line(capsys)
        assert f"{b}: is the same USB adapter as {a} (serial number FICT-0001)" in err
    finally:
        for fd in (*first, *second):
            os.close(fd)


def test_two_different_adapters_are_accepted(tmp_path, monkeypatch):
    from buswitness.cli.cmd_record import check_distinct_adapters

    first, second = os.openpty(), os.openpty()
    try:
        numbers = {os.ttyname(first[1]): "FICT-0001", os.ttyname(second[1]): "FICT-0002"}
        monkeypatch.setattr(serialport, "usb_serial_number", numbers.get)
        check_distinct_adapters(list(numbers))
    finally:
        for fd in (*first, *second):
            os.close(fd)


# -- help and detect ---------------------------------------------------------------------------------

def test_record_help_states_the_default_baud_and_format_up_front(capsys):
    with pytest.raises(SystemExit):
        main(["record", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "The port is opened at 19200 baud, 8E1" in text
    assert "in the site's local time" in text  # --until


def test_detect_on_a_missing_file_says_so_in_one_line(tmp_path, capsys):
    assert main(["detect", str(tmp_path / "night.bwcap")]) == 3
    err = _one_line(capsys)
    assert "night.bwcap: no such file or serial port" in err
    assert "--" not in err and "listening" not in err


def test_detect_on_raw_bytes_suggests_no_option_it_does_not_take(tmp_path, capsys):
    raw = tmp_path / "dump.bin"
    raw.write_bytes(bytes(range(256)))
    assert main(["detect", str(raw)]) == 3
    err = _one_line(capsys)
    assert "is neither a buswitness capture nor timestamped hex text" in err and "--" not in err


def test_detect_on_hex_text_with_a_bad_line_suggests_no_option_it_does_not_take(tmp_path, capsys):
    hexfile = tmp_path / "bad.hex"
    good = (SAMPLES / "tiny-poll.hex").read_text().splitlines()
    hexfile.write_text("\n".join(good[:3] + ["12.5 zz-not-hex"] + good[3:]) + "\n")
    code = main(["detect", str(hexfile)])
    err = capsys.readouterr().err
    assert code == 0 or ("--" not in err and len(err.strip().splitlines()) == 1), err


# -- output paths: checked first, folders never created silently -----------------------------------

def _no_analysis(monkeypatch):
    from buswitness.cli import cmd_analyze

    def refuse(*a, **k):
        raise AssertionError("the analysis ran before the output path was checked")

    monkeypatch.setattr(cmd_analyze, "run_analysis", refuse)


@pytest.mark.parametrize("option", ["--html", "--json"])
def test_analyze_output_in_a_missing_folder_is_refused_before_the_analysis(option, tmp_path, monkeypatch, capsys):
    _no_analysis(monkeypatch)
    target = tmp_path / "reprots" / "night" / "out.file"
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), option, str(target), "--no-progress"]) == 3
    err = _one_line(capsys)
    assert f"{target.parent}: the folder for {option} does not exist (nothing was created)" in err
    assert not (tmp_path / "reprots").exists()


def test_analyze_csv_folder_under_a_missing_folder_is_refused(tmp_path, monkeypatch, capsys):
    _no_analysis(monkeypatch)
    target = tmp_path / "missing" / "tables"
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), "--csv", str(target), "--no-progress"]) == 3
    assert f"{target.parent}: the folder for --csv does not exist" in _one_line(capsys)
    assert not target.parent.exists()


def test_evidence_output_in_a_missing_folder_is_refused_before_the_analysis(tmp_path, monkeypatch, capsys):
    from buswitness.cli import cmd_evidence

    monkeypatch.setattr(cmd_evidence, "run_analysis", lambda *a, **k: pytest.fail("analysed first"))
    target = tmp_path / "nope" / "station7.html"
    assert main(["evidence", str(SAMPLES / "tiny-poll.hex"), "--station", "7", "-o", str(target)]) == 3
    assert "the folder for -o does not exist" in _one_line(capsys)


def test_output_whose_folder_is_a_file_is_refused(tmp_path, monkeypatch, capsys):
    _no_analysis(monkeypatch)
    (tmp_path / "afile").write_text("x")
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), "--json", str(tmp_path / "afile" / "s.json")]) == 3
    assert "the folder for --json is not a folder" in _one_line(capsys)


def test_record_into_a_missing_folder_is_refused_before_opening_the_port(tmp_path, capsys):
    target = tmp_path / "captures" / "night.bwcap"
    assert main(["record", str(tmp_path / "ttyNone"), "-o", str(target)]) == 3
    assert f"{target.parent}: the folder for -o does not exist" in _one_line(capsys)
    assert not target.parent.exists()


def test_simulate_into_a_missing_folder_is_refused(tmp_path, capsys):
    target = tmp_path / "sims" / "x.bwcap"
    assert main(["simulate", "-o", str(target), "--duration", "10s"]) == 3
    assert "the folder for -o does not exist" in _one_line(capsys)
    assert main(["simulate", "-o", str(tmp_path / "x.bwcap"), "--truth",
                 str(tmp_path / "t" / "truth.json"), "--duration", "10s"]) == 3
    assert "the folder for --truth does not exist" in _one_line(capsys)
    assert not (tmp_path / "x.bwcap").exists()

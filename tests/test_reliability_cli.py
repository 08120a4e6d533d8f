"""Damaged inputs end to end through the command line (``analyze`` and ``inspect`` as subprocesses).

Every case: one clear line on stderr and no traceback; exit 3 when nothing usable remains;
otherwise the report is still written, keeps every readable record and states the damage.
"""

from __future__ import annotations

import json
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import pytest
from buswitness.capture.fileformat import MAGIC, CaptureReader, CaptureWriter

SAMPLE_HEX = Path(__file__).resolve().parent.parent / "sample_captures" / "pumpstation-30s.hex"


def cli(*args, cwd) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "buswitness.cli.main", *map(str, args)], check=False, cwd=cwd,
                          capture_output=True, text=True, timeout=300)


def analyze(path, cwd, *extra) -> subprocess.CompletedProcess:
    return cli("analyze", path, "--no-progress", "--html", "report.html", "--json", "summary.json", *extra, cwd=cwd)


def one_clear_line(r: subprocess.CompletedProcess) -> str:
    assert "Traceback" not in r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    return lines[0]


def damage_of(cwd) -> dict:
    return json.loads((cwd / "summary.json").read_text(encoding="utf-8"))["capture"]["damage"]


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    """20 s of the demo bus rewritten in blocks of 40 records, so damage hits one block, not the file."""
    d = tmp_path_factory.mktemp("damaged")
    r = cli("simulate", "--scenario", "pumpstation", "--duration", "20s", "--seed", "3", "-o", "sim.bwcap", cwd=d)
    assert r.returncode == 0, r.stderr
    reader = CaptureReader(d / "sim.bwcap")
    records = list(reader.iter_records())
    with CaptureWriter(d / "good.bwcap", reader.header, max_block_records=40) as w:
        for x in records:
            w.append(x.port, x.t_ns, x.data, x.flags)
    return d / "good.bwcap", records


@pytest.fixture
def work(tmp_path):
    return tmp_path


def test_truncated_capture_is_analysed_and_the_cut_stated(good, work):
    path, records = good
    data = path.read_bytes()
    (work / "cut.bwcap").write_bytes(data[:len(data) * 2 // 3])
    r = analyze("cut.bwcap", work)
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    assert "cut off" in r.stdout
    damage = damage_of(work)
    assert damage["truncated_tail"] and not damage["clean"]
    kept = len(list(CaptureReader(work / "cut.bwcap").iter_records()))
    assert damage["records"] == kept and 0 < kept < len(records)
    assert (work / "report.html").stat().st_size > 0


def test_capture_cut_inside_its_header_exits_3_and_writes_nothing(good, work):
    (work / "stub.bwcap").write_bytes(good[0].read_bytes()[:40])
    r = analyze("stub.bwcap", work)
    assert r.returncode == 3
    assert "cut off inside its header" in one_clear_line(r)
    assert not (work / "report.html").exists()


def test_flipped_bytes_lose_only_their_blocks_and_the_report_says_so(good, work):
    path, records = good
    data = bytearray(path.read_bytes())
    for at in (len(data) // 4, len(data) // 2, 3 * len(data) // 4):
        data[at] ^= 0x5A
    (work / "flipped.bwcap").write_bytes(bytes(data))
    r = analyze("flipped.bwcap", work)
    assert r.returncode == 0, r.stderr
    assert "capture damage" in r.stdout
    damage = damage_of(work)
    assert 1 <= damage["bad_blocks"] <= 3
    # each damaged block holds at most 40 records; everything else is kept
    assert len(records) - 3 * 40 <= damage["records"] < len(records)


def test_header_from_a_newer_version_exits_3_naming_both_versions(good, work):
    data = bytearray(good[0].read_bytes())
    struct.pack_into("<H", data, len(MAGIC), 7)
    (work / "future.bwcap").write_bytes(bytes(data))
    for verb in ("analyze", "inspect"):
        r = analyze("future.bwcap", work) if verb == "analyze" else cli("inspect", "future.bwcap", cwd=work)
        assert r.returncode == 3
        assert "version 7" in one_clear_line(r) and "reads versions 1" in r.stderr


def test_rotated_set_with_a_missing_middle_part_keeps_the_others_and_names_the_gap(good, work):
    path, records = good
    reader = CaptureReader(path)
    with CaptureWriter(work / "night.bwcap", reader.header, rotate_ns=5_000_000_000, max_block_records=40) as w:
        for x in records:
            w.append(x.port, x.t_ns, x.data, x.flags)
    assert len(w.parts) >= 3
    lost = len(list(CaptureReader(w.parts[1], single_file=True).iter_records()))
    w.parts[1].unlink()
    r = analyze("night.bwcap", work)
    assert r.returncode == 0, r.stderr
    assert "part(s) 1" in r.stdout and "missing" in r.stdout
    damage = damage_of(work)
    assert damage["missing_parts"] == [1]
    assert damage["records"] == len(records) - lost


@pytest.mark.parametrize("make, said", [
    (lambda p: p.write_bytes(b""), "is empty"),
    (lambda p: p.mkdir(), "is a directory"),
    (lambda p: None, "no such file"),
])
def test_empty_file_directory_or_missing_file_exits_3_with_one_line(work, make, said):
    make(work / "in.bwcap")
    for r in (analyze("in.bwcap", work), cli("inspect", "in.bwcap", cwd=work)):
        assert r.returncode == 3
        assert said in one_clear_line(r)
    assert not (work / "report.html").exists()


def bad_hex(work, bad_lines: dict[int, str]) -> str:
    lines = SAMPLE_HEX.read_text(encoding="utf-8").splitlines()
    for i, text in bad_lines.items():
        lines[i - 1] = text
    (work / "bad.hex").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return "bad.hex"


def test_bad_hex_line_stops_with_its_line_number_by_default(work):
    r = analyze(bad_hex(work, {30: "0.5x 01 03", 50: "garbage"}), work)
    assert r.returncode == 3
    line = one_clear_line(r)
    assert "line 30:" in line and "--on-bad-line skip" in line
    assert not (work / "report.html").exists()


def test_bad_hex_lines_skipped_on_request_keep_the_rest_and_are_listed(work):
    r = analyze(bad_hex(work, {30: "0.5x 01 03", 50: "garbage", 70: "9.9 ZZ 01"}), work, "--on-bad-line", "skip")
    assert r.returncode == 0, r.stderr
    assert "line 30" in r.stdout and "line skipped" in r.stdout
    damage = damage_of(work)
    assert [w.split(": ")[1] for w in damage["warnings"]] == ["line 30", "line 50", "line 70"]
    total = sum(1 for s in SAMPLE_HEX.read_text(encoding="utf-8").splitlines() if s[:1].isdigit())
    assert damage["records"] == total - 3


def test_skipped_hex_lines_are_counted_in_the_analysis_summary(work):
    bad = {n: f"bad line {n}" for n in range(30, 60)}
    r = analyze(bad_hex(work, bad), work, "--on-bad-line", "skip")
    assert "30 malformed lines skipped in all" in r.stdout


def test_many_skipped_hex_lines_are_counted_not_each_listed(work):
    bad = {n: f"bad line {n}" for n in range(30, 60)}
    r = cli("inspect", bad_hex(work, bad), "--on-bad-line", "skip", cwd=work)
    assert r.returncode == 0, r.stderr
    warnings = [s for s in r.stdout.splitlines() if s.startswith("warning")]
    assert len(warnings) == 21
    assert "10 more malformed lines skipped (30 in all)" in warnings[-1]
    assert "damaged or cut off" in r.stdout


def test_hex_file_of_nothing_but_bad_lines_exits_3_when_skipped(work):
    (work / "junk.hex").write_text("# baud: 19200\nnot a line\nnor this\n", encoding="utf-8")
    r = analyze("junk.hex", work, "--input-kind", "hex", "--on-bad-line", "skip")
    assert r.returncode == 3
    assert "nothing usable" in one_clear_line(r)


def test_inspect_of_a_truncated_capture_counts_what_is_kept(good, work):
    data = good[0].read_bytes()
    (work / "cut.bwcap").write_bytes(data[:len(data) // 2])
    r = cli("inspect", "cut.bwcap", cwd=work)
    assert r.returncode == 0 and "Traceback" not in r.stderr
    assert "damaged or cut off (every readable record kept)" in r.stdout


def rewrite_header(src: Path, dst: Path, edit) -> None:
    """Copy a capture with its header JSON edited and its header CRC made valid again (a crafted file)."""
    data = src.read_bytes()
    n = struct.unpack_from("<I", data, len(MAGIC) + 2)[0]
    start = len(MAGIC) + 6
    header = json.loads(data[start:start + n])
    edit(header)
    raw = json.dumps(header).encode("utf-8")
    dst.write_bytes(data[:len(MAGIC) + 2] + struct.pack("<I", len(raw)) + raw + struct.pack("<I", zlib.crc32(raw))
                    + data[start + n + 4:])


@pytest.mark.parametrize("edit, said", [
    (lambda h: h["ports"][0].update(latency_ms="fast"), "latency 'fast' ms is not a number"),
    (lambda h: h["ports"][0].update(latency_ms=1e300), "is not a number from 0 to 10000"),
    (lambda h: h["ports"][0].update(id="zero"), "port id 'zero'"),
    (lambda h: h.update(start_monotonic_ns="soon"), "must be whole numbers"),
    (lambda h: h.update(timing="maybe"), "timing 'maybe'"),
    (lambda h: h.update(host_delay_ms="x"), "host_delay_ms 'x'"),
    (lambda h: h.update(port_roles={"0": "boss"}), "port_roles must map"),
    (lambda h: h.update(protocol="tcp"), "protocol 'tcp'"),
    (lambda h: h["serial"].update(baud=0), "baud rate 0"),
    # Before: a start near the year 9999 passed the reader and overflowed a date in 'analyze' and 'evidence'.
    (lambda h: h.update(start_utc="9999-12-31T23:59:59+00:00"), "start_utc '9999-12-31T23:59:59+00:00'"),
    (lambda h: h.update(start_utc="0001-01-01T00:00:00"), "is not a time from the years 1970 to 2999"),
    (lambda h: h.update(start_utc="yesterday"), "start_utc 'yesterday' is not a date"),
    (lambda h: h.update(start_monotonic_ns=-1), "start_monotonic_ns -1"),
    (lambda h: h.update(start_monotonic_ns=2**63), "start_monotonic_ns 9223372036854775808"),
    (lambda h: h.update(part=10_000), "part 10000"),
    (lambda h: h.update(format_version=7), "format_version 7"),
    (lambda h: h.update(ports=[]), "ports must list 1 to 256 ports"),
    (lambda h: h.update(port_roles={"\u0663": "master"}), "port_roles must map"),
])
def test_crafted_header_with_valid_checksum_exits_3_naming_the_field(good, work, edit, said):
    rewrite_header(good[0], work / "crafted.bwcap", edit)
    for r in (analyze("crafted.bwcap", work), cli("inspect", "crafted.bwcap", cwd=work)):
        assert r.returncode == 3
        line = one_clear_line(r)
        assert "the capture header is damaged" in line and said in line


def test_infinite_timeout_is_a_usage_error(good, work):
    r = analyze(good[0], work, "--timeout", "inf")
    assert r.returncode == 2
    assert "timeout" in one_clear_line(r)


@pytest.mark.parametrize("latency", ["-5", "nan", "inf", "1e300"])
def test_impossible_latency_setting_in_hex_text_is_a_bad_setting_line(work, latency):
    # Before: nan, inf and 1e300 reached the decoder and crashed it with a traceback.
    (work / "lat.hex").write_text(f"# latency_ms: {latency}\n0.004 01 03 00 0A 00 02 E4 09\n"
                                  "0.020 01 03 04 00 41 00 C8 AB B1\n", encoding="utf-8")
    r = analyze("lat.hex", work)
    assert r.returncode == 3
    assert "line 1: bad setting" in one_clear_line(r)
    r = analyze("lat.hex", work, "--on-bad-line", "skip")
    assert r.returncode == 0 and "Traceback" not in r.stderr
    assert "bad setting ignored" in " ".join(damage_of(work)["warnings"])


def test_evidence_report_on_a_damaged_capture_states_what_was_lost(good, work):
    data = bytearray(good[0].read_bytes())
    data[len(data) // 2] ^= 0x5A
    (work / "flipped.bwcap").write_bytes(bytes(data))
    r = cli("evidence", "flipped.bwcap", "--station", "1", "--no-progress", "-o", "ev.html", cwd=work)
    assert r.returncode == 0 and "Traceback" not in r.stderr
    html = (work / "ev.html").read_text(encoding="utf-8")
    assert "a damaged block of 40 records" in html and "Everything readable was used" in html

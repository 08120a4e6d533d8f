"""Importers for timestamped hex text and raw bytes, and recognising an input by its content.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from pathlib import Path

import pytest
from buswitness.capture.fileformat import FLAG_UNTIMED
from buswitness.capture.importers import MAX_LINE_WARNINGS
from buswitness.capture.sources import open_capture
from buswitness.decode.crc import crc_ok
from buswitness.decode.timing import SerialFormat
from buswitness.errors import InputFileError, NotACaptureError, UsageError

SAMPLES = Path(__file__).resolve().parent.parent / "sample_captures"


def test_sample_hex_text_reads_settings_and_chunks():
    src = open_capture(SAMPLES / "tiny-poll.hex")
    assert src.header.serial == SerialFormat.parse("8E1", 19200)
    assert src.header.ports[0].latency_ms == 16
    recs = [r for b in src.iter_batches() for r in b.records()]
    assert len(recs) == 6
    assert recs[0].t_ns == 4_000_000
    assert recs[0].data == bytes.fromhex("0103000A0002E409")
    assert all(crc_ok(r.data) for r in recs)  # the sample holds only whole frames


def test_epoch_seconds_set_the_start_time(tmp_path):
    p = tmp_path / "e.hex"
    p.write_text("1767225600.5 01 02\n1767225600.75 03\n")
    src = open_capture(p)
    assert src.header.start_utc.startswith("2026-01-01T00:00:00.5")
    recs = [r for b in src.iter_batches() for r in b.records()]
    assert [r.t_ns for r in recs] == [0, 250_000_000]


def test_contiguous_hex_and_0x_prefix_are_accepted(tmp_path):
    p = tmp_path / "c.hex"
    p.write_text("0.1 0103 0x00\n")
    recs = [r for b in open_capture(p, kind="hex").iter_batches() for r in b.records()]
    assert recs[0].data == b"\x01\x03\x00"


def test_bad_line_stops_with_its_line_number(tmp_path):
    p = tmp_path / "bad.hex"
    p.write_text("# baud: 9600\n0.1 01 02\n0.2 zz 01\n0.3 05\n")
    src = open_capture(p)
    with pytest.raises(InputFileError, match="line 3: 'zz' is not hex"):
        list(src.iter_batches())


def test_bad_line_can_be_skipped_keeping_the_rest(tmp_path):
    p = tmp_path / "bad.hex"
    p.write_text("0.1 01 02\n0.2 zz 01\nnot a time 01\n0.05 07\n0.3 05\n")
    src = open_capture(p, kind="hex", on_bad_line="skip")
    recs = [r for b in src.iter_batches() for r in b.records()]
    assert [r.data for r in recs] == [b"\x01\x02", b"\x05"]
    assert len(src.report.warnings) == 3
    assert "goes backwards" in src.report.warnings[2]


def test_raw_binary_needs_settings(tmp_path):
    with pytest.raises(UsageError, match="--baud and --format"):
        open_capture(SAMPLES / "tiny-poll.bin", kind="raw")


def test_raw_binary_gets_synthetic_back_to_back_times():
    fmt = SerialFormat.parse("8E1", 19200)
    src = open_capture(SAMPLES / "tiny-poll.bin", kind="raw", serial=fmt)
    batches = list(src.iter_batches())
    data = b"".join(b.payload.tobytes() for b in batches)
    assert data == (SAMPLES / "tiny-poll.bin").read_bytes()
    assert all((b.flags == FLAG_UNTIMED).all() for b in batches)
    assert src.header.timing == "none"
    # last byte of n bytes back to back ends at n character times
    assert batches[-1].t_ns[-1] == pytest.approx(len(data) * fmt.char_time_s * 1e9, abs=1)


def test_unknown_binary_is_refused_with_a_hint(tmp_path):
    p = tmp_path / "x.dat"
    p.write_bytes(bytes(range(256)))
    with pytest.raises(NotACaptureError, match="--input-kind raw"):
        open_capture(p)


def test_missing_file_is_named(tmp_path):
    with pytest.raises(InputFileError, match="nope.bwcap: no such file"):
        open_capture(tmp_path / "nope.bwcap")


def test_bad_setting_line_stops_or_is_ignored_as_chosen(tmp_path):
    p = tmp_path / "s.hex"
    p.write_text("# baud: fast\n0.1 01 02\n")
    with pytest.raises(InputFileError, match="line 1: bad setting"):
        open_capture(p, kind="hex")
    src = open_capture(p, kind="hex", on_bad_line="skip")
    assert src.header.serial.baud == 19200
    assert "bad setting ignored" in src.report.warnings[0]


def _token_by_token(src, path) -> tuple[list, list]:
    """What the token rules alone (HexTextSource._parse_line, the importer's diagnosis) make of the file."""
    recs, last_t = [], -1
    with open(path, encoding="utf-8", newline=None) as f:  # lines end at \n, \r or \r\n only, as the importer's
        lines = list(f)
    for lineno, line in enumerate(lines, 1):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        parsed = src._parse_line(s, lineno, last_t)
        if parsed is not None:
            last_t = parsed[0]
            recs.append(parsed)
    return recs, list(src.report.warnings)


@pytest.mark.parametrize("seed", range(6))
def test_line_at_a_time_reading_equals_the_token_rules(tmp_path, seed):
    # Lines of every shape the token rules judge (issue 14: one bytes.fromhex per line, the token
    # rules only on lines it refuses): the records and every skipped line's message are the same.
    import random
    rng = random.Random(seed)
    seps = [" ", " ", "  ", "\t", "\x0b", "\x1c", "\u00a0", "\u2003"]
    lines, t = [], 0.0
    for _ in range(400):
        t += rng.choice([0.001, 0.02, 0.5, -0.3 if rng.random() < 0.05 else 0.01])
        toks = [bytes(rng.randrange(256) for _ in range(rng.randrange(1, 4))).hex() for _ in range(rng.randrange(0, 5))]
        toks = [rng.choice([tok, tok.upper(), "0x" + tok, "0X" + tok, tok[:-1], tok + "g", "zz"])
                if rng.random() < 0.15 else tok for tok in toks]
        stamp = rng.choice([f"{t:.6f}"] * 30 + ["nan", "inf", "-inf", "x", "1e300", "1_0", f"{t:.3e}"])
        sep = rng.choice(seps) if rng.random() < 0.2 else " "
        lines.append(rng.choice(["", "  ", "# a comment"]) if rng.random() < 0.03 else sep.join([stamp, *toks]))
    text = "\n".join(lines) + "\n"
    p = tmp_path / "mixed.hex"
    p.write_text(text, encoding="utf-8")
    src = open_capture(p, kind="hex", on_bad_line="skip")
    got = [(r.t_ns, r.data) for b in src.iter_batches() for r in b.records()]
    ref = open_capture(p, kind="hex", on_bad_line="skip")
    want, warnings = _token_by_token(ref, p)
    assert got == want
    assert src.report.warnings[:len(warnings)] == warnings[:MAX_LINE_WARNINGS]
    assert src.report.lines_skipped == ref.report.lines_skipped and src.report.bytes_skipped == ref.report.bytes_skipped


def test_an_imported_log_is_parsed_once_and_analyses_as_when_read_twice(tmp_path, monkeypatch):
    """The delivery sample and the analysis share one reading of a text log (pipeline.ReadOnce):
    the same figures as two readings, the damage report counted once, the parser run once."""
    from buswitness.analysis import pipeline
    from buswitness.analysis.summary import summary_dict
    from buswitness.simulate import load_scenario, simulate
    sim = simulate(load_scenario("pumpstation"), duration_s=120, seed=3)
    lines = ["# baud: 19200", "# format: 8E1", "# latency_ms: 16", "0.0 zz 01"]  # one bad line, skipped
    for b in sim.batches():
        for r in b.records():
            if r.data:
                lines.append(f"{(r.t_ns - sim.header.start_monotonic_ns) / 1e9:.6f} {r.data.hex(' ')}")
    p = tmp_path / "night.hex"
    p.write_text("\n".join(lines) + "\n")
    once = open_capture(p, kind="hex", on_bad_line="skip")
    calls = []
    real = type(once).iter_batches

    def counted(self):
        calls.append(1)
        return real(self)

    monkeypatch.setattr(type(once), "iter_batches", counted)
    got = pipeline.analyze(once, pipeline.AnalysisOptions(progress=False, cache=False))
    assert len(calls) == 1
    monkeypatch.setattr(pipeline, "_reads_cheaply", lambda source: True)  # the two-reading path, as before
    twice = open_capture(p, kind="hex", on_bad_line="skip")
    ref = pipeline.analyze(twice, pipeline.AnalysisOptions(progress=False, cache=False))
    assert len(calls) == 3
    assert once.report.lines_skipped == twice.report.lines_skipped == 1
    assert got.bus.frames == ref.bus.frames > 0
    a, b = summary_dict(got), summary_dict(ref)
    a.pop("analysed_utc", None), b.pop("analysed_utc", None)
    assert a == b


def test_a_log_read_once_hands_on_the_sample_then_the_rest(tmp_path, monkeypatch):
    """A sample that stops part-way: the analysis pass gets its batches again, then the rest, once."""
    from buswitness.analysis.pipeline import ReadOnce
    from buswitness.capture import importers
    monkeypatch.setattr(importers, "BATCH_RECORDS", 3)
    p = tmp_path / "many.hex"
    p.write_text("".join(f"{k / 100:.2f} {k % 256:02x} 01\n" for k in range(20)))
    ro = ReadOnce(open_capture(p, kind="hex"))
    sample = ro.sample_batches()
    first = [next(sample), next(sample)]
    sample.close()
    assert sum(len(b) for b in first) == 6
    got = [r for b in ro.iter_batches() for r in b.records()]
    want = [r for b in open_capture(p, kind="hex").iter_batches() for r in b.records()]
    assert [(r.t_ns, r.data) for r in got] == [(r.t_ns, r.data) for r in want]
    assert len(got) == 20
    with pytest.raises(RuntimeError):
        next(iter(ro.iter_batches()))

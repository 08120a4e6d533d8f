"""``detect``: naming a bus's baud rate and format from what receivers at trial settings deliver.

Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from buswitness import detect
from buswitness.capture.fileformat import CaptureHeader, CaptureReader, CaptureWriter, PortInfo
from buswitness.decode.crc import append_crc
from buswitness.decode.timing import SerialFormat
from buswitness.simulate import load_scenario, simulate
from ptyhelpers import PtyAdapter

SCENARIOS = Path(__file__).resolve().parent.parent / "simulate" / "scenarios"


@pytest.fixture(scope="module")
def long_reads_scenario(tmp_path_factory):
    """The built-in clean scenario with one poll of 60 registers, so responses outlast an adapter packet."""
    sc = json.loads((SCENARIOS / "clean.json").read_text())
    sc["master"]["polls"][0]["quantity"] = 60
    path = tmp_path_factory.mktemp("sc") / "long-reads.json"
    path.write_text(json.dumps(sc))
    return load_scenario(path)


@pytest.mark.parametrize("baud, fmt", [(9600, "8N2"), (19200, "8E1"), (38400, "8N1")])
def test_detect_names_the_simulated_bus_settings(long_reads_scenario, baud, fmt):
    def sample(trial: SerialFormat):
        return simulate(long_reads_scenario, duration_s=3, seed=1, baud=baud, bus_format=fmt, sniffer=trial).batches()

    scores = detect.rank_settings(sample, detect.candidates())
    best = scores[0]
    assert (best.setting.baud, best.setting.short_form) == (baud, fmt)
    assert best.explained > 0.99 and best.marked == 0 and best.timing is True
    assert detect.verdict(scores).startswith(f"best guess: {baud} {fmt}")


def test_parity_marks_separate_8e1_from_8n2(long_reads_scenario):
    # An 8E1 receiver on an 8N2 bus reads the first stop bit as parity: about half the bytes are marked.
    obs = detect.Observation.of(simulate(long_reads_scenario, duration_s=3, seed=2, baud=9600, bus_format="8N2",
                                         sniffer=SerialFormat.parse("8E1", 9600)).batches())
    score = detect.score_observation(SerialFormat.parse("8E1", 9600), obs)
    assert 0.3 < score.marked_share < 0.7


def test_8n1_and_8n2_without_long_frames_are_a_stated_tie():
    clean = load_scenario("clean")

    def sample(trial: SerialFormat):
        return simulate(clean, duration_s=3, seed=1, baud=38400, bus_format="8N1", sniffer=trial).batches()

    scores = detect.rank_settings(sample, detect.candidates([38400], ["8N1", "8N2"]))
    assert all(s.timing is None for s in scores)
    # Modbus rule when nothing tells them apart: no parity means two stop bits (MSL V1.02 §2.5.1).
    assert scores[0].setting.short_form == "8N2"
    assert "could not tell them apart" in detect.verdict(scores)


def test_wrong_baud_explains_nothing(long_reads_scenario):
    obs = detect.Observation.of(simulate(long_reads_scenario, duration_s=2, seed=1, baud=19200, bus_format="8E1",
                                         sniffer=SerialFormat.parse("8E1", 9600)).batches())
    assert detect.score_observation(SerialFormat.parse("8E1", 9600), obs).value < 0.1


def _delivered(frames: list[bytes], fmt: SerialFormat, latency_s: float, gap_s: float = 0.05):
    """Bytes back to back at the character time, delivered on a latency grid (TIMING.md adapter model)."""
    c = fmt.char_time_s
    ends, data = [], bytearray()
    t = 1.0
    for fr in frames:
        for i in range(len(fr)):
            ends.append(t + (i + 1) * c)
        data += fr
        t = ends[-1] + gap_s
    ends = np.array(ends)
    grid = np.floor(ends / latency_s) * latency_s + latency_s  # packet sent at the next timer expiry
    t_ns, lengths = [], []
    for g in np.unique(grid):
        t_ns.append(int(g * 1e9) + 200_000)  # 0.2 ms host delay
        lengths.append(int((grid == g).sum()))
    return bytes(data), np.array(t_ns), np.array(lengths)


def test_char_time_is_recovered_from_reads_inside_long_frames():
    fmt = SerialFormat.parse("8N2", 9600)
    # FC03 responses with 100 registers: 205 bytes, several 16 ms packets each.
    frame = append_crc(bytes([1, 3, 200]) + bytes(range(200)))
    data, t, n = _delivered([frame] * 6, fmt, 0.016)
    ct = detect.estimate_char_time(data, t, n)
    assert ct is not None and ct.pairs >= 5
    assert ct.bits_at(9600) == pytest.approx(11.0, rel=0.03)


def test_char_time_is_not_guessed_from_short_frames():
    fmt = SerialFormat.parse("8E1", 19200)
    data, t, n = _delivered([append_crc(bytes([1, 3, 0, 0, 0, 4]))] * 50, fmt, 0.016)
    assert detect.estimate_char_time(data, t, n) is None


def _write_capture(path: Path, batches, header_fmt: SerialFormat) -> None:
    header = CaptureHeader.new(header_fmt, [PortInfo(0, "sim")], source="simulate")
    with CaptureWriter(path, header) as w:
        for b in batches:
            for r in b.records():
                w.append(r.port, r.t_ns, r.data, r.flags)


def test_capture_with_right_settings_looks_right(tmp_path, long_reads_scenario):
    res = simulate(long_reads_scenario, duration_s=3, seed=3, baud=9600, bus_format="8N2")
    path = tmp_path / "ok.bwcap"
    _write_capture(path, res.batches(), SerialFormat.parse("8N2", 9600))
    out = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "detect", str(path)], capture_output=True,
                         text=True, check=False, timeout=60)
    assert out.returncode == 0, out.stderr
    assert "the file's settings look right" in out.stdout
    assert "11.0 bits at 9600 baud" in out.stdout


def test_capture_labelled_8n1_but_recorded_from_an_8n2_bus_is_flagged(tmp_path, long_reads_scenario):
    res = simulate(long_reads_scenario, duration_s=3, seed=3, baud=9600, bus_format="8N2")
    path = tmp_path / "label.bwcap"
    _write_capture(path, res.batches(), SerialFormat.parse("8N1", 9600))
    check = detect.check_capture(SerialFormat.parse("8N1", 9600), CaptureReader(path).iter_batches())
    assert not check.looks_right
    assert "character rate does not match" in check.describe()


def test_port_sampler_reads_what_arrives_at_each_setting(tmp_path):
    frame = append_crc(bytes([7, 3, 0, 10, 0, 2]))
    with PtyAdapter(tmp_path / "ttyDET") as adapter:
        sample = detect.port_sampler(str(adapter.link), 1.0)
        feeder = threading.Thread(target=lambda: (time.sleep(0.3), adapter.send(frame * 20, 19200)))
        feeder.start()
        records = sample(SerialFormat.parse("8E1", 19200))
        feeder.join()
    assert b"".join(r.data for r in records) == frame * 20
    assert detect.score_observation(SerialFormat.parse("8E1", 19200), detect.Observation.of(records)).value == 1.0


def test_detect_command_on_a_port_prints_the_ranking_and_best_guess(tmp_path):
    frame = append_crc(bytes([7, 3, 0, 10, 0, 2]))
    with PtyAdapter(tmp_path / "ttyDC") as adapter:
        proc = subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", "detect", str(adapter.link),
                                 "--bauds", "19200", "--formats", "8E1", "--seconds", "1.5"],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)

        def feed() -> None:  # keep the bus busy until detect has listened (start-up time varies)
            while proc.poll() is None:
                adapter.send(frame * 2, 19200)
                time.sleep(0.05)

        feeder = threading.Thread(target=feed)
        feeder.start()
        out, err = proc.communicate(timeout=60)
        feeder.join()
    assert proc.returncode == 0, err
    assert "listen-only" in err
    assert "19200 8E1" in out and "best guess: 19200 8E1" in out

"""Hostile identification text from simulated stations stays text in the dashboard and the evidence report.

The payloads travel the whole way a real one would: a simulated station answers FC 17 (report
server ID) and FC 43/14 (read device identification) with markup, the capture goes through
``analyze`` and ``evidence``, and headless Chromium opens the pages offline. Each payload sets
``window.__pwned`` if it ever runs.
Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

from __future__ import annotations

import json
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import crcmod.predefined
import pytest
from browser import OfflinePage, require_chromium
from buswitness.analysis.devid import device_id_text
from buswitness.decode import Decoder, DecoderConfig, Transaction
from buswitness.simulate import pdus
from buswitness.simulate.scenario import Poll, parse_scenario

SCRIPT = "<script>window.__pwned='script'</script>"
IMG = "<img src=x onerror=\"window.__pwned='img'\">"
CLOSE = "</script><script>window.__pwned='close'</script>"

SCENARIO = {
    "name": "hostile-ident", "description": "fictional bus whose stations identify themselves with markup",
    "bus": {"baud": 19200, "format": "8E1"},
    "stations": [{"address": 3, "name": "Filter skid", "device_id": SCRIPT},
                 {"address": 4, "name": "Dosing pump", "device_id": IMG},
                 {"address": 5, "name": "Level probe", "device_id": CLOSE}],
    "master": {"cycle_period_ms": 500, "polls": [
        {"station": 3, "function": 17}, {"station": 4, "function": 43}, {"station": 5, "function": 17},
        {"station": 5, "function": 43}, {"station": 3, "function": 3, "quantity": 2}]},
    "duration_s": 20,
}


def cli(*args: str, cwd) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "buswitness.cli.main", *args], check=False, cwd=cwd,
                          capture_output=True, text=True, timeout=300)


@pytest.fixture(scope="module")
def hostile(tmp_path_factory):
    d = tmp_path_factory.mktemp("hostile")
    (d / "hostile.json").write_text(json.dumps(SCENARIO), encoding="utf-8")
    for args in (("simulate", "--scenario", "hostile.json", "-o", "h.bwcap"),
                 ("analyze", "h.bwcap", "--html", "dash.html", "--json", "summary.json", "--no-progress"),
                 ("evidence", "h.bwcap", "--station", "5", "-o", "ev5.html", "--no-progress"),
                 ("evidence", "h.bwcap", "--station", "4", "-o", "ev4.html", "--no-progress")):
        r = cli(*args, cwd=d)
        assert r.returncode == 0, r.stderr
    return d


def test_simulated_report_server_id_answer_carries_the_text_and_run_indicator():
    # MAP V1.1b3 p31: address, 0x11, byte count, server id ..., run indicator (0xFF = ON), CRC
    frame = pdus.response_frame(7, Poll(7, 17), pdus.request_frame(Poll(7, 17)), b"", b"AB")
    assert frame[:6] == bytes([7, 0x11, 3]) + b"AB\xff"
    assert device_id_text(frame) == "AB."


def test_simulated_device_identification_answer_is_one_basic_object():
    # MAP V1.1b3 p43-44: 2B 0E, read code 01, conformity, more follows 00, next id 00, 1 object: id 0, len, value
    request = pdus.request_frame(Poll(7, 43))
    assert request[:5] == bytes([7, 0x2B, 0x0E, 0x01, 0x00]) and len(request) == 7
    # crcmod's predefined Modbus CRC-16, sent low byte first
    assert request[5:] == crcmod.predefined.mkCrcFun("modbus")(request[:5]).to_bytes(2, "little")
    frame = pdus.response_frame(7, Poll(7, 43), request, b"", b"Pump")
    assert frame[:14] == bytes([7, 0x2B, 0x0E, 1, 1, 0, 0, 1, 0, 4]) + b"Pump"
    assert device_id_text(frame) == "vendor name: Pump"


def test_scenario_refuses_identification_text_too_long_for_a_frame():
    data = json.loads(json.dumps(SCENARIO))
    data["stations"][0]["device_id"] = "x" * 201
    with pytest.raises(Exception, match=r"device_id.*at most 200 bytes"):
        parse_scenario(json.dumps(data), "hostile.json")


def test_identification_answers_pair_with_their_requests_in_the_decoder(hostile):
    from buswitness.capture.fileformat import CaptureReader
    reader = CaptureReader(hostile / "h.bwcap")
    dec = Decoder(DecoderConfig.from_header(reader.header))
    txns = [x for r in reader.iter_records() for x in dec.feed(r.port, r.t_ns, r.data, r.flags)]
    txns = [x for x in txns + dec.flush_events() if isinstance(x, Transaction)]
    ident = [t for t in txns if t.function in (0x11, 0x2B)]
    assert ident and {t.outcome for t in ident} == {"ok"}


def test_summary_keeps_the_identification_text_verbatim(hostile):
    summary = json.loads((hostile / "summary.json").read_text(encoding="utf-8"))
    ids = {s["address"]: " ".join(s["device_ids"]) for s in summary["stations"]}
    assert SCRIPT in ids[3] and IMG in ids[4] and CLOSE in ids[5]


@pytest.mark.parametrize("page", ["dash.html", "ev5.html", "ev4.html"])
def test_hostile_markup_never_appears_unescaped_in_the_file(hostile, page):
    html = (hostile / page).read_text(encoding="utf-8")
    for payload in (SCRIPT, IMG, CLOSE):
        assert payload not in html
    assert "window.__pwned" in html  # the text is there, escaped


@pytest.mark.browser
@pytest.mark.parametrize("page, shown", [("dash.html", (SCRIPT, IMG, CLOSE)), ("ev5.html", (CLOSE,)),
                                         ("ev4.html", (IMG,))])
def test_hostile_identification_never_runs_shows_literally_and_loads_nothing(hostile, page, shown):
    require_chromium()
    with OfflinePage(hostile / page) as (p, visit):
        p.wait_for_timeout(500)
        assert p.evaluate("typeof window.__pwned") == "undefined"
        assert p.evaluate("document.querySelectorAll('img[src=x]').length") == 0
        text = p.inner_text("body")
    for payload in shown:
        assert payload in text
    assert visit.dialogs == []
    assert visit.blocked == []



def crafted_header_copy(src: Path, dst: Path, **fields) -> None:
    """Copy a capture with text fields of its header replaced and the header CRC made valid again."""
    from buswitness.capture.fileformat import MAGIC
    data = src.read_bytes()
    n = struct.unpack_from("<I", data, len(MAGIC) + 2)[0]
    start = len(MAGIC) + 6
    header = json.loads(data[start:start + n])
    header["ports"][0]["name"] = fields["port_name"]
    header["notes"] = fields["notes"]
    raw = json.dumps(header).encode("utf-8")
    dst.write_bytes(data[:len(MAGIC) + 2] + struct.pack("<I", len(raw)) + raw + struct.pack("<I", zlib.crc32(raw))
                    + data[start + n + 4:])


@pytest.mark.browser
def test_hostile_port_name_and_notes_in_a_crafted_header_stay_text(hostile):
    require_chromium()
    crafted_header_copy(hostile / "h.bwcap", hostile / "crafted.bwcap", port_name=CLOSE, notes=SCRIPT + IMG)
    for args in (("analyze", "crafted.bwcap", "--html", "crafted.html", "--json", "crafted.json", "--no-progress"),
                 ("evidence", "crafted.bwcap", "--station", "3", "-o", "crafted-ev.html", "--no-progress")):
        r = cli(*args, cwd=hostile)
        assert r.returncode == 0, r.stderr
    for page in ("crafted.html", "crafted-ev.html"):
        html = (hostile / page).read_text(encoding="utf-8")
        assert CLOSE not in html and SCRIPT not in html and IMG not in html
        with OfflinePage(hostile / page) as (p, visit):
            p.wait_for_timeout(500)
            assert p.evaluate("typeof window.__pwned") == "undefined"
            text = p.inner_text("body")
        assert visit.dialogs == [] and visit.blocked == []
        if page == "crafted-ev.html":
            assert CLOSE in text  # the evidence report names the port, literally

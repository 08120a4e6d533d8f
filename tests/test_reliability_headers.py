"""Any header JSON with a valid checksum (a crafted file, or damage the CRC happened to miss) gives a typed
error or a capture the decoder can take: never an exception from deep inside the decoder.

The coverage-guided reader harness rarely gets past the header CRC, so this drives the header
fields directly.
Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import json
import struct
import zlib

from buswitness.capture.fileformat import MAGIC, CaptureHeader, CaptureReader, CaptureWriter, PortInfo
from buswitness.decode import Decoder, DecoderConfig, SerialFormat
from buswitness.errors import BuswitnessError
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-2**70, 2**70) | st.floats(allow_nan=False) | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner, max_size=3),
    max_leaves=6)
TOP_KEYS = ["serial", "ports", "start_utc", "start_monotonic_ns", "host", "tool_version", "notes", "source", "timing",
            "capture_id", "part", "extra", "format_version", "port_roles", "protocol", "host_delay_ms"]
PORT_KEYS = ["id", "name", "latency_ms", "latency_source", "serial_number", "line_errors"]
SERIAL_KEYS = ["baud", "format"]


def base_capture(path) -> bytes:
    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "/dev/ttyUSB0", 16.0, "sysfs")])
    with CaptureWriter(path, header) as w:
        for i in range(20):
            w.append(0, header.start_monotonic_ns + i * 10_000_000, b"\x01\x03\x00\x00\x00\x01\x84\x0a")
    return path.read_bytes()


def with_header(data: bytes, header: dict) -> bytes:
    n = struct.unpack_from("<I", data, len(MAGIC) + 2)[0]
    start = len(MAGIC) + 6
    raw = json.dumps(header).encode("utf-8")
    return (data[:len(MAGIC) + 2] + struct.pack("<I", len(raw)) + raw + struct.pack("<I", zlib.crc32(raw))
            + data[start + n + 4:])


EDITS = st.lists(st.one_of(
    st.tuples(st.just("top"), st.sampled_from(TOP_KEYS), JSON_VALUES),
    st.tuples(st.just("port"), st.sampled_from(PORT_KEYS), JSON_VALUES),
    st.tuples(st.just("serial"), st.sampled_from(SERIAL_KEYS), JSON_VALUES),
    st.tuples(st.just("drop"), st.sampled_from(TOP_KEYS), st.none()),
), min_size=1, max_size=4)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(EDITS)
def test_any_header_values_give_a_typed_error_or_a_decodable_capture(tmp_path, edits):
    path = tmp_path / "base.bwcap"
    if not path.exists():
        base_capture(path)
    data = path.read_bytes()
    n = struct.unpack_from("<I", data, len(MAGIC) + 2)[0]
    header = json.loads(data[len(MAGIC) + 6:len(MAGIC) + 6 + n])
    for where, key, value in edits:
        if where == "top":
            header[key] = value
        elif where == "drop":
            header.pop(key, None)
        elif where == "port" and isinstance(header.get("ports"), list) and header["ports"] \
                and isinstance(header["ports"][0], dict):
            header["ports"][0][key] = value
        elif where == "serial" and isinstance(header.get("serial"), dict):
            header["serial"][key] = value
    crafted = tmp_path / "crafted.bwcap"
    crafted.write_bytes(with_header(data, header))
    try:
        reader = CaptureReader(crafted)
        decoder = Decoder(DecoderConfig.from_header(reader.header))
        for batch in reader.iter_batches():
            decoder.feed_batch(batch)
        decoder.flush()
    except BuswitnessError:
        pass


SETTING_VALUE = st.one_of(st.sampled_from(["nan", "inf", "-inf", "-5", "0", "1e300", "19200", "8E1", "7O2", "16",
                                           "0.125", "9Q1", ""]),
                          st.text(alphabet=st.characters(blacklist_categories=("Cs", "Cc")), max_size=10))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(st.sampled_from(["baud", "format", "latency_ms", "port", "notes"]), SETTING_VALUE),
                max_size=5), st.sampled_from(["stop", "skip"]))
def test_any_hex_text_settings_give_a_typed_error_or_a_decodable_capture(tmp_path, settings_lines, on_bad_line):
    from buswitness.capture.sources import open_capture
    lines = [f"# {key}: {value}" for key, value in settings_lines]
    lines += ["0.004 01 03 00 0A 00 02 E4 09", "0.020 01 03 04 00 41 00 C8 AB B1"]  # the sample poll
    path = tmp_path / "settings.hex"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    try:
        src = open_capture(path, kind="hex", on_bad_line=on_bad_line)
        decoder = Decoder(DecoderConfig.from_header(src.header))
        for batch in src.iter_batches():
            decoder.feed_batch(batch)
        decoder.flush()
    except BuswitnessError:
        pass

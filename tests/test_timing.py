"""Serial character format and t1.5/t3.5 against the Modbus serial-line specification."""

import pytest
from buswitness.decode.timing import SerialFormat, t15_s, t35_s
from buswitness.errors import SerialFormatError


def test_rtu_character_is_eleven_bits_with_even_parity():
    # MSL V1.02 section 2.5.1 p12: start, 8 data, parity, stop = 11 bits
    assert SerialFormat.parse("8E1").bits_per_char == 11


def test_no_parity_with_two_stop_bits_is_also_eleven_bits():
    # MSL V1.02 section 2.5.1 p12: no parity requires 2 stop bits, keeping 11 bits
    assert SerialFormat.parse("8N2").bits_per_char == 11


def test_8n1_is_ten_bits():
    # common practice: start + 8 data + stop
    assert SerialFormat.parse("8N1").bits_per_char == 10


def test_ascii_character_is_ten_bits():
    # MSL V1.02 section 2.5.2 p16: start, 7 data, parity, stop
    assert SerialFormat.parse("7E1").bits_per_char == 10


@pytest.mark.parametrize(
    "baud,t15_ms,t35_ms",
    [
        # MSL V1.02 section 2.5.1.1 p13 defines t1.5/t3.5 as 1.5 and 3.5 character times;
        # REFERENCES.md "Derived timings" (calc) gives these at 11 bits per character.
        (9600, 1.719, 4.010),
        (19200, 0.859, 2.005),
    ],
)
def test_t15_t35_follow_character_time_up_to_19200(baud, t15_ms, t35_ms):
    fmt = SerialFormat.parse("8E1", baud)
    assert t15_s(fmt) * 1e3 == pytest.approx(t15_ms, abs=0.0005)
    assert t35_s(fmt) * 1e3 == pytest.approx(t35_ms, abs=0.0005)


@pytest.mark.parametrize("baud", [38400, 57600, 115200])
def test_fixed_timer_values_above_19200(baud):
    # MSL V1.02 p13 remark: above 19200 bps use t1.5 = 750 us and t3.5 = 1.750 ms
    fmt = SerialFormat.parse("8E1", baud)
    assert t15_s(fmt) == pytest.approx(750e-6)
    assert t35_s(fmt) == pytest.approx(1.750e-3)


def test_character_time_at_115200_8n1():
    # TIMING.md / common practice: 10 bits / 115200 = 0.0868 ms
    assert SerialFormat.parse("8N1", 115200).char_time_s * 1e3 == pytest.approx(0.0868, abs=1e-4)


@pytest.mark.parametrize("short", ["8E1", "8N2", "8N1", "7E1", "8O1", "8M1", "8S1", "7N2"])
def test_short_form_round_trips(short):
    assert SerialFormat.parse(short).short_form == short


def test_lowercase_short_form_is_accepted():
    assert SerialFormat.parse("8e1").parity == "E"


@pytest.mark.parametrize("bad", ["9Q1", "8X1", "", "8E3", "E81", "88E1"])
def test_nonsense_format_is_rejected_with_an_example(bad):
    with pytest.raises(SerialFormatError, match="e.g. 8E1"):
        SerialFormat.parse(bad)


@pytest.mark.parametrize("baud", [0, -9600, 10, 20_000_000])  # Profibus DP tops out at 12 Mbit/s
def test_impossible_baud_is_rejected(baud):
    with pytest.raises(SerialFormatError, match="baud rate"):
        SerialFormat(baud=baud)


def test_dict_round_trip():
    fmt = SerialFormat.parse("8N2", 9600)
    assert SerialFormat.from_dict(fmt.to_dict()) == fmt

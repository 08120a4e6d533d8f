"""Opening serial ports for listening: pyserial plus the Linux extras it does not give.

pyserial opens the port and sets the character format; it clears PARMRK and INPCK, so
error marking is switched on afterwards with termios on the port's descriptor, and again
after every reopen (REFERENCES.md §6). The USB adapter's latency timer is read from, and
on request written to, sysfs (REFERENCES.md §5). Everything Linux-specific lives here and
degrades to "not available on this port" elsewhere.

Pseudo-terminals (used by the tests) do not keep parity settings on this kernel: they are
opened 8N1 and the bus's own format is kept only in the capture header.
"""

from __future__ import annotations

import errno
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path

import serial
from buswitness.errors import DeviceError
from buswitness.serial import SerialFormat
from serial.tools import list_ports

try:
    import termios
except ImportError:  # not a POSIX system
    termios = None  # type: ignore[assignment]

#: Above this, response times measured through the adapter are coarse (FIELD-NOTES.md §1).
LATENCY_WARN_MS = 2.0

UDEV_RULE = ('ACTION=="add", SUBSYSTEM=="usb-serial", DRIVER=="ftdi_sio", '
             'ATTR{latency_timer}="1"')

_PARITY = {"N": serial.PARITY_NONE, "E": serial.PARITY_EVEN, "O": serial.PARITY_ODD,
           "M": serial.PARITY_MARK, "S": serial.PARITY_SPACE}
_STOP = {1: serial.STOPBITS_ONE, 1.5: serial.STOPBITS_ONE_POINT_FIVE, 2: serial.STOPBITS_TWO}
_PTY_MAJORS = range(136, 144)  # Unix98 pty slaves (Documentation/admin-guide/devices.txt)


@dataclass
class OpenedPort:
    """A port opened for listening and what we could learn or set about it."""

    serial: serial.SerialBase
    device: str                       #: what was opened (the path or URL)
    opened_format: SerialFormat       #: the format the port really has (8N1 on a pty)
    line_errors: bool                 #: parity/framing errors are marked in the byte stream
    parmrk: bool                      #: the stream carries PARMRK escapes to undo
    latency_ms: float | None = None
    latency_source: str = "unknown"
    serial_number: str | None = None
    notes: list[str] = field(default_factory=list)

    def close(self) -> None:
        try:
            self.serial.close()
        except (OSError, serial.SerialException):
            pass


def is_url(device: str) -> bool:
    """True for pyserial URLs such as ``loop://`` or ``socket://host:port``."""
    return "://" in device


def real_device(device: str) -> str:
    """The device node a path names, following symlinks such as /dev/serial/by-id/..."""
    return device if is_url(device) else os.path.realpath(device)


def is_pty(device: str) -> bool:
    """True when ``device`` is a pseudo-terminal (by device number, else by name)."""
    if is_url(device):
        return False
    real = real_device(device)
    try:
        st = os.stat(real)
        if os.major(st.st_rdev) in _PTY_MAJORS:
            return True
    except OSError:
        pass
    return real.startswith("/dev/pts/") or real == "/dev/ptmx"


def tty_name(device: str) -> str | None:
    """Kernel name of the tty behind ``device`` (``ttyUSB0``), or None for a URL."""
    if is_url(device):
        return None
    return os.path.basename(real_device(device))


def latency_path(device: str, sysfs_root: str = "/sys") -> Path | None:
    name = tty_name(device)
    if not name:
        return None
    return Path(sysfs_root) / "bus" / "usb-serial" / "devices" / name / "latency_timer"


def read_latency_ms(device: str, sysfs_root: str = "/sys") -> int | None:
    """The usb-serial latency timer in ms, or None where the driver exposes none."""
    path = latency_path(device, sysfs_root)
    if path is None:
        return None
    try:
        return int(path.read_text().strip())
    except (OSError, ValueError):
        return None


def set_low_latency(device: str, sysfs_root: str = "/sys") -> tuple[int | None, str]:
    """Write 1 ms to the latency timer and read it back; returns (value now, message for the user)."""
    path = latency_path(device, sysfs_root)
    if path is None or not path.exists():
        return None, (f"{device}: this adapter has no latency timer setting (not a usb-serial driver that "
                      f"exposes one); response times keep the adapter's own granularity")
    try:
        path.write_text("1\n")
    except PermissionError:
        now = read_latency_ms(device, sysfs_root)
        return now, (f"{device}: setting the latency timer needs root. Either run once as root:\n"
                     f"    echo 1 | sudo tee {path}\n"
                     f"or install this udev rule (as root) in /etc/udev/rules.d/99-buswitness-latency.rules "
                     f"and re-plug the adapter:\n    {UDEV_RULE}\n"
                     f"The timer was left at {now} ms.")
    except OSError as exc:
        return read_latency_ms(device, sysfs_root), f"{device}: could not set the latency timer ({exc.strerror})"
    now = read_latency_ms(device, sysfs_root)
    if now == 1:
        return now, f"{device}: latency timer set to 1 ms (checked by reading it back)"
    return now, f"{device}: wrote 1 ms to the latency timer but it reads back {now} ms"


def usb_serial_number(device: str) -> str | None:
    """USB serial number of the adapter behind ``device``, if the system reports one."""
    if is_url(device):
        return None
    real = real_device(device)
    for info in list_ports.comports():
        if real_device(info.device) == real and info.serial_number:
            return str(info.serial_number)
    return None


def find_by_serial_number(number: str) -> str | None:
    """Device path of the adapter with this USB serial number (it may have a new name after a re-plug)."""
    for info in list_ports.comports():
        if info.serial_number and str(info.serial_number) == number:
            return str(info.device)
    return None


def enable_error_marking(ser: serial.SerialBase) -> bool:
    """Switch on parity checking with PARMRK marks on an open port; True when the setting stuck.

    Breaks are marked too (IGNBRK and BRKINT clear). pyserial undoes this on every
    reconfiguration, so call it after each open.
    """
    fd = getattr(ser, "fd", None)
    if termios is None or fd is None:
        return False
    try:
        attrs = termios.tcgetattr(fd)
        attrs[0] |= termios.INPCK | termios.PARMRK
        attrs[0] &= ~(termios.IGNPAR | termios.ISTRIP | termios.IGNBRK | termios.BRKINT)
        termios.tcsetattr(fd, termios.TCSANOW, attrs)
        check = termios.tcgetattr(fd)
    except (termios.error, OSError):
        return False
    return bool(check[0] & termios.PARMRK) and bool(check[0] & termios.INPCK)


def available_ports() -> list[str]:
    """Serial ports pyserial sees on this machine."""
    return sorted(str(p.device) for p in list_ports.comports())


def _open_error(device: str, exc: Exception) -> DeviceError:
    code = getattr(exc, "errno", None)
    text = str(exc)
    if code == errno.EACCES or "Permission denied" in text:
        return DeviceError(f"{device}: permission denied. Add yourself to the dialout group "
                           f"(sudo usermod -aG dialout $USER, then log out and in again)")
    if code == errno.ENOENT or "No such file" in text:
        seen = available_ports()
        listing = ", ".join(seen) if seen else "none"
        return DeviceError(f"{device}: no such serial port (is the adapter plugged in?). "
                           f"Serial ports seen now: {listing}")
    if code == errno.EBUSY or "busy" in text.lower():
        return DeviceError(f"{device}: the port is in use by another program; close it and retry")
    return DeviceError(f"{device}: cannot open the port ({text})")


def open_listening(device: str, bus: SerialFormat, *, read_timeout_s: float = 0.2) -> OpenedPort:
    """Open ``device`` to listen to a bus of format ``bus``, without driving RTS or DTR.

    A pty is opened 8N1 (it cannot keep parity). Raises :class:`DeviceError` naming the
    likely cause when the port cannot be opened.
    """
    opened = SerialFormat.parse("8N1", bus.baud) if is_pty(device) else bus
    notes: list[str] = []
    failures = (serial.SerialException, OSError, ValueError) + ((termios.error,) if termios else ())
    try:
        ser = _open(device, opened, read_timeout_s)
    except failures as exc:
        if opened.parity != "N" and is_pty(device):
            opened = SerialFormat.parse("8N1", bus.baud)
            try:
                ser = _open(device, opened, read_timeout_s)
            except failures as exc2:
                raise _open_error(device, exc2) from None
        else:
            raise _open_error(device, exc) from None
    parmrk = sys.platform.startswith("linux") and enable_error_marking(ser)
    # A pty never reports parity or framing errors, even with marking on.
    line_errors = parmrk and not is_pty(device)
    if not line_errors:
        notes.append(f"{device}: line errors are not observable on this port/platform")
    return OpenedPort(serial=ser, device=device, opened_format=opened, line_errors=line_errors, parmrk=parmrk,
                      notes=notes)


def _open(device: str, fmt: SerialFormat, timeout: float) -> serial.SerialBase:
    ser = serial.serial_for_url(device, do_not_open=True)
    ser.baudrate = fmt.baud
    ser.bytesize = fmt.data_bits
    ser.parity = _PARITY[fmt.parity]
    ser.stopbits = _STOP[fmt.stop_bits]
    ser.timeout = timeout
    ser.xonxoff = ser.rtscts = ser.dsrdtr = False
    # Listen-only: ask pyserial to leave RTS and DTR deasserted so no transceiver is keyed.
    ser.rts = False
    ser.dtr = False
    ser.open()
    return ser

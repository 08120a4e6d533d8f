"""buswitness: record an RS-485 Modbus RTU bus and explain its timeouts.

The package is split by pipeline stage:

- ``buswitness.capture``  raw bytes with host timestamps, the capture file, importers, live recording
- ``buswitness.decode``   pure logic: serial timing, CRC, framing, function codes, pairing
- ``buswitness.analysis`` per-station figures, findings, dashboard, evidence report, exports
- ``buswitness.simulate`` a bus simulator that writes captures together with their ground truth
- ``buswitness.cli``      the ``buswitness`` command line (argument parsing and orchestration only)
"""

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

try:
    __version__ = _version("buswitness")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]

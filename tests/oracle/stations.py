"""The stations of the oracle bus: real pymodbus serial servers, one per address, in one process.

Run by ``tests/oraclebus.py`` as a subprocess (never imported by buswitness)::

    python stations.py LOG.jsonl BAUD ADDR=PTY[:ROLE] ...

Each station is a ``pymodbus.server.ModbusSerialServer`` on its own pseudo-terminal. ROLE
``exceptions`` leaves part of the register map undefined, so pymodbus itself answers reads
there with exception 02 (illegal data address). Slowness and line noise are not made here:
the wire holds a slow station's answers and flips bits of a noisy station's answers, so these
servers answer every request addressed to them at once, in the order received.

The log (one JSON object a line, host ``time.monotonic_ns()``) is each server's own record
of what it decoded and what it sent, written from pymodbus's ``trace_pdu`` and
``trace_packet`` hooks: ``{"ev": "req", "addr", "t", "fc"}`` for every request addressed to it
and ``{"ev": "rsp", "addr", "t", "raw"}`` for every frame it sent.
"""

from __future__ import annotations

import asyncio
import json
import sys
import time

from pymodbus.exceptions import NoSuchIdException
from pymodbus.server import ModbusSerialServer
from pymodbus.simulator import DataType, SimData, SimDevice

#: Registers 0..63 are defined on every station; the exceptions station defines 0..15 only.
REGISTERS = 64
EXCEPTION_STATION_REGISTERS = 16


class OneStation:
    """Datastore front that answers only its own address.

    pymodbus 3.16's ``SimCore`` raises ``KeyError`` (not ``NoSuchIdException``) for an
    address it does not hold, so a server would answer other stations' requests with
    exception 04; raising ``NoSuchIdException`` lets ``ignore_missing_devices`` keep it quiet,
    as a station on a shared line must.
    """

    def __init__(self, core, addr: int) -> None:
        self.core, self.addr = core, addr

    def device_ids(self) -> list[int]:
        return [self.addr]

    async def async_getValues(self, device_id, func_code, address, count=1):
        if device_id != self.addr:
            raise NoSuchIdException(f"not station {self.addr}")
        return await self.core.async_getValues(device_id, func_code, address, count)

    async def async_setValues(self, device_id, func_code, address, values):
        if device_id != self.addr:
            raise NoSuchIdException(f"not station {self.addr}")
        return await self.core.async_setValues(device_id, func_code, address, values)


def _device(addr: int, role: str) -> SimDevice:
    n = EXCEPTION_STATION_REGISTERS if role == "exceptions" else REGISTERS
    values = [(addr * 100 + i) & 0xFFFF for i in range(n)]
    regs = [SimData(0, values=values, datatype=DataType.REGISTERS)]
    bits = [SimData(0, values=[bool(i % 3 == 0) for i in range(n)], datatype=DataType.BITS)]
    return SimDevice(addr, simdata=(bits, list(bits), list(regs), list(regs)))


async def main(argv: list[str]) -> None:
    log_path, baud = argv[0], int(argv[1])
    log = open(log_path, "w", buffering=1)

    def write(obj: dict) -> None:
        log.write(json.dumps(obj) + "\n")

    servers = []
    for spec in argv[2:]:
        addr_s, rest = spec.split("=", 1)
        port, _, role = rest.partition(":")
        addr = int(addr_s)

        def trace_pdu(sending: bool, pdu, addr=addr):
            if not sending and pdu.dev_id == addr:
                write({"ev": "req", "addr": addr, "t": time.monotonic_ns(), "fc": pdu.function_code})
            return pdu

        def trace_packet(sending: bool, data: bytes, addr=addr):
            if sending:
                write({"ev": "rsp", "addr": addr, "t": time.monotonic_ns(), "raw": data.hex()})
            return data

        server = ModbusSerialServer([_device(addr, role)], port=port, baudrate=baud, timeout=1,
                                    ignore_missing_devices=True, trace_pdu=trace_pdu,
                                    trace_packet=trace_packet)
        server.context = OneStation(server.context, addr)  # type: ignore[assignment]
        servers.append(server)
    for s in servers:
        await s.serve_forever(background=True)  # returns once its port is open
    print("ready", flush=True)
    loop = asyncio.get_running_loop()
    await loop.run_in_executor(None, sys.stdin.read)  # until the harness closes our stdin
    for s in servers:
        await s.shutdown()
    log.close()


if __name__ == "__main__":
    asyncio.run(main(sys.argv[1:]))

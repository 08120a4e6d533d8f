"""The master of the oracle bus: pymodbus's own ``ModbusSerialClient``, polling a fictional plant.

Run by ``tests/oraclebus.py`` as a subprocess (never imported by buswitness)::

    python master.py PORT BAUD LOG.jsonl PLAN.json

PLAN gives the stations (address and role), the seed, the number of cycles, the client's
response timeout and retries. The log (one JSON object a line, host ``time.monotonic_ns()``)
is the client's own record, written from pymodbus's ``trace_packet`` and ``trace_pdu`` hooks
and from what each call returned:

* ``{"ev": "send", "t", "raw"}``: one attempt (pymodbus builds the frame and writes it);
* ``{"ev": "recv", "t", "raw"}``: what its framer was handed while waiting for the answer;
* ``{"ev": "pdu", "t", "fc", "dev"}``: a response its framer accepted (CRC good, right station);
* ``{"ev": "call", "op", "addr", "fc", "t0", "t1", "result", "retries"}``: the call's own
  outcome: ``answer``, ``exception`` (with ``code``) or ``no answer`` (pymodbus gave up).
"""

from __future__ import annotations

import json
import random
import sys
import time

from pymodbus.client import ModbusSerialClient
from pymodbus.exceptions import ModbusException


def main(argv: list[str]) -> None:
    port, baud, log_path, plan_path = argv[0], int(argv[1]), argv[2], argv[3]
    with open(plan_path) as f:
        plan = json.load(f)
    rng = random.Random(plan["seed"])
    log = open(log_path, "w", buffering=1)

    def write(obj: dict) -> None:
        log.write(json.dumps(obj) + "\n")

    def trace_packet(sending: bool, data: bytes) -> bytes:
        write({"ev": "send" if sending else "recv", "t": time.monotonic_ns(), "raw": data.hex()})
        return data

    def trace_pdu(sending: bool, pdu):
        if not sending:
            write({"ev": "pdu", "t": time.monotonic_ns(), "fc": pdu.function_code, "dev": pdu.dev_id})
        return pdu

    client = ModbusSerialClient(port, baudrate=baud, bytesize=8, parity="N", stopbits=1,
                                timeout=plan["timeout_s"], retries=plan["retries"],
                                trace_packet=trace_packet, trace_pdu=trace_pdu)
    if not client.connect():
        raise SystemExit(f"master: cannot open {port}")
    roles = {int(k): v for k, v in plan["stations"].items()}
    by_role: dict[str, list[int]] = {}
    for addr, role in roles.items():
        by_role.setdefault(role, []).append(addr)

    def call(op: str, addr: int, fc: int, fn) -> None:
        t0 = time.monotonic_ns()
        entry = {"ev": "call", "op": op, "addr": addr, "fc": fc, "t0": t0}
        try:
            rsp = fn()
        except ModbusException as exc:
            entry.update(result="no answer", detail=str(exc)[:120])
        else:
            if rsp.isError():
                entry.update(result="exception", code=int(getattr(rsp, "exception_code", 0)))
            else:
                entry.update(result="answer")
            entry["retries"] = int(getattr(rsp, "retries", 0) or 0)
        entry["t1"] = time.monotonic_ns()
        write(entry)
        # a pause between polls, as a poll cycle has (seeded)
        time.sleep(rng.uniform(*plan["pause_s"]))
        if roles[addr] == "slow" and (entry["result"] == "no answer" or entry.get("retries")):
            # let the slow station's held answers drain before talking to anyone else
            time.sleep(plan["drain_s"])

    for cycle in range(plan["cycles"]):
        for addr in sorted(roles):
            role = roles[addr]
            if role == "dead":
                if cycle % plan["dead_every"]:
                    continue
                kind = (cycle // plan["dead_every"]) % 3
                if kind == 0:
                    call("read", addr, 3, lambda a=addr: client.read_holding_registers(0, count=2, device_id=a))
                elif kind == 1:
                    v = rng.randrange(65536)
                    call("write_register", addr, 6, lambda a=addr, v=v: client.write_register(1, v, device_id=a))
                else:
                    b = bool(rng.randrange(2))
                    call("write_coil", addr, 5, lambda a=addr, b=b: client.write_coil(0, b, device_id=a))
            elif role == "exceptions":
                start = rng.choice([0, 4, 10, 14, 20, 40])  # 16 registers defined: 14+4 and up are not
                call("read", addr, 3, lambda a=addr, s=start: client.read_holding_registers(s, count=4, device_id=a))
            elif role == "noisy":
                call("read", addr, 3, lambda a=addr: client.read_holding_registers(0, count=10, device_id=a))
            elif role == "slow":
                for _ in range(plan.get("slow_polls", 1)):
                    call("read", addr, 3, lambda a=addr: client.read_holding_registers(2, count=2, device_id=a))
            else:
                call("read", addr, 3, lambda a=addr: client.read_holding_registers(0, count=4, device_id=a))
                call("read_input", addr, 4, lambda a=addr: client.read_input_registers(8, count=3, device_id=a))
                if rng.random() < 0.5:
                    v = rng.randrange(65536)
                    call("write_register", addr, 6, lambda a=addr, v=v: client.write_register(7, v, device_id=a))
                if rng.random() < 0.4:
                    b = bool(rng.randrange(2))
                    call("write_coil", addr, 5, lambda a=addr, b=b: client.write_coil(3, b, device_id=a))
    client.close()
    write({"ev": "done", "t": time.monotonic_ns()})
    log.close()


if __name__ == "__main__":
    main(sys.argv[1:])

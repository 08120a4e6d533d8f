"""The independent-stack oracle (tests/oraclebus.py) for longer runs, outside CI.

pymodbus's client and servers poll a fictional pump house over an emulated RS-485 line;
the tap of the line is decoded by buswitness and compared with the stack's own logs.

    python bench/oracle_run.py                      # 19200 8E1 and 115200 8N1, 60 cycles each
    python bench/oracle_run.py --cycles 300 --baud 19200 --keep /tmp/oracle --show 20
    python bench/oracle_run.py --replay /tmp/oracle/run-19200/run.json --unbiased   # no bus, new taps

Prints, per baud rate and adapter latency (1 ms and 16 ms, not stated in the tap file): the
agreement with the truth, dead-station answers, late answers paired with their own request,
interval coverage and point error, then the first disagreements.
"""

from __future__ import annotations

import argparse
import collections
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

import oraclebus as ob  # noqa: E402

RATES = {19200: "8E1", 115200: "8N1"}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baud", type=int, action="append", choices=sorted(RATES))
    ap.add_argument("--cycles", type=int, default=60, help="poll cycles per run (about 1 s each)")
    ap.add_argument("--seed", type=int, default=12)
    ap.add_argument("--latency", type=float, action="append", help="tap latency ms (default 1 and 16)")
    ap.add_argument("--keep", type=Path, help="keep logs and tap files in this folder")
    ap.add_argument("--show", type=int, default=10, help="disagreements to print per tap")
    ap.add_argument("--replay", type=Path, action="append", help="a saved run.json instead of running the bus")
    ap.add_argument("--unbiased", action="store_true", help="taps of a line nobody holds idle (idle byte per frame)")
    ap.add_argument("--timeout-ms", type=float, help="tell the decoder the master's response timeout")
    ap.add_argument("--header-format", help="state this character format in the tap file (e.g. 8N1 for an 8E1 bus)")
    args = ap.parse_args()
    work = args.keep or Path(tempfile.mkdtemp(prefix="oracle-run-"))
    runs = [ob.BusRun.load(p) for p in args.replay or []]
    for baud in [] if runs else args.baud or sorted(RATES):
        runs.append(baud)
    for item in runs:
        t = time.monotonic()
        if isinstance(item, ob.BusRun):
            run, baud = item, item.baud
        else:
            baud = item
            run = ob.run_bus(baud, RATES[baud], ob.default_plan(seed=args.seed, cycles=args.cycles),
                             workdir=work / f"run-{baud}", timeout_s=max(240.0, 5.0 * args.cycles))
            run.save(work / f"run-{baud}" / "run.json")
        attempts = ob.build_truth(run)
        print(f"== {baud} baud {run.fmt}: {len(attempts)} master attempts in {run.wall_s:.1f} s; "
              f"{sum(b.collided for b in run.bursts)} bursts collided")
        print(f"   wire pacing: {run.pacing()}")
        truth = collections.Counter((a.station, a.truth) for a in attempts)
        print("   truth (station, class): " + ", ".join(f"{k[0]} {k[1]}: {v}" for k, v in sorted(truth.items())))
        for lat in args.latency or [1.0, 16.0]:
            fig, path = ob.tap_and_compare(run, attempts, lat, work / f"run-{baud}", seed=args.seed,
                                           unbiased_line=args.unbiased, response_timeout_ms=args.timeout_ms,
                                           header_fmt=args.header_format)
            print(f"-- tap L = {lat:g} ms ({path}):")
            print(f"   {fig.line()}")
            print(f"   truth classes {fig.truth_counts}; decoded {fig.decoded_counts}; "
                  f"pymodbus client's own view consistent with truth: {100 * fig.stack_consistent:.1f}%; "
                  f"attempts where pymodbus itself took an earlier (late) answer: {fig.stack_took_earlier}")
            print(f"   decoder events: {fig.event_counts}")
            for m in fig.stack_disagreements[:args.show]:
                print(f"   ! truth and pymodbus client differ: {m}")
            for m in fig.mismatches[:args.show]:
                print(f"   - {m}")
        print(f"   ({time.monotonic() - t:.1f} s with decoding)")


if __name__ == "__main__":
    main()

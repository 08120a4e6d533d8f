"""Run the end-to-end capture fuzzer (``fuzz/e2e.py``) outside CI, for as long as it is given.

    nice -n 10 python fuzz/fuzz_e2e.py --cases 1000000 --mode slim --log /tmp/fuzz-e2e.log
    python fuzz/fuzz_e2e.py --mode full --cases 2000        # every case through the whole of analyze/evidence
    python fuzz/fuzz_e2e.py --seed 123 --cases 1 --mode full  # replay one case

A plain seeded generator loop (no coverage guidance): case ``n`` is ``make_case(n)``, so any
failure is replayed from its seed. Prints a progress line every ``--every`` cases and a final
line with the counts; failures (seed and traceback) go to the log. Exit 1 if any case failed.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import e2e  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cases", type=int, default=1_000_000)
    ap.add_argument("--seed", type=int, default=0, help="first case number")
    ap.add_argument("--mode", choices=("slim", "full"), default="slim")
    ap.add_argument("--every", type=int, default=10_000, help="progress line every so many cases")
    ap.add_argument("--log", default=None, help="append progress and failures here too")
    args = ap.parse_args()
    log = open(args.log, "a", encoding="utf-8") if args.log else None

    def say(text: str) -> None:
        print(text, flush=True)
        if log:
            log.write(text + "\n")
            log.flush()

    runner = e2e.SlimRunner() if args.mode == "slim" else None
    tally = e2e.Tally()
    started = time.perf_counter()
    for lo in range(args.seed, args.seed + args.cases, args.every):
        seeds = range(lo, min(lo + args.every, args.seed + args.cases))
        before = len(tally.failures)
        if runner is not None:
            e2e.run_slim_cases(seeds, runner, tally)
        else:
            e2e.run_cases(seeds, tally)
        for seed, tb in tally.failures[before:]:
            say(f"FAILURE seed {seed}:\n{tb}")
        elapsed = time.perf_counter() - started
        say(f"{args.mode}: {tally.cases} cases (seeds {args.seed}..{seeds[-1]}), {tally.refused} refused with a "
            f"typed error, {len(tally.failures)} failures, {elapsed:.0f} s, {tally.cases / elapsed:.0f} cases/s")
    return 1 if tally.failures else 0


if __name__ == "__main__":
    sys.exit(main())

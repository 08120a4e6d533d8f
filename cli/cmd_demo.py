"""``buswitness demo``: simulate the demo pump-station night, analyse it and write the reports."""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from buswitness.cli.common import duration_at_most, duration_s, number_arg

HELP = "simulate the demo pump-station night, analyse it and write the reports"

#: The whole fictional night, 22:00 to 06:00: the slow pump drive, the 40-minute dropout from
#: 02:00, the duplicate address and the noise bursts. Measured on a 2-core machine: about 40 s
#: for simulation, analysis and reports. A shorter ``--duration`` that still reaches 02:40
#: (``5h``) shows every fault too.
DEFAULT_DURATION = "8h"
CAPTURE_NAME = "pumpstation-night.bwcap"
#: The demo night is 8 h; a day is the most that still makes sense of it.
MAX_DURATION_S = 86400.0


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help=HELP, description=HELP.capitalize() + " (a fictional plant: a slow pump drive, "
                       "a station off the bus after 02:00, a duplicate address, noise when a pump starts).")
    p.add_argument("--dir", default="buswitness-demo", help="folder for the capture and reports "
                                                            "(default: ./buswitness-demo)")
    p.add_argument("--duration", type=duration_at_most(MAX_DURATION_S, "the demo night is 8 h"),
                   default=duration_s(DEFAULT_DURATION),
                   help=f"simulated time from 22:00 (default: {DEFAULT_DURATION}, the whole night; 5h still "
                        f"shows every fault)")
    p.add_argument("--seed", type=number_arg(0, 2**32 - 1, "--seed", integer=True), default=1, help="random seed (default: 1)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.set_defaults(run=run)


def station_map_toml(scenario) -> str:
    """The scenario's station names and positions as a station map file."""
    by_address: dict[int, list] = {}
    for st in scenario.stations:
        by_address.setdefault(st.address, []).append(st)
    lines = ["# Station map of the fictional demo pump station (use with: buswitness analyze --stations)"]
    for address, stations in sorted(by_address.items()):
        name = " / ".join(s.name for s in stations).replace("\\", "\\\\").replace('"', '\\"')
        lines += ["", f"[stations.{address}]", f'name = "{name}"', f"position_m = {stations[0].position_m:g}"]
    return "\n".join(lines) + "\n"


def slowest_station(result) -> int | None:
    """The station the evidence report is about: the most answers slower than the timeout, then the slowest tail.

    Late answers alone do not pick it: a duplicate address also yields late answers, quick ones.
    """
    candidates = [s for s in result.stations if s.requests and s.answered]
    if not candidates:
        return None
    best = max(candidates, key=lambda s: (s.answers_over_timeout or 0, s.response_ms["p99"] or 0.0, s.late))
    return best.address


def run(args: argparse.Namespace) -> int:
    from buswitness.fsutil import check_output_dir

    check_output_dir(args.dir, "--dir")  # before the simulator and analysis modules load

    from buswitness.analysis import AnalysisOptions, load_station_map
    from buswitness.analysis.dashboard import write_dashboard
    from buswitness.analysis.evidence import write_evidence
    from buswitness.analysis.summary import write_summary
    from buswitness.capture.sources import open_capture
    from buswitness.cli.progress import analyze_with_bar
    from buswitness.cli.report_text import analyze_text
    from buswitness.errors import OutputError
    from buswitness.fsutil import atomic_write
    from buswitness.simulate import load_scenario, simulate

    folder = Path(args.dir)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{folder}: cannot create the demo folder ({exc.strerror})") from None
    started = time.perf_counter()
    scenario = load_scenario("pumpstation")
    capture = folder / CAPTURE_NAME
    stations = folder / "stations.toml"
    capture.unlink(missing_ok=True)  # our own capture from an earlier demo run
    dropout_end_s = max((e.start_s + e.duration_s for e in scenario.events if e.kind == "silent"), default=0.0)
    note = ""
    if args.duration < dropout_end_s:
        note = (f" (22:00 onwards: shorter than {dropout_end_s / 3600:g} h, so the dropout after 02:00 is not, "
                f"or not wholly, in it)")
    print(f"simulating {args.duration / 3600:g} h of the fictional pump station night ({scenario.serial}){note} ...",
          flush=True)
    simulate(scenario, duration_s=args.duration, seed=args.seed, keep_tables=False).write(capture)
    with atomic_write(stations) as f:
        f.write(station_map_toml(scenario))
    print("analysing ...", flush=True)
    result = analyze_with_bar(open_capture(capture), AnalysisOptions(station_map=load_station_map(stations)),
                              show=False if args.no_progress else None)
    print(analyze_text(result))
    written = [capture, stations, write_dashboard(result, folder / "report.html"),
               write_summary(result, folder / "summary.json")]
    late = slowest_station(result)
    if late is not None:
        written.append(write_evidence(result, late, folder / f"evidence-station{late}.html"))
    print(f"done in {time.perf_counter() - started:.0f} s; wrote:")
    for p in written:
        print(f"  {Path(p).resolve()}")
    print(f"open {Path(folder / 'report.html').resolve()} in a browser; re-run the analysis with:\n"
          f"  buswitness analyze {capture} --stations {stations}")
    return 0

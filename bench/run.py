"""Speed and memory benchmark of buswitness (issue targets live here, never in unit tests).

    python bench/run.py                 # 24 h saturated 115200 capture + 1 h noisy 19200, 3 runs
    python bench/run.py --hours 2 --runs 1   # a quicker look

Stages, each timed separately (medians of ``--runs``, with min-max):
  simulate   the bench load (cached in bench/cache/, generated once)
  framing    splitting one byte stream into CRC-checked frames: ours vs pymodbus's RTU framer
  decode     decoder alone (framing, timestamps, damage events, pairing) over the capture
  analyze    full analysis (decode + figures) over the capture, and peak resident memory
  report     dashboard HTML + summary.json from the analysis result; file size
  browser    opening the dashboard in headless Chromium until every chart has drawn
  cache      ``evidence`` after one ``analyze`` (the decoded cache), against ``--no-cache``
  segments   ``analyze`` in segments on every core against one pass: same summary, the speed-up
             (``--cache-only`` runs just these two)
  fleet      ``dataset add`` throughput (serial and on a Dask LocalCluster) and ``trend`` latency over
             30 nights x 10 buses (bench/fleet.py; ``--fleet-only`` runs just this stage)

Each measured run happens in a fresh child process so peak memory is that run's own.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
CACHE = HERE / "cache"
OUT = HERE / "out"

TARGET_ANALYZE_S = 60.0        # full analyze of a 24 h saturated capture (issue: speed and memory)
TARGET_PEAK_MB = 2048.0
TARGET_FRAMING_RATIO = 10.0    # ours / pymodbus framing throughput
TARGET_HTML_MB = 15.0
TARGET_BROWSER_S = 10.0
TARGET_EVIDENCE_CACHED_S = 3.0  # issue 14: `evidence` on a 24-hour night after one `analyze`
TARGET_SEGMENTS_SPEEDUP = 1.5   # ours: segments on 2 cores against one pass (issue 14 item 2)


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


# -- child stages (run in a fresh process each) ------------------------------------------------
def child_decode(path: str) -> dict:
    from buswitness.capture.sources import open_capture
    from buswitness.decode import DecoderConfig, decode_source
    src = open_capture(path)
    cfg = DecoderConfig.from_header(src.header)
    t = time.perf_counter()
    frames = transactions = 0
    for out in decode_source(src, cfg):
        frames += len(out.frames)
        transactions += len(out.transactions)
    return {"seconds": time.perf_counter() - t, "frames": frames, "transactions": transactions,
            "peak_mb": _peak_mb()}


def child_analyze(path: str, html: str, summary: str) -> dict:
    from buswitness.analysis.dashboard import write_dashboard
    from buswitness.analysis.pipeline import AnalysisOptions, analyze
    from buswitness.analysis.summary import write_summary
    from buswitness.capture.sources import open_capture
    src = open_capture(path)
    t = time.perf_counter()
    result = analyze(src, AnalysisOptions(progress=False))
    t_analyze = time.perf_counter() - t
    t = time.perf_counter()
    write_dashboard(result, html)
    write_summary(result, summary)
    t_report = time.perf_counter() - t
    return {"seconds": t_analyze, "report_seconds": t_report, "frames": int(result.bus.frames),
            "duration_s": float(result.bus.duration_s), "peak_mb": _peak_mb(),
            "html_mb": Path(html).stat().st_size / 1e6}


def _stream_bytes(path: str, max_bytes: int) -> bytes:
    from buswitness.capture.sources import open_capture
    parts, n = [], 0
    for batch in open_capture(path).iter_batches():
        parts.append(batch.payload.tobytes())
        n += batch.payload.size
        if n >= max_bytes:
            break
    return b"".join(parts)[:max_bytes]


def pymodbus_split(data: bytes) -> int:
    """Frames pymodbus's RTU framer finds in a sniffed two-way stream.

    Its framer expects one direction; a sniffed stream alternates requests and responses, so
    a request framer and a response framer take turns, and a byte is skipped where neither
    finds a frame. Each successful decode tells the frame's size (PDU + address + CRC).
    """
    from pymodbus.framer import FramerRTU
    from pymodbus.pdu import DecodePDU
    framers = (FramerRTU(DecodePDU(True)), FramerRTU(DecodePDU(False)))
    pos, found, which, end = 0, 0, 0, len(data)
    while pos < end - 3:
        window = data[pos:pos + 256]
        for attempt in (which, which ^ 1):
            _, _, _, pdu = framers[attempt].decode(window)
            if pdu:
                pos += len(pdu) + 3
                found += 1
                which = attempt ^ 1
                break
        else:
            pos += 1
    return found


def child_framing(path: str, max_bytes: int) -> dict:
    from buswitness.decode import split_frames
    data = _stream_bytes(path, max_bytes)
    t = time.perf_counter()
    spans = split_frames(data)
    ours_s = time.perf_counter() - t
    ours = sum(1 for s in spans if getattr(s, "kind", "frame") == "frame")
    t = time.perf_counter()
    peer = pymodbus_split(data)
    peer_s = time.perf_counter() - t
    return {"bytes": len(data), "ours_frames": ours, "ours_s": ours_s, "peer_frames": peer, "peer_s": peer_s}


def child_browser(html: str) -> dict:
    from playwright.sync_api import sync_playwright
    args = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync"]
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path="/usr/bin/chromium", args=args)
        page = browser.new_page()
        t = time.perf_counter()
        page.goto(Path(html).resolve().as_uri())
        page.wait_for_function(
            "() => { const d = document.querySelectorAll('.js-plotly-plot');"
            " return d.length > 0 && [...d].every(e => e.querySelector('.main-svg')); }", timeout=60_000)
        seconds = time.perf_counter() - t
        charts = page.evaluate("document.querySelectorAll('.js-plotly-plot').length")
        browser.close()
    return {"seconds": seconds, "charts": charts}


def child_analyze_jobs(path: str, jobs: int) -> dict:
    import hashlib

    from buswitness.analysis.pipeline import AnalysisOptions, analyze
    from buswitness.analysis.summary import summary_dict
    from buswitness.capture.sources import open_capture
    notes: list = []
    t = time.perf_counter()
    result = analyze(open_capture(path), AnalysisOptions(jobs=jobs, notice=notes.append))
    seconds = time.perf_counter() - t
    summary = summary_dict(result)
    summary.pop("analysed_utc", None)
    digest = hashlib.sha256(json.dumps(summary, sort_keys=True, default=str).encode()).hexdigest()
    cpu = sum(r.ru_utime + r.ru_stime for r in (resource.getrusage(resource.RUSAGE_SELF),
                                                 resource.getrusage(resource.RUSAGE_CHILDREN)))
    workers_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    return {"seconds": seconds, "summary": digest, "notes": notes, "peak_mb": _peak_mb(), "cpu_s": cpu,
            "workers_peak_mb": workers_mb}


CHILDREN = {"decode": child_decode, "analyze": child_analyze, "framing": child_framing, "browser": child_browser,
            "analyze_jobs": child_analyze_jobs}


def run_child(stage: str, *args: object) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", stage, *map(str, args)]
    out = subprocess.run(cmd, capture_output=True, text=True)
    if out.returncode != 0:
        raise SystemExit(f"bench stage {stage} failed:\n{out.stderr[-3000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


# -- parent --------------------------------------------------------------------------------
def ensure_capture(scenario: str, hours: float, seed: int = 7) -> tuple[Path, float]:
    CACHE.mkdir(parents=True, exist_ok=True)
    path = CACHE / f"{scenario}-{hours:g}h-seed{seed}.bwcap"
    if path.exists():
        return path, 0.0
    from buswitness.simulate import load_scenario, simulate
    tmp = path.with_name(path.stem + ".partial.bwcap")
    if tmp.exists():
        tmp.unlink()
    t = time.perf_counter()
    simulate(load_scenario(scenario), duration_s=hours * 3600, seed=seed).write(tmp)
    seconds = time.perf_counter() - t
    tmp.rename(path)
    return path, seconds


def med(values: list[float]) -> str:
    if not values:
        return "-"
    if len(values) == 1:
        return f"{values[0]:.2f}"
    return f"{statistics.median(values):.2f} ({min(values):.2f}-{max(values):.2f})"


def bench_capture(name: str, path: Path, runs: int, rows: list, browser: bool) -> None:
    OUT.mkdir(parents=True, exist_ok=True)
    html, summary = OUT / f"{name}.html", OUT / f"{name}.summary.json"
    dec = [run_child("decode", path) for _ in range(runs)]
    ana = [run_child("analyze", path, html, summary) for _ in range(runs)]
    duration = ana[0]["duration_s"]
    frames = ana[0]["frames"]
    d_s = [r["seconds"] for r in dec]
    a_s = [r["seconds"] for r in ana]
    rows.append((name, "decode (framing+pairing)", med(d_s), f"{duration / statistics.median(d_s):,.0f}x",
                 f"{frames / statistics.median(d_s) / 1e6:.2f} M/s", med([r['peak_mb'] for r in dec])))
    rows.append((name, "analyze (decode+figures)", med(a_s), f"{duration / statistics.median(a_s):,.0f}x",
                 f"{frames / statistics.median(a_s) / 1e6:.2f} M/s", med([r['peak_mb'] for r in ana])))
    rows.append((name, "report (html+json)", med([r["report_seconds"] for r in ana]), "", "",
                 f"html {ana[0]['html_mb']:.1f} MB"))
    if browser and Path("/usr/bin/chromium").exists():
        b = [run_child("browser", html) for _ in range(runs)]
        rows.append((name, "open in chromium", med([r["seconds"] for r in b]), "", f"{b[0]['charts']} charts", ""))


def _cli_seconds(*argv: str) -> float:
    """Wall time of one ``buswitness`` command in a fresh process (imports included, as a user waits)."""
    env = dict(os.environ)
    env.pop("BUSWITNESS_DECODED_CACHE", None)
    t = time.perf_counter()
    out = subprocess.run([sys.executable, "-m", "buswitness.cli.main", *argv], capture_output=True, text=True, env=env)
    seconds = time.perf_counter() - t
    if out.returncode != 0:
        raise SystemExit(f"bench: buswitness {' '.join(argv)} failed:\n{out.stderr[-3000:]}")
    return seconds


def bench_cache_and_segments(name: str, path: Path, runs: int, rows: list, station: int = 1) -> None:
    """Issue 14 items 2 and 4: `evidence` after one `analyze` (decoded cache), and segments on every core
    against one pass (same summary, faster)."""
    work = OUT / "cache-bench"
    work.mkdir(parents=True, exist_ok=True)
    link = work / path.name
    for old in work.iterdir():
        old.unlink()
    link.symlink_to(path.resolve())
    first = _cli_seconds("analyze", str(link), "--json", str(work / "a.json"), "--no-progress")
    cached = [_cli_seconds("evidence", str(link), "--station", str(station), "-o", str(work / "e.html"),
                           "--no-progress") for _ in range(runs)]
    uncached = _cli_seconds("evidence", str(link), "--station", str(station), "-o", str(work / "f.html"),
                            "--no-progress", "--no-cache")
    sidecar = link.with_name(link.name + ".bwdecoded.parquet")
    rows.append((name, "analyze, leaving the decoded cache", f"{first:.2f}", "", "",
                 f"sidecar {sidecar.stat().st_size / 1e6:.1f} MB"))
    rows.append((name, "evidence after analyze (cache)", med(cached), "", "",
                 f"target <= {TARGET_EVIDENCE_CACHED_S:.0f} s: "
                 + ("met" if statistics.median(cached) <= TARGET_EVIDENCE_CACHED_S else "MISSED")))
    rows.append((name, "evidence --no-cache", f"{uncached:.2f}", "", "", f"{uncached / statistics.median(cached):.0f}x"))
    one = [run_child("analyze_jobs", path, 1) for _ in range(runs)]
    many = [run_child("analyze_jobs", path, os.cpu_count() or 1) for _ in range(runs)]
    speedup = statistics.median([r["seconds"] for r in one]) / statistics.median([r["seconds"] for r in many])
    equal = all(r["summary"] == one[0]["summary"] for r in one + many)
    notes = sorted({n for r in many for n in r["notes"]})
    rows.append((name, "analyze, one pass (--jobs 1)", med([r["seconds"] for r in one]), "", "",
                 f"{med([r['peak_mb'] for r in one])} MB; cpu {med([r['cpu_s'] for r in one])} s"))
    rows.append((name, f"analyze, segments (--jobs {os.cpu_count()})", med([r["seconds"] for r in many]), "",
                 f"{speedup:.2f}x", f"same summary: {'yes' if equal else 'NO'}; target >= {TARGET_SEGMENTS_SPEEDUP}x: "
                 + ("met" if speedup >= TARGET_SEGMENTS_SPEEDUP and equal else "MISSED")
                 + (f"; {notes[0]}" if notes else "")))
    # on a machine other work keeps busy, wall time says little: the CPU time says what the cores did
    rows.append((name, "  segments: peak MB, cpu", "", "", "",
                 f"parent {med([r['peak_mb'] for r in many])} MB, each worker <= "
                 f"{med([r['workers_peak_mb'] for r in many])} MB; cpu {med([r['cpu_s'] for r in many])} s in all"))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--hours", type=float, default=24.0, help="length of the saturated capture (default 24)")
    ap.add_argument("--runs", type=int, default=3, help="measured runs per stage (median reported)")
    ap.add_argument("--framing-mb", type=float, default=8.0, help="bytes of stream for the framing comparison")
    ap.add_argument("--no-browser", action="store_true")
    ap.add_argument("--fleet-nights", type=int, default=30, help="nights of the fleet load (default 30)")
    ap.add_argument("--fleet-buses", type=int, default=10, help="buses of the fleet load (default 10)")
    ap.add_argument("--fleet-night-s", type=float, default=300.0, help="simulated seconds per night (default 300)")
    ap.add_argument("--fleet-only", action="store_true", help="run only the fleet stage")
    ap.add_argument("--no-fleet", action="store_true", help="skip the fleet stage")
    ap.add_argument("--no-cache-bench", action="store_true", help="skip evidence-after-analyze and segments")
    ap.add_argument("--cache-only", action="store_true",
                    help="run only evidence-after-analyze and segments against one pass (issue 14 items 2, 4)")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        stage, *rest = args.child
        print(json.dumps(CHILDREN[stage](*[int(r) if r.isdigit() else r for r in rest])))
        return

    rows: list = []
    if args.fleet_only:
        _print_fleet(args)
        return
    if args.cache_only:
        sat, _ = ensure_capture("saturated115200", args.hours)
        bench_cache_and_segments(f"saturated-{args.hours:g}h", sat, args.runs, rows)
        _print_rows(rows)
        return
    sat, sim_s = ensure_capture("saturated115200", args.hours)
    noisy, noisy_s = ensure_capture("noisy", 1.0)
    print(f"bench load: {sat.name} ({sat.stat().st_size / 1e6:.0f} MB"
          + (f", simulated in {sim_s:.0f} s" if sim_s else ", cached") + ")")
    print(f"            {noisy.name} ({noisy.stat().st_size / 1e6:.1f} MB"
          + (f", simulated in {noisy_s:.1f} s" if noisy_s else ", cached") + ")")
    fr = [run_child("framing", sat, int(args.framing_mb * 1e6)) for _ in range(args.runs)]
    ours = [r["ours_frames"] / r["ours_s"] for r in fr]
    peer = [r["peer_frames"] / r["peer_s"] for r in fr]
    ratio = statistics.median(ours) / statistics.median(peer)
    rows.append(("stream", f"framing ours ({fr[0]['ours_frames']} frames)", med([r["ours_s"] for r in fr]), "",
                 f"{statistics.median(ours) / 1e6:.2f} M/s", ""))
    rows.append(("stream", f"framing pymodbus ({fr[0]['peer_frames']} frames)", med([r["peer_s"] for r in fr]),
                 "", f"{statistics.median(peer) / 1e6:.2f} M/s", f"ratio {ratio:.1f}x"))
    bench_capture(f"saturated-{args.hours:g}h", sat, args.runs, rows, not args.no_browser)
    bench_capture("noisy-1h", noisy, args.runs, rows, False)
    if not args.no_cache_bench:
        bench_cache_and_segments(f"saturated-{args.hours:g}h", sat, args.runs, rows)

    widths = [max(len(str(r[i])) for r in rows + [HEAD]) for i in range(len(HEAD))]
    for r in [HEAD] + rows:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths)))
    print(f"targets: analyze 24 h <= {TARGET_ANALYZE_S:.0f} s, peak <= {TARGET_PEAK_MB:.0f} MB, framing >= "
          f"{TARGET_FRAMING_RATIO:.0f}x pymodbus, html <= {TARGET_HTML_MB:.0f} MB, chromium <= {TARGET_BROWSER_S:.0f} s")
    print(f"machine: {os.cpu_count()} cores; python {sys.version.split()[0]}")
    if not args.no_fleet:
        _print_fleet(args)


def _print_fleet(args: argparse.Namespace) -> None:
    sys.path.insert(0, str(HERE))
    from fleet import bench_fleet
    rows = bench_fleet(args.fleet_nights, args.fleet_buses, args.fleet_night_s, args.runs)
    widths = [max(len(str(r[i])) for r in rows + [HEAD]) for i in range(len(HEAD))]
    for r in [HEAD] + rows:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths)))


def _print_rows(rows: list) -> None:
    widths = [max(len(str(r[i])) for r in rows + [HEAD]) for i in range(len(HEAD))]
    for r in [HEAD] + rows:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths)))


HEAD = ("capture", "stage", "seconds", "x real time", "rate", "peak MB / notes")

if __name__ == "__main__":
    main()

"""Fleet stage of the benchmark: ``dataset add`` throughput and ``trend`` latency (called by bench/run.py).

The load: ``nights`` nights x ``buses`` buses of the fictional bus of simulate/nights.py (one
bus in three has a station that degrades for two nights), ``night_s`` simulated seconds each,
cached in bench/cache/fleet-*/. ``dataset add`` is timed serially in this process and on a Dask
LocalCluster (2 workers, one thread each: this machine has 2 cores), each into a fresh
dataset; ``trend`` is the DuckDB queries over the Parquet files plus the step detection,
for the whole fleet and for one station.
"""

from __future__ import annotations

import os
import shutil
import statistics
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
CACHE = HERE / "cache"


def fleet_load(nights: int, buses: int, night_s: float) -> tuple[dict, float]:
    from buswitness.simulate.nights import Fault, fleet_nights
    folder = CACHE / f"fleet-{nights}n-{buses}b-{night_s:g}s"
    done = folder / "done"
    names = {f"bus{b:02d}": (Fault(3, nights // 2, nights // 2 + 2) if b % 3 == 0 else None) for b in range(buses)}
    if done.exists():
        return {bus: sorted(folder.glob(f"{bus}-night*.bwcap")) for bus in names}, 0.0
    shutil.rmtree(folder, ignore_errors=True)
    t = time.perf_counter()
    paths = fleet_nights(folder, names, nights, night_s)
    done.write_text("")
    return paths, time.perf_counter() - t


def _add(root: Path, paths: dict, scheduler) -> tuple[float, int]:
    from buswitness.analysis.dataset import add_many
    t = time.perf_counter()
    done = add_many(root, [(p, "bench", bus) for bus, files in paths.items() for p in files], scheduler=scheduler)
    return time.perf_counter() - t, sum(d.frames for d in done)


def bench_fleet(nights: int = 30, buses: int = 10, night_s: float = 300.0, runs: int = 3) -> list[tuple]:
    from buswitness.analysis.trend import changes, connect, nightly
    paths, sim_s = fleet_load(nights, buses, night_s)
    n = sum(len(v) for v in paths.values())
    size_mb = sum(p.stat().st_size for v in paths.values() for p in v) / 1e6
    rows = [(f"fleet {nights}x{buses}", f"load: {n} captures of {night_s:g} s, {size_mb:.0f} MB",
             f"{sim_s:.1f}" if sim_s else "cached", "", "", "")]
    work = Path(tempfile.mkdtemp(prefix="bw-fleet-"))
    try:
        serial_s, frames = _add(work / "serial", paths, None)
        rows.append((f"fleet {nights}x{buses}", "dataset add, serial", f"{serial_s:.1f}", "",
                     f"{n / serial_s * 60:.0f} captures/min", f"{frames / serial_s / 1e3:.0f} k frames/s"))
        from distributed import Client, LocalCluster
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
                Client(cluster) as client:
            dask_s, _ = _add(work / "dask", paths, client)
        rows.append((f"fleet {nights}x{buses}", "dataset add, Dask LocalCluster 2 workers", f"{dask_s:.1f}",
                     f"{serial_s / dask_s:.2f}x serial", f"{n / dask_s * 60:.0f} captures/min",
                     f"{frames / dask_s / 1e3:.0f} k frames/s"))
        again = time.perf_counter()
        _add(work / "serial", paths, None)
        rows.append((f"fleet {nights}x{buses}", "dataset add again (all present: content hashes only)",
                     f"{time.perf_counter() - again:.1f}", "", "", ""))
        disk = sum(p.stat().st_size for p in (work / "serial").rglob("*") if p.is_file()) / 1e6
        whole, one = [], []
        for _ in range(runs):
            t = time.perf_counter()
            table = nightly(work / "serial")
            found = changes(table)
            whole.append(time.perf_counter() - t)
            t = time.perf_counter()
            changes(nightly(work / "serial", station=3, bus="bus00", con=connect(work / "serial")))
            one.append(time.perf_counter() - t)
        rows.append((f"fleet {nights}x{buses}", f"trend, whole fleet ({len(table)} station-nights, {len(found)} steps)",
                     f"{statistics.median(whole):.2f}", "", "", f"dataset {disk:.0f} MB on disk"))
        rows.append((f"fleet {nights}x{buses}", "trend --station 3 --bus bus00", f"{statistics.median(one):.2f}", "",
                     "", ""))
    finally:
        shutil.rmtree(work, ignore_errors=True)
    rows.append((f"fleet {nights}x{buses}", f"machine: {os.cpu_count()} cores", "", "", "", ""))
    return rows

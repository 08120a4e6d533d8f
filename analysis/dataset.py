"""The fleet dataset: many captures (buses, sites, nights) as one set of Parquet files (docs/fleet.md).

Layout (hive-style partitions, read as they are by DuckDB, pandas/pyarrow, Spark and Dask)::

    DIR/site=S/bus=B/date=YYYY-MM-DD/capture=ID/frames.parquet
                                               /transactions.parquet
                                               /events.parquet
                                               /stations.parquet   per-station figures of the capture
                                               /minutes.parquet    per-station per-minute counts
                                               /capture.json       what was added, from where
    DIR/_manifest/ID.json                                          one entry per capture in the dataset
    DIR/_staging/                                                  captures being built (never read)

``ID`` is the content hash of the capture's bytes (every part of a rotated set, in order), so
adding the same capture again is a no-op whatever its file name. A capture is built whole in
``_staging`` and then moved into place by one rename: a reader sees all of it or none of it,
and a killed ``dataset add`` leaves at most a staging folder, removed by the next add. The
manifest entry is written after the rename; a capture folder without one (a kill between the
two) is whole and gets its entry back from its own ``capture.json`` (``repair``).

``date`` is the UTC date the capture starts on: a night across midnight stays in one partition.
Every time is a typed UTC timestamp (``timestamp[ns, tz=UTC]``); every table carries
``capture_id``, ``protocol`` and ``schema_version``.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import time
import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from buswitness.analysis.figures import MINUTE_COLUMNS
from buswitness.analysis.sinks import Sink, SinkContext
from buswitness.errors import UsageError

#: Version of the tables' columns (docs/fleet.md). Readers check it; a change of meaning bumps it.
SCHEMA_VERSION = 1
TABLES = ("frames", "transactions", "events", "stations", "minutes")
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
_HASH_CHUNK = 1 << 20
ID_LENGTH = 24  #: hex digits of the SHA-256 content hash kept as the capture id (96 bits)


def check_name(kind: str, name: str) -> str:
    """A site or bus name usable as a partition value (letters, digits, . _ -; at most 64)."""
    if not isinstance(name, str) or not _NAME.match(name) or name in (".", ".."):
        raise UsageError(f"{kind} name {name!r}: use letters, digits, '.', '_' or '-' (at most 64, no spaces)")
    return name


def content_id(paths: Sequence[str | os.PathLike]) -> str:
    """SHA-256 of the bytes of every file, in order: the capture id in the dataset."""
    h = hashlib.sha256()
    for p in paths:
        with open(p, "rb") as f:
            while chunk := f.read(_HASH_CHUNK):
                h.update(chunk)
    return h.hexdigest()[:ID_LENGTH]


def capture_files(path: str | os.PathLike) -> list[Path]:
    """The files a capture consists of (every part of a rotated set), as ``analyze`` reads them."""
    from buswitness.capture.fileformat import find_parts
    from buswitness.capture.sources import _guess_kind
    p = Path(path)
    if not p.is_file():
        from buswitness.errors import InputFileError
        raise InputFileError(p, "no such file" if not p.exists() else "is not a file")
    if _guess_kind(p) == "capture":
        return find_parts(p)[0]
    return [p]


# -- schema ------------------------------------------------------------------------------------

def _schemas() -> dict:
    import pyarrow as pa
    ts = pa.timestamp("ns", tz="UTC")
    common = [("capture_id", pa.string()), ("protocol", pa.string()), ("schema_version", pa.int16())]
    return {
        "frames": pa.schema(common + [
            ("t_start", ts), ("t_end", ts), ("t_end_low", ts), ("t_end_high", ts), ("port", pa.int16()),
            ("address", pa.int16()), ("function", pa.int16()), ("length", pa.int32()), ("direction", pa.string()),
            ("raw", pa.binary())]),
        "transactions": pa.schema(common + [
            ("t_request_end", ts), ("t_response_start", ts), ("station", pa.int16()), ("function", pa.int16()),
            ("outcome", pa.string()), ("outcome_decoded", pa.string()), ("exception_code", pa.int16()),
            ("retry", pa.bool_()), ("response_ms", pa.float64()), ("response_ms_low", pa.float64()),
            ("response_ms_high", pa.float64()), ("request_raw", pa.binary()), ("response_raw", pa.binary())]),
        "events": pa.schema(common + [
            ("t", ts), ("kind", pa.string()), ("station", pa.int16()), ("port", pa.int16()), ("raw", pa.binary()),
            ("detail", pa.string())]),
        "stations": pa.schema(common + [
            ("night", pa.date32()), ("start", ts), ("end", ts), ("station", pa.int16()), ("name", pa.string()),
            ("requests", pa.int64()), ("answered", pa.int64()), ("ok", pa.int64()), ("timeouts", pa.int64()),
            ("late", pa.int64()), ("exceptions", pa.int64()), ("corrupt", pa.int64()), ("ambiguous", pa.int64()),
            ("crc_errors", pa.int64()), ("collisions", pa.int64()), ("retries", pa.int64()),
            ("min_ms", pa.float64()), ("p50_ms", pa.float64()), ("p95_ms", pa.float64()), ("p99_ms", pa.float64()),
            ("max_ms", pa.float64()), ("timeout_ms", pa.float64()), ("timeout_source", pa.string()),
            ("rt_bins", pa.list_(pa.int32())), ("rt_counts", pa.list_(pa.int64()))]),
        "minutes": pa.schema(common + [("minute", ts), ("station", pa.int16())]
                             + [(c, pa.int64()) for c in MINUTE_COLUMNS]),
    }


def _ts(t_ns: pd.Series | np.ndarray, t0_ns: int, utc0_ns: int) -> np.ndarray:
    return (np.asarray(t_ns, np.int64) - t0_ns + utc0_ns).astype("datetime64[ns]")


# -- the sink ------------------------------------------------------------------------------------

class DatasetSink(Sink):
    """Build one capture's folder in ``DIR/_staging`` while it is analysed, then move it into place whole."""

    def __init__(self, root: str | Path, site: str, bus: str, capture_id: str, sources: Sequence[str] = ()) -> None:
        self.root = Path(root)
        self.site, self.bus = check_name("site", site), check_name("bus", bus)
        self.capture_id = capture_id
        self.sources = [str(s) for s in sources]
        self.stage: Path | None = None
        self._writers: dict = {}
        self.final: Path | None = None
        self.status = ""

    def open(self, context: SinkContext) -> None:
        import pyarrow.parquet as pq
        if context.utc0_ns is None:
            raise UsageError("a capture without a wall clock (its start in UTC) cannot go into a dataset: its "
                             "nights could not be placed; record it with buswitness record, or import it with a start time")
        from buswitness.decode import DecoderConfig
        self.context = context
        self.protocol = DecoderConfig.from_header(context.header).protocol
        self.schemas = _schemas()
        self.stage = self.root / "_staging" / f"{self.capture_id}.{_host()}.{os.getpid()}.{uuid.uuid4().hex[:8]}"
        self.stage.mkdir(parents=True)
        for name in ("frames", "transactions", "events"):
            target = self.stage / (f"{name}.decoded.parquet" if name == "transactions" else f"{name}.parquet")
            self._writers[name] = pq.ParquetWriter(target, self.schemas[name])

    def _common(self, n: int) -> dict:
        return {"capture_id": [self.capture_id] * n, "protocol": [self.protocol] * n,
                "schema_version": np.full(n, SCHEMA_VERSION, np.int16)}

    def write(self, frames: pd.DataFrame, transactions: pd.DataFrame, events: pd.DataFrame) -> None:
        import pyarrow as pa
        t0, u0 = self.context.t0_ns, self.context.utc0_ns
        if len(frames):
            f = frames.sort_values("t_start_ns", kind="stable")
            table = dict(self._common(len(f)), t_start=_ts(f["t_start_ns"], t0, u0), t_end=_ts(f["t_end_ns"], t0, u0),
                         t_end_low=_ts(f["t_end_lo_ns"], t0, u0), t_end_high=_ts(f["t_end_hi_ns"], t0, u0),
                         port=f["port"].to_numpy(np.int16), address=f["address"].to_numpy(np.int16),
                         function=f["function"].to_numpy(np.int16), length=f["length"].to_numpy(np.int32),
                         direction=f["direction"].astype(str).tolist(), raw=[bytes(b) for b in f["raw"]])
            self._writers["frames"].write_table(pa.table(table, schema=self.schemas["frames"]))
        if len(transactions):
            tx = transactions.sort_values("t_request_end_ns", kind="stable")
            start = tx["t_response_start_ns"].to_numpy(np.int64)
            outcome = tx["outcome"].astype(str).tolist()
            table = dict(self._common(len(tx)), t_request_end=_ts(tx["t_request_end_ns"], t0, u0),
                         t_response_start=pa.array(_ts(start, t0, u0), mask=start < 0),
                         station=tx["station"].to_numpy(np.int16), function=tx["function"].to_numpy(np.int16),
                         outcome=outcome, outcome_decoded=outcome,
                         exception_code=tx["exception_code"].to_numpy(np.int16), retry=tx["retry"].to_numpy(bool),
                         response_ms=tx["response_ms"].to_numpy(np.float64),
                         response_ms_low=tx["response_ms_low"].to_numpy(np.float64),
                         response_ms_high=tx["response_ms_high"].to_numpy(np.float64),
                         request_raw=[bytes(b) for b in tx["request_raw"]],
                         response_raw=[bytes(b) for b in tx["response_raw"]])
            self._writers["transactions"].write_table(pa.table(table, schema=self.schemas["transactions"]))
        if len(events):
            ev = events.sort_values("t_ns", kind="stable")
            table = dict(self._common(len(ev)), t=_ts(ev["t_ns"], t0, u0), kind=ev["kind"].astype(str).tolist(),
                         station=ev["station"].to_numpy(np.int16), port=ev["port"].to_numpy(np.int16),
                         raw=[bytes(b) for b in ev["raw"]], detail=ev["detail"].astype(str).tolist())
            self._writers["events"].write_table(pa.table(table, schema=self.schemas["events"]))

    def close(self, result) -> list[Path]:
        import pyarrow as pa
        import pyarrow.compute as pc
        import pyarrow.parquet as pq
        for writer in self._writers.values():
            writer.close()
        self._writers = {}
        # the decoder's outcomes judged against the timeout, as every figure is (Figures.judge)
        timeout = result.figures.judged_ms
        decoded = pq.ParquetFile(self.stage / "transactions.decoded.parquet")
        with pq.ParquetWriter(self.stage / "transactions.parquet", self.schemas["transactions"]) as out:
            for batch in decoded.iter_batches():
                outcome = batch.column("outcome_decoded")
                if timeout is not None:
                    over = pc.and_(pc.is_in(outcome, pa.array(["ok", "exception"])),
                                   pc.fill_null(pc.greater(batch.column("response_ms"), timeout), False))
                    outcome = pc.if_else(over, pa.scalar("late"), outcome)
                    code = pc.if_else(over, pa.scalar(0, pa.int16()), batch.column("exception_code"))
                    batch = batch.set_column(batch.schema.get_field_index("exception_code"), "exception_code", code)
                batch = batch.set_column(batch.schema.get_field_index("outcome"), "outcome", outcome)
                out.write_batch(batch)
        (self.stage / "transactions.decoded.parquet").unlink()
        pq.write_table(self._stations(result), self.stage / "stations.parquet")
        pq.write_table(self._minutes(result), self.stage / "minutes.parquet")
        start_utc = pd.Timestamp(self.context.utc0_ns, tz="UTC")
        night = start_utc.date().isoformat()
        meta = {"capture_id": self.capture_id, "schema_version": SCHEMA_VERSION, "site": self.site, "bus": self.bus,
                "date": night, "protocol": self.protocol, "start_utc": start_utc.isoformat(),
                "recording_id": result.header.capture_id, "host": result.header.host,
                "serial": str(result.header.serial), "timeout": result.timeout.to_dict(),
                "bus_figures": result.bus.to_dict(), "stations": [s.address for s in result.stations],
                "tool_version": result.tool_version, "files": [Path(s).name for s in self.sources]}
        (self.stage / "capture.json").write_text(json.dumps(meta, indent=1, sort_keys=True) + "\n")
        self.final = self.root / f"site={self.site}" / f"bus={self.bus}" / f"date={night}" / f"capture={self.capture_id}"
        self.final.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.rename(self.stage, self.final)  # one rename: the capture is in whole, or not at all
            self.status = "added"
        except OSError:
            if not self.final.exists():
                raise
            shutil.rmtree(self.stage, ignore_errors=True)  # the same content was added meanwhile
            self.status = "present"
        self.stage = None
        _write_manifest(self.root, self.final)
        return [self.final]

    def abort(self) -> None:
        for writer in self._writers.values():
            try:
                writer.close()
            except Exception:  # noqa: BLE001 -- dropping a half-written staging folder: any state is fine
                pass
        self._writers = {}
        if self.stage is not None:
            shutil.rmtree(self.stage, ignore_errors=True)
            self.stage = None

    def _stations(self, result):
        import pyarrow as pa
        f = result.figures
        u0 = self.context.utc0_ns
        start = pd.Timestamp(u0, tz="UTC")
        first, last = result.span_s
        rows = []
        for s in result.stations:
            hist = f.rt_mid[s.address]
            nz = np.flatnonzero(hist)
            r = s.response_ms
            rows.append({"station": s.address, "name": s.name, "requests": s.requests, "answered": s.answered,
                         "ok": s.ok, "timeouts": s.timeouts, "late": s.late, "exceptions": s.exceptions,
                         "corrupt": s.corrupt, "ambiguous": s.ambiguous, "crc_errors": s.crc_errors,
                         "collisions": s.collisions, "retries": s.retries, "min_ms": r.get("min"),
                         "p50_ms": r.get("p50"), "p95_ms": r.get("p95"), "p99_ms": r.get("p99"), "max_ms": r.get("max"),
                         "rt_bins": nz.astype(np.int32).tolist(), "rt_counts": hist[nz].astype(np.int64).tolist()})
        n = len(rows)
        cols = {k: [row[k] for row in rows] for k in (rows[0] if rows else {})}
        table = dict(self._common(n), night=[start.date()] * n,
                     start=[start + pd.Timedelta(first, "s")] * n, end=[start + pd.Timedelta(last, "s")] * n,
                     timeout_ms=[result.timeout.timeout_ms] * n, timeout_source=[result.timeout.source] * n)
        for name in self.schemas["stations"].names:
            if name not in table:
                table[name] = cols.get(name, [])
        return pa.table({k: table[k] for k in self.schemas["stations"].names}, schema=self.schemas["stations"])

    def _minutes(self, result):
        import pyarrow as pa
        f = result.figures
        parts = []
        for st, series in sorted(f.station_minutes.items()):
            used = np.flatnonzero(series.any(axis=1))
            if not len(used):
                continue
            block = pd.DataFrame(series[used], columns=list(MINUTE_COLUMNS))
            block.insert(0, "station", np.int16(st))
            block.insert(0, "minute", ((f.minute0 + used) * 60_000_000_000).astype("datetime64[ns]"))
            parts.append(block)
        df = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(
            {c: pd.Series(dtype="int64") for c in ("minute", "station") + MINUTE_COLUMNS})
        df = df.sort_values(["minute", "station"], kind="stable").reset_index(drop=True)
        table = dict(self._common(len(df)), minute=df["minute"].to_numpy("datetime64[ns]"),
                     station=df["station"].to_numpy(np.int16), **{c: df[c].to_numpy(np.int64) for c in MINUTE_COLUMNS})
        return pa.table(table, schema=self.schemas["minutes"])


# -- the manifest ----------------------------------------------------------------------------------

def _write_manifest(root: Path, folder: Path) -> None:
    from buswitness.fsutil import atomic_write
    meta = json.loads((folder / "capture.json").read_text())
    entry = {"capture_id": meta["capture_id"], "path": folder.relative_to(root).as_posix(), "site": meta["site"],
             "bus": meta["bus"], "date": meta["date"], "start_utc": meta["start_utc"],
             "schema_version": meta["schema_version"]}
    (root / "_manifest").mkdir(exist_ok=True)
    with atomic_write(root / "_manifest" / f"{meta['capture_id']}.json") as f:
        f.write(json.dumps(entry, sort_keys=True) + "\n")


#: A staging folder of another machine is left alone this long (its add may still be running).
STAGING_FOREIGN_S = 24 * 3600


def _host() -> str:
    return re.sub(r"[^A-Za-z0-9-]", "-", os.uname().nodename)[:40] or "host"


def _abandoned(folder: Path) -> bool:
    """A staging folder whose add is over: its process on this machine is gone (or it is old)."""
    parts = folder.name.split(".")
    if len(parts) == 4 and parts[1] == _host() and parts[2].isdigit():
        try:
            os.kill(int(parts[2]), 0)
        except ProcessLookupError:
            return True
        except PermissionError:
            return False
        return False
    try:
        return time.time() - folder.stat().st_mtime > STAGING_FOREIGN_S
    except OSError:
        return False


def capture_folders(root: str | Path) -> list[Path]:
    return sorted(Path(root).glob("site=*/bus=*/date=*/capture=*"))


def _entry(root: Path, capture_id: str) -> dict | None:
    try:
        return json.loads((root / "_manifest" / f"{capture_id}.json").read_text())
    except (OSError, ValueError):
        return None


def manifest(root: str | Path) -> dict[str, dict]:
    """capture id -> manifest entry, for every capture in the dataset."""
    out = {}
    for p in sorted((Path(root) / "_manifest").glob("*.json")):
        try:
            entry = json.loads(p.read_text())
        except (OSError, ValueError):
            continue
        out[entry["capture_id"]] = entry
    return out


def repair(root: str | Path) -> dict:
    """Make the dataset consistent after an interrupted add: drop abandoned staging folders, restore manifest entries.

    A staging folder is abandoned when the process that made it on this machine is gone, or, from
    another machine, after STAGING_FOREIGN_S; adds running at the same time keep theirs.
    """
    root = Path(root)
    dropped = 0
    staging = root / "_staging"
    if staging.exists():
        for p in staging.iterdir():
            if _abandoned(p):
                shutil.rmtree(p, ignore_errors=True)
                dropped += 1
    known = manifest(root)
    restored = 0
    folders = capture_folders(root)
    for folder in folders:
        cid = folder.name.split("=", 1)[1]
        if cid not in known:
            _write_manifest(root, folder)
            restored += 1
    present = {f.name.split("=", 1)[1] for f in folders}
    stale = [cid for cid in known if cid not in present]
    for cid in stale:
        (root / "_manifest" / f"{cid}.json").unlink(missing_ok=True)
    return {"staging_dropped": dropped, "manifest_restored": restored, "manifest_stale": len(stale)}


def check(root: str | Path) -> list[str]:
    """Problems that would make the dataset inconsistent (empty when it is consistent)."""
    root = Path(root)
    problems = []
    known = manifest(root)
    for folder in capture_folders(root):
        cid = folder.name.split("=", 1)[1]
        missing = [t for t in TABLES if not (folder / f"{t}.parquet").is_file()]
        if missing or not (folder / "capture.json").is_file():
            problems.append(f"{folder}: incomplete ({', '.join(missing) or 'capture.json'} missing)")
        if cid not in known:
            problems.append(f"{folder}: no manifest entry")
    for cid, entry in known.items():
        if not (root / entry["path"]).is_dir():
            problems.append(f"manifest entry {cid}: its folder is missing")
    return problems


# -- adding ----------------------------------------------------------------------------------------

@dataclass
class Added:
    path: str
    capture_id: str
    status: str          #: "added" or "present" (the same content was already in the dataset)
    frames: int = 0
    seconds: float = 0.0
    folder: str = ""


def build_capture(path: str, root: str, site: str, bus: str, capture_id: str | None = None,
                  timeout_ms: float | None = None) -> Added:
    """Analyse one capture into the dataset (a no-op when its content is already there). Runs on any worker."""
    from buswitness.analysis.pipeline import AnalysisOptions, analyze
    from buswitness.capture.sources import open_capture
    t_start = time.perf_counter()
    files = capture_files(path)
    cid = capture_id or content_id(files)
    entry = _entry(Path(root), cid)  # this capture only: the add may have been queued before another built it
    if entry is not None and (Path(root) / entry["path"]).is_dir():
        return Added(str(path), cid, "present", folder=entry["path"])
    sink = DatasetSink(root, site, bus, cid, files)
    result = analyze(open_capture(path), AnalysisOptions(timeout_ms=timeout_ms), sinks=[sink])
    return Added(str(path), cid, sink.status, frames=result.bus.frames, seconds=time.perf_counter() - t_start,
                 folder=sink.final.relative_to(Path(root)).as_posix() if sink.final else "")


def add_captures(root: str | Path, paths: Sequence[str | os.PathLike], site: str = "default", bus: str = "default",
                 scheduler=None, workers: int | None = None, timeout_ms: float | None = None,
                 progress: Callable[[int, int | None], None] | None = None) -> list[Added]:
    """Add captures of one site and bus to the dataset at ``root`` (see ``add_many``)."""
    return add_many(root, [(p, site, bus) for p in paths], scheduler, workers, timeout_ms, progress)


def add_many(root: str | Path, items: Sequence[tuple], scheduler=None, workers: int | None = None,
             timeout_ms: float | None = None, progress: Callable[[int, int | None], None] | None = None) -> list[Added]:
    """Add captures, each ``(path, site, bus)``, to the dataset at ``root``: serially or on a Dask cluster.

    ``scheduler`` is None (one after another in this process), ``"local"`` (a LocalCluster of
    ``workers`` processes on this machine), the address of a running Dask scheduler whose workers
    see ``root`` and the captures at the same paths, or a ``distributed.Client`` already connected.
    Captures already in the dataset (by content) and repeats are skipped. Results come in the
    order the builds finish.
    """
    root = Path(root)
    for _, site, bus in items:
        check_name("site", site)
        check_name("bus", bus)
    root.mkdir(parents=True, exist_ok=True)
    repair(root)
    progress = progress or (lambda done, total: None)
    jobs: dict[str, tuple] = {}
    done: list[Added] = []
    known = manifest(root)
    for p, site, bus in items:
        cid = content_id(capture_files(p))
        if cid in known or cid in jobs:
            done.append(Added(str(p), cid, "present", folder=known.get(cid, {}).get("path", "")))
        else:
            jobs[cid] = (str(Path(p).resolve()), site, bus)
    total = len(items)
    progress(len(done), total)
    if not jobs:
        return done
    where = str(root.resolve())
    if scheduler is None:
        for cid, (p, site, bus) in jobs.items():
            done.append(build_capture(p, where, site, bus, cid, timeout_ms))
            progress(len(done), total)
        return done
    from distributed import Client, LocalCluster, as_completed
    cluster = None
    own = True
    if isinstance(scheduler, Client):
        client, own = scheduler, False
    elif scheduler == "local":
        cluster = LocalCluster(n_workers=workers or min(len(jobs), os.cpu_count() or 1) or 1, threads_per_worker=1,
                               processes=True, dashboard_address=None)
        client = Client(cluster)
    else:
        client = Client(scheduler)
    try:
        futures = [client.submit(build_capture, p, where, site, bus, cid, timeout_ms, key=f"add-{cid}", pure=False)
                   for cid, (p, site, bus) in jobs.items()]
        for future in as_completed(futures):
            done.append(future.result())
            progress(len(done), total)
    finally:
        if own:
            client.close()
        if cluster is not None:
            cluster.close()
    return done

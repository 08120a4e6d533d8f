"""The decoded cache: what one ``analyze`` learnt from a capture, kept next to it for the next run.

The first ``analyze`` (or ``evidence``) leaves a sidecar, ``<capture>.bwdecoded.parquet``, next
to the capture (next to the first part of a rotated set). It holds the capture's figures before
they are judged against the master's timeout (analysis/figures.py ``Figures``), the delivery
estimates, the reader's damage report and the protocol's own figures: everything a report needs
that depends on the capture and the decoder settings only. A later ``evidence``, or an ``analyze``
with another ``--timeout`` or station map, starts from it instead of decoding again. Outputs that
need every decoded row (``--csv``, ``--parquet``, ``dataset add``) still decode.

Key: the SHA-256 of the bytes of every part (read whole every time: a stale cache is never
used, whatever the file's size or times say) and the decoder settings: the header as the
decoder reads it (serial format and overrides, stated latencies, roles), the protocol, the
port roles asked for, the input kind and its options, and a digest of the code that decodes
and counts (a new version of the decoder never reads an old sidecar). The SHA-256 of each
part is the one the evidence report prints, so it is computed once per run.

The sidecar is one Parquet file of rows ``(name, kind, dtype, shape, data)``: the figures'
arrays as raw little-endian bytes with their type and shape, and one JSON row for the rest;
no pickle, so a sidecar is data, never code. A digest of every row sits in the file's
metadata: a sidecar cut off, damaged or edited is ignored with a notice, never trusted. It is
written atomically (core/fsutil.py); a folder that cannot be written is skipped with a notice.
Without pyarrow (the ``parquet`` extra) there is no cache, and a one-line notice says so.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np
from buswitness import __version__

#: Sidecar name: the capture's (first part's) name with this appended.
SUFFIX = ".bwdecoded.parquet"
#: Layout of the sidecar's rows; a change bumps it (older sidecars are then ignored).
LAYOUT = 1
_HASH_CHUNK = 1 << 20
#: Array types a sidecar may hold (anything else is a damaged or foreign file).
_DTYPES = frozenset({"<i8", "<f8", "<i4", "<i2", "|i1", "|u1", "|b1", "<u8", "<u4", "<u2"})
#: Code whose change changes what is cached: everything that reads, decodes and counts.
_CODE = ("buswitness.decode", "buswitness.capture", "buswitness.detect")
_CODE_FILES = ("records.py", "serial.py", "protocols.py", "analysis/figures.py", "analysis/histogram.py",
               "analysis/pipeline.py", "analysis/decodecache.py", "analysis/segments.py")

Notice = Callable[[str], None]


@dataclass(frozen=True)
class PartDigest:
    """One file of the capture: its path, size and SHA-256."""

    path: str
    size: int
    sha256: str


@dataclass
class Cached:
    """What a sidecar gives back: the unjudged figures and what the result needs besides them."""

    figures: object                #: analysis/figures.py Figures, unjudged
    delivery: list                 #: result.delivery (dicts, with timing_contradictions)
    latencies: list                #: [(port id, latency_ms, latency_source)] of the reported header
    damage: dict | None            #: the reader's ReadReport as a dict
    protocol: str
    protocol_figures: dict


def have_pyarrow() -> bool:
    try:
        import pyarrow  # noqa: F401
        import pyarrow.parquet  # noqa: F401
    except ImportError:
        return False
    return True


def sidecar_path(paths: Sequence[str | Path]) -> Path:
    first = Path(paths[0])
    return first.with_name(first.name + SUFFIX)


def part_digests(paths: Sequence[str | Path]) -> list[PartDigest]:
    """Size and SHA-256 of every file, read whole in chunks (OSError propagates)."""
    out = []
    for p in paths:
        h = hashlib.sha256()
        size = 0
        with open(p, "rb") as f:
            while chunk := f.read(_HASH_CHUNK):
                h.update(chunk)
                size += len(chunk)
        out.append(PartDigest(str(p), size, h.hexdigest()))
    return out


@lru_cache(maxsize=1)
def code_digest() -> str:
    """BLAKE2b of the source of the modules whose change changes the decoded figures."""
    import importlib
    h = hashlib.blake2b(__version__.encode(), digest_size=16)
    root = Path(importlib.import_module("buswitness").__file__).parent
    files: list[Path] = []
    for name in _CODE:
        folder = Path(importlib.import_module(name).__file__).parent
        files.extend(sorted(folder.rglob("*.py")))
    analysis = Path(importlib.import_module("buswitness.analysis").__file__).parent
    for rel in _CODE_FILES:
        files.append(analysis / rel.split("/", 1)[1] if rel.startswith("analysis/") else root / rel)
    for f in files:
        h.update(str(f.name).encode())
        try:
            h.update(f.read_bytes())
        except OSError:
            h.update(b"?")
    return h.hexdigest()


def cache_key(source, digests: Sequence[PartDigest], protocol: str, port_roles: dict | None) -> str:
    """The sidecar key: the capture's content and every setting the decoded figures depend on."""
    settings = {
        "layout": LAYOUT,
        "code": code_digest(),
        "parts": [(Path(d.path).name, d.size, d.sha256) for d in digests],
        "header": repr(source.header),
        "protocol": protocol,
        "roles": sorted((int(k), str(v)) for k, v in (port_roles or {}).items()) if port_roles is not None else None,
        "kind": type(source).__name__,
        "on_bad_line": getattr(source, "on_bad_line", None),
    }
    return hashlib.blake2b(json.dumps(settings, sort_keys=True, default=str).encode(), digest_size=20).hexdigest()


# -- (de)serialisation --------------------------------------------------------------------------

def _json_default(value):
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not kept in the decoded cache")


def _figure_rows(figures) -> tuple[list[tuple[str, np.ndarray]], dict]:
    """The figures as (name, array) rows and a JSON-able dict of everything else."""
    from buswitness.analysis.figures import _ARRAYS
    arrays: list[tuple[str, np.ndarray]] = [(name, getattr(figures, name)) for name in _ARRAYS]
    arrays.append(("bus_minutes", figures.bus_minutes))
    for name in ("station_minutes", "station_minute_rt", "station_minute_max"):
        for st, a in sorted(getattr(figures, name).items()):
            arrays.append((f"{name}/{int(st)}", a))
    edges = dict(figures.edges)
    for name in ("first_request_ns", "last_request_ns"):
        if name in edges:
            arrays.append((f"edges/{name}", edges.pop(name)))
    pending = edges.get("pending_timeout")
    edges["pending_timeout"] = None if pending is None else [int(pending[0]), int(pending[1])]

    def by_station(d: dict) -> dict:
        return {str(int(k)): v for k, v in d.items()}

    meta = {
        "t0_ns": figures.t0_ns, "char_ns": figures.char_ns, "utc0_ns": figures.utc0_ns, "minute0": figures.minute0,
        "capture_ids": list(figures.capture_ids), "frames": figures.frames, "frame_bytes": figures.frame_bytes,
        "busy_ns": figures.busy_ns, "first_ns": figures.first_ns, "last_ns": figures.last_ns,
        "unknown_outcomes": figures.unknown_outcomes, "largest_gaps": [list(g) for g in figures.largest_gaps],
        "worst": by_station({k: [[rt, r] for rt, r in v] for k, v in figures.worst.items()}),
        "slow": by_station({k: [[rt, r] for rt, r in v] for k, v in figures.slow.items()}),
        "failures": by_station(figures.failures), "late_rows": by_station(figures.late_rows),
        "device_ids": by_station(figures.device_ids), "edges": edges,
    }
    return arrays, meta


def _figures_from(arrays: dict[str, np.ndarray], meta: dict):
    from buswitness.analysis.figures import _ARRAYS, Figures

    def by_station(d: dict) -> dict:
        return {int(k): v for k, v in d.items()}

    def series(name: str) -> dict:
        prefix = name + "/"
        return {int(k[len(prefix):]): a for k, a in arrays.items() if k.startswith(prefix)}

    edges = dict(meta["edges"])
    for name in ("first_request_ns", "last_request_ns"):
        if f"edges/{name}" in arrays:
            edges[name] = arrays[f"edges/{name}"]
    if edges.get("pending_timeout") is not None:
        edges["pending_timeout"] = tuple(edges["pending_timeout"])
    return Figures(
        t0_ns=meta["t0_ns"], char_ns=meta["char_ns"], utc0_ns=meta["utc0_ns"], minute0=meta["minute0"],
        capture_ids=list(meta["capture_ids"]), **{name: arrays[name] for name in _ARRAYS},
        frames=meta["frames"], frame_bytes=meta["frame_bytes"], busy_ns=meta["busy_ns"], first_ns=meta["first_ns"],
        last_ns=meta["last_ns"], unknown_outcomes=meta["unknown_outcomes"],
        largest_gaps=[tuple(g) for g in meta["largest_gaps"]],
        worst={k: [(rt, r) for rt, r in v] for k, v in by_station(meta["worst"]).items()},
        slow={k: [(rt, r) for rt, r in v] for k, v in by_station(meta["slow"]).items()},
        failures=by_station(meta["failures"]), late_rows=by_station(meta["late_rows"]),
        device_ids=by_station(meta["device_ids"]), station_minutes=series("station_minutes"),
        station_minute_rt=series("station_minute_rt"), station_minute_max=series("station_minute_max"),
        bus_minutes=arrays["bus_minutes"], edges=edges)


def _rows_digest(names: list, kinds: list, dtypes: list, shapes: list, data: list) -> str:
    h = hashlib.blake2b(digest_size=20)
    for row in zip(names, kinds, dtypes, shapes, data):
        for part in row:
            b = part if isinstance(part, bytes) else str(part).encode()
            h.update(len(b).to_bytes(8, "little"))
            h.update(b)
    return h.hexdigest()


def store(path: Path, key: str, result, notice: Notice) -> bool:
    """Write the sidecar for ``result`` (unjudged figures and the rest) atomically; False if it was not."""
    import pyarrow as pa
    import pyarrow.parquet as pq
    from buswitness.errors import OutputError
    from buswitness.fsutil import atomic_write
    try:
        arrays, meta = _figure_rows(result.unjudged)
        damage = result.damage
        meta = {
            "figures": meta, "delivery": result.delivery,
            "latencies": [[p.id, p.latency_ms, p.latency_source] for p in result.header.ports],
            "damage": None if damage is None else dataclasses.asdict(damage),
            "protocol": result.protocol, "protocol_figures": result.protocol_figures,
        }
        text = json.dumps(meta, default=_json_default, allow_nan=True)
    except (TypeError, ValueError) as exc:
        notice(f"decoded cache not written: {exc}")
        return False
    names, kinds, dtypes, shapes, data = ["meta"], ["json"], [""], ["[]"], [text.encode()]
    for name, a in arrays:
        a = np.ascontiguousarray(a)
        dt = a.dtype.newbyteorder("<") if a.dtype.byteorder == ">" else a.dtype
        names.append(name)
        kinds.append("array")
        dtypes.append(dt.str)
        shapes.append(json.dumps(list(a.shape)))
        data.append(a.astype(dt, copy=False).tobytes())
    table = pa.table({"name": names, "kind": kinds, "dtype": dtypes, "shape": shapes,
                      "data": pa.array(data, type=pa.large_binary())})
    digest = _rows_digest(names, kinds, dtypes, shapes, data)
    table = table.replace_schema_metadata({b"buswitness.key": key.encode(), b"buswitness.rows": digest.encode(),
                                           b"buswitness.layout": str(LAYOUT).encode()})
    try:
        with atomic_write(path, "wb", encoding=None) as f:
            pq.write_table(table, f, compression="zstd")
    except OutputError as exc:
        notice(f"decoded cache not written: {exc} (the next run decodes again)")
        return False
    return True


def load(path: Path, key: str, notice: Notice) -> Cached | None:
    """The sidecar's content when it exists, is whole and matches ``key``; None otherwise."""
    import pyarrow.parquet as pq
    if not path.exists():
        return None
    try:
        with pq.ParquetFile(path) as pf:
            table = pf.read()
        info = table.schema.metadata or {}
        if info.get(b"buswitness.layout") != str(LAYOUT).encode() or info.get(b"buswitness.key") != key.encode():
            return None  # another capture content, other settings or another version: stale, not damaged
        cols = {c: table.column(c).to_pylist() for c in ("name", "kind", "dtype", "shape", "data")}
        if _rows_digest(cols["name"], cols["kind"], cols["dtype"], cols["shape"], cols["data"]) != \
                info.get(b"buswitness.rows", b"").decode():
            raise ValueError("its content does not match its own digest")
        arrays: dict[str, np.ndarray] = {}
        meta = None
        for name, kind, dtype, shape, data in zip(*cols.values()):
            if kind == "json" and name == "meta":
                meta = json.loads(data.decode())
                continue
            if kind != "array" or dtype not in _DTYPES:
                raise ValueError(f"unexpected row {name!r}")
            dims = json.loads(shape)
            a = np.frombuffer(data, dtype=np.dtype(dtype))
            if math.prod(dims) != a.size:
                raise ValueError(f"row {name!r} has the wrong size")
            arrays[name] = a.reshape(dims).copy()
        if meta is None:
            raise ValueError("no meta row")
        figures = _figures_from(arrays, meta["figures"])
        return Cached(figures, meta["delivery"], [tuple(x) for x in meta["latencies"]], meta["damage"],
                      meta["protocol"], meta["protocol_figures"])
    except Exception as exc:  # noqa: BLE001 - a damaged sidecar is never trusted, whatever broke in it
        notice(f"decoded cache {path.name} is damaged or unreadable ({type(exc).__name__}: {exc}); decoding again")
        return None


def damage_report(data: dict | None):
    """The reader's ReadReport from its stored dict."""
    if data is None:
        return None
    from buswitness.capture.fileformat import ReadReport
    names = {f.name for f in dataclasses.fields(ReadReport)}
    return ReadReport(**{k: v for k, v in data.items() if k in names})


def writable(path: Path) -> bool:
    import os
    return os.access(path.parent, os.W_OK)

"""The decoded cache: a second run from the sidecar gives exactly what a fresh decode gives.

The oracle is a fresh analysis of the same capture with the cache off (itself checked against
the simulator's truth elsewhere). Source: every check compares with what the test itself made;
no check value comes from outside the project.
"""

from __future__ import annotations

import json
import os

import pytest
from buswitness.analysis import decodecache
from buswitness.analysis.pipeline import AnalysisOptions, analyze
from buswitness.analysis.summary import summary_dict
from buswitness.capture.sources import open_capture
from buswitness.cli.main import main
from buswitness.simulate import load_scenario, simulate

pytest.importorskip("pyarrow")


@pytest.fixture(autouse=True)
def _cache_on(monkeypatch):
    monkeypatch.delenv("BUSWITNESS_DECODED_CACHE", raising=False)


def _capture(tmp_path, scenario: str = "fault-late", seconds: float = 60.0, seed: int = 5):
    path = tmp_path / f"{scenario}.bwcap"
    simulate(load_scenario(scenario), duration_s=seconds, seed=seed).write(path)
    return path


def _summary(result) -> dict:
    d = summary_dict(result)
    d.pop("analysed_utc", None)
    d.get("tool", {}).pop("analysed_utc", None)
    return json.loads(json.dumps(d, default=str))


def _run(path, notes: list | None = None, **kw):
    notes = notes if notes is not None else []
    options = AnalysisOptions(cache=True, notice=notes.append, **kw)
    return analyze(open_capture(path), options)


@pytest.mark.parametrize("scenario", ["fault-late", "noisy", "fault-exceptions", "fault-late-retry"])
def test_second_run_from_the_cache_equals_a_fresh_decode(tmp_path, scenario):
    path = _capture(tmp_path, scenario)
    first = _run(path)
    sidecar = decodecache.sidecar_path([path])
    assert sidecar.exists()
    stamp = sidecar.stat().st_mtime_ns
    fresh = analyze(open_capture(path), AnalysisOptions())
    again = _run(path)
    assert sidecar.stat().st_mtime_ns == stamp  # read, not written again
    assert _summary(again) == _summary(fresh) == _summary(first)
    assert again.part_digests and again.part_digests[0].size == path.stat().st_size


def test_another_timeout_from_the_cache_equals_a_fresh_decode_with_it(tmp_path):
    path = _capture(tmp_path)
    _run(path)
    cached = _run(path, timeout_ms=150.0)
    fresh = analyze(open_capture(path), AnalysisOptions(timeout_ms=150.0))
    assert _summary(cached) == _summary(fresh)
    assert cached.timeout.source == "given"


def test_changed_capture_or_settings_are_never_read_from_a_stale_sidecar(tmp_path):
    path = _capture(tmp_path, "fault-late", seed=5)
    _run(path)
    sidecar = decodecache.sidecar_path([path])
    data = bytearray(path.read_bytes())
    data[-10] ^= 0xFF  # one byte of the last block: the same size and (after utime) the same times
    st = path.stat()
    path.write_bytes(bytes(data))
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    key_before = sidecar.read_bytes()
    fresh = analyze(open_capture(path), AnalysisOptions())
    again = _run(path)
    assert _summary(again) == _summary(fresh)
    assert sidecar.read_bytes() != key_before  # written anew for the new content
    # other settings: the protocol's port roles
    roles = _run(path, port_roles={0: "both"})
    assert _summary(roles) == _summary(analyze(open_capture(path), AnalysisOptions(port_roles={0: "both"})))


def test_a_cut_off_or_damaged_sidecar_is_ignored_with_a_notice(tmp_path):
    path = _capture(tmp_path)
    _run(path)
    sidecar = decodecache.sidecar_path([path])
    whole = sidecar.read_bytes()
    fresh = _summary(analyze(open_capture(path), AnalysisOptions()))
    for damaged in (whole[: len(whole) // 2], whole[:100] + bytes([whole[100] ^ 0x55]) + whole[101:], b""):
        sidecar.write_bytes(damaged)
        notes: list = []
        result = _run(path, notes)
        assert _summary(result) == fresh
        if damaged:
            assert any("damaged or unreadable" in n for n in notes), notes
        assert sidecar.read_bytes() != damaged  # replaced by a whole one


def test_read_only_folder_skips_the_sidecar_with_a_notice(tmp_path):
    if os.geteuid() == 0:
        pytest.skip("root writes into read-only folders")
    folder = tmp_path / "ro"
    folder.mkdir()
    path = _capture(folder)
    folder.chmod(0o555)
    try:
        notes: list = []
        result = _run(path, notes)
        assert result.bus.frames > 0
        assert any("not writable" in n for n in notes), notes
        assert not decodecache.sidecar_path([path]).exists()
    finally:
        folder.chmod(0o755)


def test_no_cache_neither_reads_nor_writes(tmp_path):
    path = _capture(tmp_path)
    analyze(open_capture(path), AnalysisOptions(cache=False))
    assert not decodecache.sidecar_path([path]).exists()


def test_cli_evidence_after_analyze_reads_the_cache_and_matches(tmp_path, monkeypatch):
    path = _capture(tmp_path)
    monkeypatch.chdir(tmp_path)
    assert main(["analyze", str(path), "--json", "a.json", "--no-progress"]) == 0
    assert decodecache.sidecar_path([path]).exists()
    calls: list = []
    import buswitness.analysis.pipeline as pipeline
    real = pipeline._decoded

    def spy(*a, **k):
        calls.append(1)
        return real(*a, **k)

    monkeypatch.setattr(pipeline, "_decoded", spy)
    assert main(["evidence", str(path), "--station", "7", "-o", "cached.html", "--no-progress"]) == 0
    assert not calls  # nothing decoded
    assert main(["evidence", str(path), "--station", "7", "-o", "fresh.html", "--no-progress", "--no-cache"]) == 0
    assert calls

    def scrub(text: str) -> str:
        import re
        # the moment each report was prepared differs (ISO form and the table form "2026-12-02 19:55:08")
        return re.sub(r"\d{4}-\d\d-\d\d[T ]\d\d:\d\d:\d\d[^<\"]*", "", text)

    assert scrub((tmp_path / "cached.html").read_text()) == scrub((tmp_path / "fresh.html").read_text())


def test_table_outputs_decode_even_with_a_cache(tmp_path, monkeypatch):
    path = _capture(tmp_path)
    monkeypatch.chdir(tmp_path)
    assert main(["analyze", str(path), "--json", "a.json", "--no-progress"]) == 0
    assert main(["analyze", str(path), "--csv", "out", "--no-progress"]) == 0
    assert (tmp_path / "out" / "frames.csv").stat().st_size > 100

"""The floors of the house: capture and decode never import each other (issue 13, ground floor).

Walks every module's import statements (static, so a lazy import inside a function counts too).

Source: the project's own layering rule (STYLE.md); no check value comes from outside the project.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
FOLDERS = {"capture": "buswitness.capture", "decode": "buswitness.decode", "core": "buswitness"}


def _imports(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
            names.update(f"{node.module}.{a.name}" for a in node.names)
    return names


def _modules(folder: str) -> list[Path]:
    return sorted((ROOT / folder).rglob("*.py"))


def test_capture_imports_nothing_from_decode():
    for path in _modules("capture"):
        bad = sorted(n for n in _imports(path) if n.startswith("buswitness.decode"))
        assert not bad, f"{path.relative_to(ROOT)} imports {bad}"


def test_decode_imports_nothing_from_capture():
    for path in _modules("decode"):
        bad = sorted(n for n in _imports(path) if n.startswith("buswitness.capture"))
        assert not bad, f"{path.relative_to(ROOT)} imports {bad}"


def test_ground_floor_imports_no_floor_above():
    above = ("buswitness.capture", "buswitness.decode", "buswitness.analysis", "buswitness.cli",
             "buswitness.simulate", "buswitness.detect")
    for path in _modules("core"):
        bad = sorted(n for n in _imports(path) if n.startswith(above))
        assert not bad, f"{path.relative_to(ROOT)} imports {bad}"


def test_decoder_core_knows_no_protocol():
    """The decoder core (port stream, merge, facade) reaches protocols only through the registry."""
    for name in ("decoder.py",):
        text = (ROOT / "decode" / name).read_text(encoding="utf-8")
        bad = sorted(n for n in _imports(ROOT / "decode" / name)
                     if n.startswith(("buswitness.decode.framer", "buswitness.decode.ascii",
                                      "buswitness.decode.bulk", "buswitness.decode.pairing",
                                      "buswitness.decode.lengths", "buswitness.decode.protocols.modbus",
                                      "buswitness.decode.protocols.profibus")))
        assert not bad, f"decode/{name} imports {bad}"
        assert "0x80" not in text and "crc" not in text.lower()


def test_old_import_places_still_work():
    from buswitness.capture.fileformat import FLAG_BREAK, RecordBatch
    from buswitness.decode.timing import SerialFormat
    from buswitness.records import FLAG_BREAK as FB
    from buswitness.records import RecordBatch as RB
    from buswitness.serial import SerialFormat as SF
    assert FLAG_BREAK == FB and RecordBatch is RB and SerialFormat is SF

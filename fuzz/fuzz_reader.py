"""Coverage-guided fuzzing of the capture-file reader and the hex-text importer (atheris).

Run outside CI for a fixed budget, e.g.::

    pip install atheris
    python fuzz/fuzz_reader.py -atheris_runs=200000 /tmp/corpus-reader fuzz/seeds/reader

Any input must give records or a ``BuswitnessError``; anything else is a crash that
becomes a regression test in ``tests/test_fileformat_damage.py``.
"""

from __future__ import annotations

import os
import sys
import tempfile

import atheris

with atheris.instrument_imports():
    from buswitness.capture.sources import open_capture
    from buswitness.errors import BuswitnessError

_DIR = tempfile.mkdtemp(prefix="bw-fuzz-")
_PATH = os.path.join(_DIR, "input")


def one_input(data: bytes) -> None:
    kind = ("auto", "capture", "hex")[data[0] % 3] if data else "auto"
    with open(_PATH, "wb") as f:
        f.write(data[1:])
    try:
        src = open_capture(_PATH, kind=kind, on_bad_line="skip")
        for batch in src.iter_batches():
            if int(batch.length.sum()) != batch.payload.size:
                raise AssertionError("batch lengths disagree with its payload")
    except BuswitnessError:
        pass


def main() -> None:
    atheris.Setup(sys.argv, one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main()

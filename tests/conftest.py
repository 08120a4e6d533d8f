"""Shared test set-up: the command line leaves no decoded cache next to test inputs (sample_captures/ is
part of the repository); tests/test_decodecache.py turns it back on for itself."""

from __future__ import annotations

import pytest


@pytest.fixture(autouse=True)
def _no_decoded_cache(monkeypatch):
    monkeypatch.setenv("BUSWITNESS_DECODED_CACHE", "off")
